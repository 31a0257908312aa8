"""What a rule is, what it reads, and how its settings resolve.

A rule is one module holding a :data:`RULE` (:class:`RuleSpec`): its name (its ID in reports
and policies), the command it serves (``audit`` or ``compare``), default severity, a typed
settings record (its thresholds, see :func:`threshold`), a one-line why, and ONE check: either
``per_layer`` (findings on one layer; optionally a ``finish`` once every layer is done) or
``whole`` (findings on the whole checkpoint, or on the whole comparison). The module docstring
is the rule's documentation page.

The engine (:mod:`steelyard.rules.engine`), not the rule, applies ``enabled``, the policy's
severity, ``[[override]]`` and ``[[ignore]]``: a rule only measures and reports.
"""

from __future__ import annotations

import dataclasses
import threading
import typing
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from enum import Enum
from typing import Any, Generic, TypeVar

from steelyard.findings import Finding, Severity
from steelyard.gradients import GradientSource
from steelyard.graph import Checkpoint, Layer
from steelyard.policy import Policy
from steelyard.stats import LayerStats

DOCS_URL = "https://steelyard.readthedocs.io/en/latest/"


class Command(str, Enum):
    """The command a rule serves; also the part of the docs that holds its page."""

    AUDIT = "audit"
    COMPARE = "compare"

    @property
    def docs_page(self) -> str:
        """The published page listing this command's rules."""
        return "rules/" if self is Command.AUDIT else "compare/"


class Scope(str, Enum):
    """What one call of a rule's check sees."""

    LAYER = "layer"
    """One layer at a time, while its data is in memory (layers run on ``--jobs`` threads)."""
    WHOLE = "whole"
    """The whole checkpoint (or, for ``compare``, the whole comparison) at once."""


# ---- typed settings ------------------------------------------------------------------------
def threshold(default: Any, *, low: float | None = 0.0, high: float | None = None) -> Any:
    """A field of a rule's settings record: its default and, for numbers, the closed range a
    policy value must lie in (``low`` 0 and no ``high`` unless said: thresholds are
    magnitudes). The policy key is the field name with ``-`` for ``_``."""
    return field(default=default, metadata={"low": low, "high": high})


def fraction(default: float) -> Any:
    """A threshold that is a share, a quantile or a cosine: it lies in [0, 1]."""
    return threshold(default, low=0.0, high=1.0)


@dataclass(frozen=True)
class NoSettings:
    """The settings record of a rule without thresholds."""


@dataclass(frozen=True)
class SettingSchema:
    """One policy key of one rule: what the policy file validation checks it against."""

    key: str
    """The policy key (``error-share``)."""
    kind: type
    """``bool``, ``int``, ``float`` or ``str``."""
    optional: bool
    """The default is unset (None) and the key may stay unset."""
    low: float | None
    high: float | None
    """Closed range for numbers (None: unbounded on that side)."""
    default: Any


def policy_key(field_name: str) -> str:
    """The policy key of a settings field (``error_share`` → ``error-share``)."""
    return field_name.replace("_", "-")


#: Settings record → its schema: every audit resolves every rule's settings, and
#: ``typing.get_type_hints`` costs 0.2-0.3 ms a call.
_SCHEMAS: dict[type[Any], tuple[SettingSchema, ...]] = {}


def schema_of(record: type[Any]) -> tuple[SettingSchema, ...]:
    """The policy keys of a settings record, in declaration order."""
    found = _SCHEMAS.get(record)
    if found is None:
        found = _SCHEMAS[record] = _schema(record)
    return found


def _schema(record: type[Any]) -> tuple[SettingSchema, ...]:
    hints = typing.get_type_hints(record)
    out: list[SettingSchema] = []
    for item in dataclasses.fields(record):
        hint = hints[item.name]
        args = typing.get_args(hint)
        optional = type(None) in args
        kind = next((a for a in args if a is not type(None)), hint) if args else hint
        numeric = kind in (int, float)
        out.append(
            SettingSchema(
                key=policy_key(item.name),
                kind=kind,
                optional=optional,
                low=item.metadata.get("low") if numeric else None,
                high=item.metadata.get("high") if numeric else None,
                default=item.default,
            )
        )
    return tuple(out)


