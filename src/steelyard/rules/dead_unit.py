"""``dead-unit``: a unit whose output cannot change, or is never used.

**What it checks.** Four tests per unit, each named in the evidence. Weights are judged after
folding an inference-form batch norm that follows (w' = w·γ/sqrt(var+ε),
b' = (b−μ)·γ/sqrt(var+ε) + β), because that is what the deployed unit computes.

* *constant*: the incoming row norm ‖w'_j‖ <= max(``floor`` 1e-8, ``constant`` 1e-3 × the
  layer's median row norm). The unit outputs f(b'_j) whatever the input.
* *unused*: every consumer's column for unit j has norm <= ``unused`` 1e-3 × that consumer's
  median column norm. Only for linked layers (``inputs_from`` known for the consumers).
* *never active*: a ReLU-family unit whose pre-activation upper bound over the input domain is
  <= 0, so it outputs 0 (or a leaky constant slope of a negative value) for every input. With
  a declared ``input-range`` the bound comes from interval bound propagation through the
  graph (Gowal et al. 2018, "On the effectiveness of interval bound propagation for training
  verifiably robust models"). With none declared, only where every input is known
  non-negative (all producers end in ReLU, sigmoid or softmax) and all of the unit's weights
  and its bias are <= 0: then w'·x + b' <= 0 for every x >= 0.
* *silenced*: the unit's normalisation scale |γ_j| <= ``silenced`` 1e-3 × the layer's median
  |γ|: its output is then the constant β_j.

Embeddings are skipped (a zero row is usually a padding index, by design). So are the layers
of a LoRA/DoRA adapter read without its base: their weight is the update ΔW, and a zero row of
an update leaves its unit as the base model has it, which is no dead unit (a note says so;
``adapter-update`` reports an update that is zero as a whole, and ``--base`` judges the
merged layers as any others).

**One dead channel, one finding.** A channel-wise convolution (depthwise: one input channel
per group, as in MobileNet-style blocks) computes its output channel o from input channel
u = o // multiplier alone, so a dead channel shows in both layers: a zero depthwise filter
makes the producer's unit u *unused*, and a dead producer unit leaves the depthwise channel
nothing to compute from. Each such channel is reported once, where the problem originates:
at the producer, unless the producer's only reason is *unused* (then the depthwise filters
are the dead ones and the producer's unit is collateral). The other layer's units are named
in the evidence of that finding, ``also_dead_downstream`` or ``also_dead_upstream``
(``{layer: [units]}``), and left out of that layer's own finding. This needs every layer's
result, so the rule decides once all layers are done; the outcome never depends on
``--jobs``.

**Why it matters.** A dead unit costs parameters and compute and contributes nothing; many of
them mean a layer lost capacity during training (a learning rate too high for ReLU units, a
too-strong L1 penalty, a normalisation scale decayed to zero).

**Severity and score.** Warning; error when >= ``error-share`` (50 %) of a layer's units are
dead. Score = ``scoring.score(dead/units, 1 + dead)`` (log-scaled count).

**What to do.** Prune the units: the hint gives the exact parameter saving (the unit's row
and bias, its normalisation parameters, and the consumers' columns for it). A dead unit whose
row holds a weight ``essential-weight`` marks is never offered for pruning: the hint names it
to keep and the saving leaves it out (evidence ``keep_essential``). If many units died,
retrain with a lower learning rate, leaky activations, or a weaker penalty.
"""

from __future__ import annotations

import threading
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, field

import numpy as np

from steelyard.findings import Finding, Severity
from steelyard.graph import Layer, LayerKind
from steelyard.numbers import count
from steelyard.rules._adapters import adapter_of
from steelyard.rules._bounds import IntervalBounds, finite_range
from steelyard.rules.base import (
    AuditContext,
    HealthColumn,
    RuleSettings,
    RuleSpec,
    distinct_units,
    fraction,
    layer_finding,
    threshold,
)
from steelyard.rules.essential_weight import essential_weights
from steelyard.rules.scoring import score
from steelyard.stats.numerics import median_of


@dataclass(frozen=True)
class DeadUnitSettings:
    """Thresholds of ``dead-unit`` (policy keys ``floor``, ``constant``, ...)."""

    floor: float = threshold(1e-8)
    constant: float = threshold(1e-3)
    unused: float = threshold(1e-3)
    silenced: float = threshold(1e-3)
    error_share: float = fraction(0.5)


