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

Embeddings are skipped (a zero row is usually a padding index, by design).

**Why it matters.** A dead unit costs parameters and compute and contributes nothing; many of
them mean a layer lost capacity during training (a learning rate too high for ReLU units, a
too-strong L1 penalty, a normalisation scale decayed to zero).

**Severity and score.** Warning; error when >= ``error-share`` (50 %) of a layer's units are
dead. Score = ``scoring.score(dead/units, 1 + dead)`` (log-scaled count).

**What to do.** Prune the units: the hint gives the exact parameter saving (the unit's row
and bias, its normalisation parameters, and the consumers' columns for it). If many units died,
retrain with a lower learning rate, leaky activations, or a weaker penalty.
"""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np

from steelyard.findings import Finding, Severity
from steelyard.graph import Layer, LayerKind
from steelyard.rules._bounds import IntervalBounds, finite_range
from steelyard.rules.base import AuditContext, RuleSettings, RuleSpec, layered
from steelyard.rules.scoring import score


def _constant(ctx: AuditContext, settings: RuleSettings, layer: Layer) -> set[int]:
    rows = ctx.stats.folded_row_norms(layer)
    finite = rows[np.isfinite(rows)]
    if finite.size == 0:
        return set()
    limit = max(
        float(settings.get(layer, "floor")),
        float(settings.get(layer, "constant")) * float(np.median(finite)),
    )
    return {int(u) for u in np.flatnonzero(rows <= limit)}


def _unused(ctx: AuditContext, settings: RuleSettings, layer: Layer) -> set[int]:
    consumers = ctx.stats.consumers(layer)
    if not consumers:
        return set()
    unused = np.ones(layer.units, dtype=bool)
    for consumer in consumers:
        norms = ctx.stats.column_norms(layer, consumer)
        if norms is None:
            return set()
        finite = norms[np.isfinite(norms)]
        median = float(np.median(finite)) if finite.size else 0.0
        if median <= 0:
            return set()
        unused &= norms <= float(settings.get(layer, "unused")) * median
    return {int(u) for u in np.flatnonzero(unused)}


def _never_active(
    ctx: AuditContext, settings: RuleSettings, layer: Layer, bounds: IntervalBounds | None
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


def _silenced(ctx: AuditContext, settings: RuleSettings, layer: Layer) -> set[int]:
    gamma = ctx.stats.norm_scale(layer)
    if gamma is None:
        return set()
    magnitude = np.abs(gamma.astype(np.float64))
    median = float(np.median(magnitude))
    if median <= 0:
        return set()
    return {
        int(u) for u in np.flatnonzero(magnitude <= float(settings.get(layer, "silenced")) * median)
    }


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


def check_layer(ctx: AuditContext, settings: RuleSettings, layer: Layer) -> Iterator[Finding]:
    """Yield the finding for one layer's dead units, if it has any."""
    if layer.kind is LayerKind.EMBEDDING or not settings.enabled(layer):
        return
    bounds = ctx.stats.shared(f"dead-unit:bounds:{ctx.policy.input_range!r}", lambda: _bounds(ctx))
    tests: dict[str, set[int]] = {"constant": _constant(ctx, settings, layer)}
    if layer.kind is not LayerKind.RECURRENT:
        tests["unused"] = _unused(ctx, settings, layer)
        active, how = _never_active(ctx, settings, layer, bounds)
        tests["never-active"] = active
        tests["silenced"] = _silenced(ctx, settings, layer)
    else:
        how = ""
    dead = sorted(set().union(*tests.values()))
    if not dead:
        return
    share = len(dead) / layer.units
    severity = (
        Severity.ERROR if share >= float(settings.get(layer, "error-share")) else Severity.WARNING
    )
    named = ", ".join(f"{name} {len(units)}" for name, units in tests.items() if units)
    saving = _saving(ctx, layer, len(dead))
    evidence: dict[str, object] = {name: sorted(units) for name, units in tests.items() if units}
    evidence.update(dead=len(dead), units_total=layer.units, share=share, parameter_saving=saving)
    if how:
        evidence["never_active_by"] = how
    yield Finding(
        rule=RULE.name,
        severity=severity,
        layer=layer.name,
        tensor=layer.weight,
        units=tuple(dead),
        score=score(share, 1 + len(dead)),
        message=f"{len(dead)} of {layer.units} units are dead ({named})",
        hint=f"pruning them saves exactly {saving} parameters; if many died, retrain with a lower "
        "learning rate, leaky activations or a weaker penalty",
        evidence=evidence,
        part=layer.gate or "",
    )


RULE = RuleSpec(
    name="dead-unit",
    severity=Severity.WARNING,
    thresholds={
        "floor": 1e-8,
        "constant": 1e-3,
        "unused": 1e-3,
        "silenced": 1e-3,
        "error-share": 0.5,
    },
    summary="a unit whose output cannot change or is never read costs parameters and contributes nothing",
    check=layered(check_layer),
    doc=__doc__ or "",
    layer_check=check_layer,
)