def _coerce(schema: SettingSchema, value: Any) -> Any:
    """A policy value in the record's type (the policy file already checked the range)."""
    if value is None:
        return None
    if schema.kind is bool:
        return bool(value)
    if schema.kind is int:
        return int(value)
    if schema.kind is float:
        return float(value)
    return value


S = TypeVar("S")


class RuleSettings(Generic[S]):
    """A rule's effective settings, resolved per layer from its defaults, the policy's
    ``[rules.<rule>]`` table and the ``[[override]]`` entries matching the layer.

    Rules read :meth:`for_layer` (a typed record); the engine also reads :meth:`enabled` and
    :meth:`severity`. Safe to share between worker threads (each layer's record is computed
    from immutable inputs; a race only computes it twice)."""

    def __init__(self, spec: RuleSpec, policy: Policy) -> None:
        self.rule = spec.name
        self._record: type[S] = spec.settings
        self._schema = {s.key: s for s in spec.schema}
        self._defaults: dict[str, Any] = {"enabled": True, **spec.thresholds}
        self._policy = policy
        self._resolved: dict[str | None, tuple[dict[str, Any], S]] = {}
        # Without an [[override]] for this rule every layer has the rule-wide record: one
        # resolution per audit instead of one per layer (a policy merge and a record each).
        self._per_layer = any(spec.name in o.rules for o in policy.overrides)

    def _resolve(self, layer: Layer | None) -> tuple[dict[str, Any], S]:
        name = layer.name if layer is not None and self._per_layer else None
        known = self._resolved.get(name)
        if known is None:
            merged = self._policy.settings(self.rule, self._defaults, name)
            values = {
                key.replace("-", "_"): _coerce(schema, merged[key])
                for key, schema in self._schema.items()
            }
            known = (merged, self._record(**values))
            self._resolved[name] = known
        return known

    def for_layer(self, layer: Layer | None) -> S:
        """The thresholds in force on ``layer`` (None: the rule-wide ones)."""
        return self._resolve(layer)[1]

    @property
    def rule_wide(self) -> S:
        """The thresholds in force outside any ``[[override]]``."""
        return self.for_layer(None)

    def enabled(self, layer: Layer | None) -> bool:
        """Whether the rule's findings on ``layer`` are kept (the engine's business)."""
        return bool(self._resolve(layer)[0]["enabled"])

    def enabled_anywhere(self) -> bool:
        """False only when the rule is off everywhere: off rule-wide and switched on by no
        ``[[override]]``, so none of its findings could be kept."""
        return self.enabled(None) or any(
            bool(o.rules[self.rule].get("enabled")) for o in self._policy.overrides
            if self.rule in o.rules
        )

    def severity(self, layer: Layer | None) -> Severity | None:
        """The policy's severity for this rule on ``layer``; None: the rule's own choice."""
        chosen = self._resolve(layer)[0].get("severity")
        return Severity(chosen) if chosen else None