def _constant(ctx: AuditContext, limits: DeadUnitSettings, layer: Layer) -> set[int]:
    rows = ctx.stats.folded_row_norms(layer)
    finite = rows[np.isfinite(rows)]
    if finite.size == 0:
        return set()
    limit = max(limits.floor, limits.constant * median_of(finite))
    return {int(u) for u in np.flatnonzero(rows <= limit)}


def _unused(ctx: AuditContext, limits: DeadUnitSettings, layer: Layer) -> set[int]:
    consumers = ctx.stats.consumers(layer)
    if not consumers:
        return set()
    unused = np.ones(layer.units, dtype=bool)
    for consumer in consumers:
        norms = ctx.stats.column_norms(layer, consumer)
        if norms is None:
            return set()
        finite = norms[np.isfinite(norms)]
        median = median_of(finite) if finite.size else 0.0
        if median <= 0:
            return set()
        unused &= norms <= limits.unused * median
    return {int(u) for u in np.flatnonzero(unused)}


def _never_active(
    ctx: AuditContext, layer: Layer, bounds: IntervalBounds | None
) -> tuple[set[int], str]:
    if not layer.activation.relu_family:
        return set(), ""
    if bounds is not None:
        pre = bounds.pre_activation(layer)
        if pre is not None:
            return {int(u) for u in np.flatnonzero(pre[1] <= 0)}, "interval bounds"
    if ctx.stats.inputs_non_negative(layer):
        folded = ctx.stats.folded(layer)
        nonpositive = np.all(folded.matrix <= 0, axis=1) & (folded.bias <= 0)
        return {
            int(u) for u in np.flatnonzero(nonpositive)
        }, "non-negative inputs, non-positive weights"
    return set(), ""


def _silenced(ctx: AuditContext, limits: DeadUnitSettings, layer: Layer) -> set[int]:
    gamma = ctx.stats.norm_scale(layer)
    if gamma is None:
        return set()
    magnitude = np.abs(gamma.astype(np.float64))
    median = median_of(magnitude)
    if median <= 0:
        return set()
    return {int(u) for u in np.flatnonzero(magnitude <= limits.silenced * median)}


@dataclass(frozen=True)
class DeadUnits:
    """One layer's dead units by test (``constant``, ``unused``, ``never-active``,
    ``silenced``; only the tests that apply to the layer's kind are present)."""

    tests: Mapping[str, frozenset[int]] = field(default_factory=dict)
    how: str = ""
    """How *never active* was established (``interval bounds``, ...), else empty."""

    @property
    def units(self) -> frozenset[int]:
        """Every dead unit, whichever test found it."""
        return frozenset().union(*self.tests.values())


def dead_units(
    ctx: AuditContext, layer: Layer, settings: RuleSettings[DeadUnitSettings] | None = None
) -> DeadUnits:
    """The units of ``layer`` that ``dead-unit``'s four tests call dead, with the policy's
    ``dead-unit`` thresholds (``settings``; default: resolved from ``ctx.policy``) and its
    ``input-range``. This is the rule's public measurement: ``steelyard compare`` calls it on
    both checkpoints so that a unit is dead there exactly when the audit says so.

    Embeddings have none (a zero row is usually a padding index); recurrent layers get the
    *constant* test only. The per-layer interval bounds are built once per ``ctx.stats``.
    """
    if layer.kind is LayerKind.EMBEDDING or is_update_alone(ctx, layer):
        return DeadUnits()
    limits = (settings or RuleSettings(RULE, ctx.policy)).for_layer(layer)
    tests: dict[str, frozenset[int]] = {"constant": frozenset(_constant(ctx, limits, layer))}
    how = ""
    if layer.kind is not LayerKind.RECURRENT:
        bounds = ctx.stats.shared(
            f"dead-unit:bounds:{ctx.policy.input_range!r}", lambda: _bounds(ctx)
        )
        tests["unused"] = frozenset(_unused(ctx, limits, layer))
        active, how = _never_active(ctx, layer, bounds)
        tests["never-active"] = frozenset(active)
        tests["silenced"] = frozenset(_silenced(ctx, limits, layer))
    return DeadUnits(tests, how)


