"""What a rule is, and the context it runs in.

A rule is one module holding a :data:`RULE` (:class:`RuleSpec`): its name (its ID in reports
and policies), default severity and thresholds, a one-line why, and ``check(ctx)`` which
yields findings. The module docstring is the rule's documentation page.
"""

from __future__ import annotations

import threading
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass, field
from typing import Any

from steelyard.findings import Finding, Severity
from steelyard.gradients import GradientSource
from steelyard.graph import Checkpoint, Layer
from steelyard.policy import Policy
from steelyard.stats import LayerStats

DOCS_URL = "https://steelyard.readthedocs.io/en/latest/rules/"


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


@dataclass(frozen=True)
class AuditContext:
    """Everything a rule may read: the graph, shared statistics, policy, gradient support;
    and where it says what it could not do."""

    checkpoint: Checkpoint
    stats: LayerStats
    policy: Policy
    gradients: GradientSource | None
    notes: RuleNotes = field(default_factory=RuleNotes)


@dataclass(frozen=True)
class RuleSpec:
    """A rule's metadata and its check."""

    name: str
    severity: Severity
    """Default severity (a rule may raise or lower it per finding, as documented)."""
    thresholds: Mapping[str, Any]
    """Default thresholds; each can be set by a policy (key names are the policy keys)."""
    summary: str
    """One line: why this matters."""
    check: Callable[[AuditContext, RuleSettings], Iterator[Finding]]
    doc: str
    """The rule's documentation page (its module docstring)."""
    layer_check: LayerCheck | None = None
    """Optional per-layer part of ``check``. When set, ``check(ctx, settings)`` must yield
    exactly ``layer_check(ctx, settings, layer)`` for each layer in order, then ``finish``
    (build it with :func:`layered`). The audit then runs every rule's hook on a layer while
    that layer's data is in memory, and layers in parallel (``--jobs``)."""
    finish: Callable[[AuditContext, RuleSettings], Iterator[Finding]] | None = None
    """Optional whole-checkpoint findings yielded after the per-layer ones."""
    tensor_scan: bool = False
    """The rule asks ``ctx.stats.nonfinite`` of every tensor in ``ctx.stats.scan_targets()``;
    the audit counts them in parallel before the rule runs."""

    @property
    def help_uri(self) -> str:
        """Where the rule's page is published."""
        return f"{DOCS_URL}#{self.name}"


LayerCheck = Callable[[AuditContext, "RuleSettings", Layer], Iterator[Finding]]
"""A rule's findings on one layer."""


def layered(
    layer_check: LayerCheck,
    finish: Callable[[AuditContext, RuleSettings], Iterator[Finding]] | None = None,
) -> Callable[[AuditContext, RuleSettings], Iterator[Finding]]:
    """The whole-checkpoint ``check`` made of a per-layer hook and an optional finish."""

    def check(ctx: AuditContext, settings: RuleSettings) -> Iterator[Finding]:
        for layer in ctx.checkpoint.layers:
            yield from layer_check(ctx, settings, layer)
        if finish is not None:
            yield from finish(ctx, settings)

    return check


class RuleSettings:
    """Effective settings of one rule, resolved per layer from defaults, policy, overrides."""

    def __init__(self, spec_name: str, thresholds: Mapping[str, Any], policy: Policy) -> None:
        self._rule = spec_name
        self._defaults = {"enabled": True, **thresholds}
        self._policy = policy

    def for_layer(self, layer: Layer | None) -> dict[str, Any]:
        """Settings in force on ``layer`` (None: the rule-wide settings)."""
        return self._policy.settings(self._rule, self._defaults, layer.name if layer else None)

    def enabled(self, layer: Layer | None) -> bool:
        """Whether the rule runs on ``layer``."""
        return bool(self.for_layer(layer)["enabled"])

    def get(self, layer: Layer | None, key: str) -> Any:
        """One setting on ``layer``."""
        return self.for_layer(layer)[key]

    def severity(self, layer: Layer | None, default: Severity) -> Severity:
        """The policy's severity for this rule on ``layer``, else ``default``."""
        chosen = self.for_layer(layer).get("severity")
        return Severity(chosen) if chosen else default