# ---- what a rule reads and writes ----------------------------------------------------------
class RuleNotes:
    """What rules could not do (a missing input, a test skipped), kept apart from findings.

    A rule that cannot run is not a problem of the model, so it must never fail a gate or show
    as a result in SARIF or JUnit; it is a note of the report. Rules call :meth:`add` from any
    worker thread; :meth:`lines` merges equal notes and lists their layers in layer order, so
    the text does not depend on ``--jobs``.
    """

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._layers: dict[tuple[str, str], set[str]] = {}

    def add(self, rule: str, text: str, layer: str | None = None) -> None:
        """Record that ``rule`` could not do something (on ``layer``, or at all)."""
        with self._lock:
            bucket = self._layers.setdefault((rule, text), set())
            if layer is not None:
                bucket.add(layer)

    def lines(self, layer_order: list[str]) -> tuple[str, ...]:
        """One line per distinct note: ``rule: text`` with the layers it applies to."""
        position = {name: index for index, name in enumerate(layer_order)}
        out: list[str] = []
        with self._lock:
            items = sorted(self._layers.items())
        for (rule, text), layers in items:
            line = f"{rule}: {text}"
            if layers:
                ordered = sorted(layers, key=lambda n: (position.get(n, len(position)), n))
                shown = ", ".join(ordered[:8])
                more = f" and {len(ordered) - 8:,} more" if len(ordered) > 8 else ""
                noun = "layer" if len(ordered) == 1 else "layers"
                line += f" ({len(ordered):,} {noun}: {shown}{more})"
            out.append(line)
        return tuple(out)


class RuleMeasurements:
    """Small per-layer measurements a rule publishes for the reports (a head's circuit norms,
    a layer's top singular value against its random-matrix edge), whether or not they led to
    a finding, so pictures and JSON can show every layer, not only the flagged ones.

    Values must be JSON-ready and small (a few numbers per head or expert, never per weight).
    Rules call :meth:`record` from any worker thread."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._by_layer: dict[str, dict[str, Any]] = {}

    def record(self, layer: str, key: str, value: Any) -> None:
        """Keep ``value`` under ``key`` (by convention ``rule.quantity``) for ``layer``."""
        with self._lock:
            self._by_layer.setdefault(layer, {})[key] = value

    def of(self, layer: str) -> dict[str, Any]:
        """What was recorded for ``layer`` (a copy; empty when nothing was)."""
        with self._lock:
            return dict(self._by_layer.get(layer, {}))


@dataclass(frozen=True)
class AuditContext:
    """Everything an audit rule may read: the graph, shared statistics, policy, gradient
    support; and where it says what it could not do."""

    checkpoint: Checkpoint
    stats: LayerStats
    policy: Policy
    gradients: GradientSource | None
    notes: RuleNotes = field(default_factory=RuleNotes)
    measurements: RuleMeasurements = field(default_factory=RuleMeasurements)


def layer_finding(
    rule: str,
    layer: Layer,
    *,
    severity: Severity,
    score: float,
    message: str,
    hint: str,
    units: Sequence[int] = (),
    evidence: Mapping[str, Any] | None = None,
) -> Finding:
    """A finding on ``layer``'s weight: located at the layer, its stored weight tensor and
    its recurrent gate (the part ``units`` index), as every layer rule reports."""
    return Finding(
        rule=rule,
        severity=severity,
        layer=layer.name,
        tensor=layer.weight,
        units=tuple(units),
        score=score,
        message=message,
        hint=hint,
        evidence=dict(evidence or {}),
        part=layer.gate or "",
    )


def model_finding(
    rule: str,
    *,
    severity: Severity,
    score: float,
    message: str,
    hint: str,
    evidence: Mapping[str, Any] | None = None,
    layer: str | None = None,
    tensor: str | None = None,
) -> Finding:
    """A finding on the checkpoint as a whole (no units), optionally pointing at a layer
    name or stored tensor that need not be one of the graph's layers."""
    return Finding(
        rule=rule,
        severity=severity,
        layer=layer,
        tensor=tensor,
        units=(),
        score=score,
        message=message,
        hint=hint,
        evidence=dict(evidence or {}),
    )


@dataclass(frozen=True)
class HealthColumn:
    """A column of the layer-health table that a rule fills from its own findings."""

    field: str
    """The :class:`~steelyard.report.LayerHealth` field filled."""
    measure: Callable[[Layer, Sequence[Finding]], Any]
    """The value from the layer and the rule's kept findings on it (possibly none)."""
    needs_gradients: bool = False
    """The column is empty (None) when the audit had no gradient source."""