def _saving(ctx: AuditContext, layer: Layer, dead: int) -> int:
    per_unit = layer.fan_in + (1 if layer.bias else 0)
    if layer.norm is not None:
        per_unit += sum(
            1 for n in (layer.norm.scale, layer.norm.shift, layer.norm.mean, layer.norm.var) if n
        )
    for consumer in ctx.stats.consumers(layer):
        width = ctx.stats.consumer_block_width(layer, consumer)
        if width is not None:
            per_unit += width
    return per_unit * dead


def _bounds(ctx: AuditContext) -> IntervalBounds | None:
    """Interval bounds from the policy's input range, built once per audit."""
    declared = finite_range(ctx.policy.input_range) if ctx.policy.input_range else None
    return IntervalBounds(ctx.stats, declared) if declared else None


@dataclass(frozen=True)
class _Dead:
    """One layer's dead units by test, kept until :func:`finish` has seen every layer."""

    layer: Layer
    tests: dict[str, frozenset[int]]
    how: str
    per_unit: int
    """Parameters one dead unit costs (its row, bias, norm parameters, consumer columns)."""
    essential: frozenset[int] = frozenset()
    """Dead units whose row holds a weight ``essential-weight`` marks: never offered for pruning."""


class _Store:
    """Per-audit store of :class:`_Dead`, filled by the per-layer hook from any thread."""

    def __init__(self) -> None:
        self.lock = threading.Lock()
        self.by_layer: dict[str, _Dead] = {}


def _store(ctx: AuditContext) -> _Store:
    return ctx.stats.shared(f"{RULE.name}:dead", _Store)


def is_update_alone(ctx: AuditContext, layer: Layer) -> bool:
    """Whether ``layer`` is an adapter's update ΔW read without the base it adapts."""
    info = adapter_of(ctx.checkpoint)
    return info is not None and info.base is None and layer.name in info.modules


def check_layer(
    ctx: AuditContext, settings: RuleSettings[DeadUnitSettings], layer: Layer
) -> Iterator[Finding]:
    """Find one layer's dead units and keep them for :func:`finish`, which reports each dead
    channel once across a channel-wise (depthwise) convolution and the layer feeding it."""
    if is_update_alone(ctx, layer):
        ctx.notes.add(
            RULE.name,
            "not judged on an adapter's updates read without their base: a zero row of an "
            "update leaves its unit as the base has it (pass --base to judge the merged layers)",
            layer.name,
        )
        return
    found = dead_units(ctx, layer, settings)
    if not found.units:
        return
    tests, how = dict(found.tests), found.how
    store = _store(ctx)
    essential = essential_weights(ctx, layer).rows & found.units
    record = _Dead(layer, tests, how, _saving(ctx, layer, 1), frozenset(essential))
    with store.lock:
        store.by_layer[layer.name] = record
    yield from ()


def _channel_pairs(records: dict[str, _Dead], order: dict[str, int]) -> list[tuple[_Dead, _Dead]]:
    """(producer, consumer) pairs in which each consumer unit reads exactly one producer unit:
    a grouped convolution with one input channel per group (depthwise), fed by one layer
    whose units are its input channels. In layer order, so the result never depends on
    ``--jobs``."""
    pairs: list[tuple[_Dead, _Dead]] = []
    for consumer in records.values():
        layer = consumer.layer
        if (
            layer.kind is not LayerKind.CONV
            or layer.in_per_group != 1
            or layer.groups < 2
            or layer.units % layer.groups
            or len(layer.inputs_from) != 1
        ):
            continue
        producer = records.get(layer.inputs_from[0])
        if producer is not None and producer.layer.units == layer.groups:
            pairs.append((producer, consumer))
    pairs.sort(key=lambda pair: (order[pair[1].layer.name], order[pair[0].layer.name]))
    return pairs


def _origins(
    records: dict[str, _Dead], order: dict[str, int]
) -> dict[tuple[str, int], tuple[str, int]]:
    """(layer, unit) → the (layer, unit) where that channel's death originates, for every dead
    unit that is only the echo of another across a channel-wise pair.

    Consumer channel o reads producer unit u = o // multiplier alone. When both are dead, the
    producer is the origin (the consumer's channel died of its input), unless the producer's
    only finding on u is *unused*: that one is caused by the consumer, whose filters for u are
    the dead ones, so the consumer is the origin.
    """
    echo: dict[tuple[str, int], tuple[str, int]] = {}
    for producer, consumer in _channel_pairs(records, order):
        dead_p = set().union(*producer.tests.values())
        dead_c = set().union(*consumer.tests.values())
        multiplier = consumer.layer.units // consumer.layer.groups
        for channel in sorted(dead_c):
            unit = channel // multiplier
            if unit not in dead_p:
                continue
            p_key, c_key = (producer.layer.name, unit), (consumer.layer.name, channel)
            reasons = {name for name, units in producer.tests.items() if unit in units}
            if reasons == {"unused"}:
                echo.setdefault(p_key, c_key)
            else:
                echo.setdefault(c_key, p_key)
    return echo


