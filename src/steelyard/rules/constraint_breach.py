"""``constraint-breach``: a weight constraint declared in the file that the weights violate.

**What it checks.** Constraints the file itself declares on a layer's kernel (Keras
``kernel_constraint``), on the per-unit incoming weight vector ‖w_j‖ (the canonical row):

* ``MaxNorm(max_value)``: ‖w_j‖ <= max_value;
* ``UnitNorm``: ‖w_j‖ = 1;
* ``NonNeg``: every w >= 0;
* ``MinMaxNorm(min_value, max_value, rate=1)``: min_value <= ‖w_j‖ <= max_value. With
  rate < 1 the projection only moves part of the way each step, so no bound holds exactly and
  the rule does not judge it (it says so in a note of the report).

Each comparison allows a relative tolerance ``tolerance`` (1e-4): Keras projects with
w·clip(n)/(ε + n), ε = 1e-7, and float32 storage rounds norms at about 1e-7 relative.
Constraints declared over axes that do not correspond to whole units are listed in a note
of the report as not judged.

**Why it matters.** The declared constraint is part of how the model was meant to be
regularised (max-norm with dropout keeps units from growing without bound). Weights that break
it were edited after training, trained with the constraint silently disabled, or exported from
a different run than the configuration claims.

**Severity and score.** Error. Score = ``scoring.score(k/units, worst/limit)``.

**What to do.** Find out which weights were really shipped: re-export from the training run,
or check the code that loaded or modified the checkpoint.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np

from steelyard.findings import Finding, Severity
from steelyard.graph import Layer
from steelyard.numbers import count
from steelyard.rules.base import AuditContext, RuleSettings, RuleSpec, layer_finding, threshold
from steelyard.rules.scoring import score


@dataclass(frozen=True)
class ConstraintBreachSettings:
    """Thresholds of ``constraint-breach``."""

    tolerance: float = threshold(1e-4)


def check_layer(
    ctx: AuditContext, settings: RuleSettings[ConstraintBreachSettings], layer: Layer
) -> Iterator[Finding]:
    """Yield an error when the layer's declared constraint does not hold."""
    constraint = layer.constraint
    if constraint is None:
        return
    tol = settings.for_layer(layer).tolerance
    if not constraint.per_unit or (constraint.kind == "min-max-norm" and constraint.rate != 1.0):
        why = "its axes do not map onto units" if not constraint.per_unit else "rate < 1"
        # Not a problem of the model: a note of the report, never a finding.
        ctx.notes.add(RULE.name, f"declared {constraint.kind} constraint not judged ({why})", layer.name)
        return
    norms = ctx.stats.row_norms(layer)
    if constraint.kind == "non-neg":
        weights = ctx.stats.matrix(layer)
        scale = float(np.max(np.abs(weights))) if weights.size else 0.0
        low = weights.min(axis=1) if weights.size else np.zeros(layer.units)
        bad = np.flatnonzero(low < -tol * max(scale, 1e-30))
        worst = float(-low[bad].min()) if bad.size else 0.0
        measured, limit_text, excess = (
            f"most negative weight {-worst:.6g}",
            "0",
            1 + worst / max(scale, 1e-30),
        )
    else:
        upper = constraint.max_value if constraint.kind != "unit-norm" else 1.0
        lower = (
            constraint.min_value
            if constraint.kind == "min-max-norm"
            else (1.0 if constraint.kind == "unit-norm" else None)
        )
        too_big = norms > (upper * (1 + tol)) if upper is not None else np.zeros(layer.units, bool)
        too_small = (
            norms < (lower * (1 - tol)) if lower is not None else np.zeros(layer.units, bool)
        )
        bad = np.flatnonzero(too_big | too_small)
        if not bad.size:
            return
        ratios = np.where(
            too_big[bad],
            norms[bad] / (upper or 1.0),
            (lower or 1.0) / np.maximum(norms[bad], 1e-30),
        )
        excess = float(ratios.max())
        # Six digits, not the report's usual three: a norm past its limit by a hair would
        # otherwise read as equal to it.
        measured = f"row norms {float(norms[bad].min()):.6g} to {float(norms[bad].max()):.6g}"
        limit_text = (
            f"[{lower:g}, {upper:g}]"
            if lower is not None and upper is not None
            else f"<= {upper:g}"
        )
    if not bad.size:
        return
    yield layer_finding(
        RULE.name,
        layer,
        severity=Severity.ERROR,
        units=[int(u) for u in bad],
        score=score(bad.size / layer.units, excess),
        message=f"{count(bad.size)} of {count(layer.units)} units break the declared {constraint.kind} constraint "
        f"({measured}; limit {limit_text}, tolerance {tol:g})",
        hint="check which weights were shipped: re-export from the training run or inspect the code "
        "that loaded or edited this checkpoint",
        evidence={
            "constraint": constraint.kind,
            "max_value": constraint.max_value,
            "min_value": constraint.min_value,
            "worst_excess": excess,
            "norms": {str(int(u)): float(norms[u]) for u in bad[:10]},
        },
    )


RULE = RuleSpec(
    name="constraint-breach",
    severity=Severity.ERROR,
    settings=ConstraintBreachSettings,
    summary="weights that break a constraint the file declares were edited, or come from another run",
    doc=__doc__ or "",
    per_layer=check_layer,
)