def distinct_units(layer: Layer, findings: Sequence[Finding]) -> int:
    """How many distinct units the findings name (a health column's measure)."""
    return len({unit for finding in findings for unit in finding.units})


# ---- the rule ------------------------------------------------------------------------------
LayerCheck = Callable[[Any, RuleSettings[Any], Layer], Iterator[Finding]]
"""A rule's findings on one layer (its first argument is the command's context)."""
WholeCheck = Callable[[Any, RuleSettings[Any]], Iterator[Finding]]
"""A rule's findings on the whole checkpoint (or comparison)."""


@dataclass(frozen=True)
class RuleSpec:
    """A rule: metadata, settings record and its one check (``per_layer`` or ``whole``).

    The context its check reads depends on the command: :class:`AuditContext` for audit
    rules, :class:`steelyard.comparison.checks.CompareContext` for comparison rules.
    """

    name: str
    severity: Severity
    """Default severity (a rule may raise or lower it per finding, as documented)."""
    summary: str
    """One line: why this matters."""
    doc: str
    """The rule's documentation page (its module docstring)."""
    settings: type[Any] = NoSettings
    """The frozen dataclass of its thresholds (fields made with :func:`threshold`)."""
    per_layer: LayerCheck | None = None
    """Findings on one layer; the engine calls it for every layer the rule is enabled on,
    while that layer's data is in memory, layers in parallel (``--jobs``)."""
    finish: WholeCheck | None = None
    """With ``per_layer``: findings yielded once every layer is done (cross-layer decisions)."""
    whole: WholeCheck | None = None
    """Findings on the whole checkpoint at once (instead of ``per_layer``)."""
    commands: tuple[Command, ...] = (Command.AUDIT,)
    """The command(s) whose runs include this rule."""
    tensor_scan: bool = False
    """The rule asks ``ctx.stats.nonfinite`` of every tensor in ``ctx.stats.scan_targets()``;
    the audit counts them in parallel before the rule runs."""
    health: tuple[HealthColumn, ...] = ()
    """Layer-health columns this rule's findings fill."""

    def __post_init__(self) -> None:
        if (self.per_layer is None) == (self.whole is None):
            raise TypeError(f"rule {self.name!r}: give exactly one of per_layer= or whole=")
        if self.finish is not None and self.per_layer is None:
            raise TypeError(f"rule {self.name!r}: finish= goes with per_layer=")
        if not dataclasses.is_dataclass(self.settings):
            raise TypeError(f"rule {self.name!r}: settings must be a frozen dataclass")

    @property
    def scope(self) -> Scope:
        """Per layer or whole checkpoint, as declared."""
        return Scope.LAYER if self.per_layer is not None else Scope.WHOLE

    @property
    def schema(self) -> tuple[SettingSchema, ...]:
        """The rule's policy keys (besides ``enabled`` and ``severity``)."""
        return schema_of(self.settings)

    @property
    def thresholds(self) -> dict[str, Any]:
        """Policy key → default, in declaration order."""
        return {s.key: s.default for s in self.schema}

    @property
    def help_uri(self) -> str:
        """Where the rule's page is published."""
        return f"{DOCS_URL}{self.commands[0].docs_page}#{self.name}"

    def serves(self, command: Command) -> bool:
        """Whether ``command`` runs this rule."""
        return command in self.commands

    def check(self, ctx: Any, settings: RuleSettings[Any]) -> Iterator[Finding]:
        """Every finding in one go, without the engine's filtering: ``per_layer`` on each of
        the checkpoint's layers in order, then ``finish``; or ``whole``. (The audit runs the
        parts itself, layer by layer; this is for callers that want one rule's raw output.)"""
        if self.whole is not None:
            yield from self.whole(ctx, settings)
            return
        assert self.per_layer is not None
        checkpoint: Checkpoint = ctx.checkpoint
        for layer in checkpoint.layers:
            yield from self.per_layer(ctx, settings, layer)
        if self.finish is not None:
            yield from self.finish(ctx, settings)