def _root(echo: dict[tuple[str, int], tuple[str, int]], key: tuple[str, int]) -> tuple[str, int]:
    seen = {key}
    while key in echo and echo[key] not in seen:
        key = echo[key]
        seen.add(key)
    return key


def finish(ctx: AuditContext, settings: RuleSettings[DeadUnitSettings]) -> Iterator[Finding]:
    """One finding per layer with dead units of its own; a channel dead in both a layer and
    the channel-wise convolution it feeds is reported once, where it originates."""
    store = _store(ctx)
    order = {layer.name: index for index, layer in enumerate(ctx.checkpoint.layers)}
    with store.lock:
        records = {
            name: store.by_layer[name]
            for name in sorted(store.by_layer, key=lambda n: order.get(n, len(order)))
        }
    echo = _origins(records, order)
    # root layer → relation → echo layer → its units
    related: dict[str, dict[str, dict[str, list[int]]]] = {}
    for key in sorted(echo, key=lambda k: (order[k[0]], k[1])):
        root = _root(echo, key)
        if root == key:
            continue
        relation = "also_dead_downstream" if order[key[0]] > order[root[0]] else "also_dead_upstream"
        units = related.setdefault(root[0], {}).setdefault(relation, {}).setdefault(key[0], [])
        units.append(key[1])
    for name, record in records.items():
        tests = {
            test: {u for u in units if _root(echo, (name, u)) == (name, u)}
            for test, units in record.tests.items()
        }
        yield from _finding(settings, record, tests, related.get(name, {}))


def _finding(
    settings: RuleSettings[DeadUnitSettings],
    record: _Dead,
    tests: dict[str, set[int]],
    related: dict[str, dict[str, list[int]]],
) -> Iterator[Finding]:
    layer = record.layer
    dead = sorted(set().union(*tests.values()))
    if not dead:
        return
    share = len(dead) / layer.units
    severity = (
        Severity.ERROR if share >= settings.for_layer(layer).error_share else Severity.WARNING
    )
    named = ", ".join(f"{count(len(units))} {name}" for name, units in tests.items() if units)
    keep = sorted(record.essential.intersection(dead))
    saving = record.per_unit * (len(dead) - len(keep))
    evidence: dict[str, object] = {name: sorted(units) for name, units in tests.items() if units}
    evidence.update(dead=len(dead), units_total=layer.units, share=share, parameter_saving=saving)
    if keep:
        evidence["keep_essential"] = keep
    if record.how and tests.get("never-active"):
        evidence["never_active_by"] = record.how
    echoes = ""
    for relation in ("also_dead_downstream", "also_dead_upstream"):
        if relation in related:
            evidence[relation] = {k: sorted(v) for k, v in related[relation].items()}
            echoes += "".join(
                f"; the same channels are dead in {'downstream' if 'down' in relation else 'upstream'}"
                f" {other} ({count(len(units))})"
                for other, units in related[relation].items()
            )
    yield layer_finding(
        RULE.name,
        layer,
        severity=severity,
        units=dead,
        score=score(share, 1 + len(dead)),
        message=f"{count(len(dead))} of {count(layer.units)} units are dead ({named}){echoes}",
        hint=(
            f"units {', '.join(map(str, keep))} hold weights essential-weight marks: keep them; "
            f"pruning the other {count(len(dead) - len(keep))} saves exactly {count(saving)} parameters"
            if keep
            else f"pruning them saves exactly {count(saving)} parameters"
        )
        + "; if many died, retrain with a lower learning rate, leaky activations or a weaker "
        "penalty",
        evidence=evidence,
    )


RULE = RuleSpec(
    name="dead-unit",
    severity=Severity.WARNING,
    settings=DeadUnitSettings,
    summary="a unit whose output cannot change or is never read costs parameters and contributes nothing",
    doc=__doc__ or "",
    per_layer=check_layer,
    finish=finish,
    health=(HealthColumn("dead", distinct_units),),
)
