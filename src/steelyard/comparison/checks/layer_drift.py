"""``layer-drift``: a layer's weights moved far from OLD's.

**What it checks.** For every layer present in both checkpoints with the same shape and
status ``changed``, the relative change r = ‖B − A‖_F / ‖A‖_F of the canonical weights
(A in OLD, B in NEW, float64 sums) against ``limit`` (default 0.5). Layers that are the same
up to the rounding of a lower stored precision, or a pure permutation of units, are not
changed and never drift.

**Why 0.5.** Two independent draws of the same initialiser have r ≈ √2 (‖B − A‖² =
‖A‖² + ‖B‖² − 2A·B with A·B ≈ 0), so r near or above 1 means the layer was effectively
replaced or diverged. Fine-tuning and consecutive training checkpoints usually move a
layer by a few percent to a few tenths of its norm (common practice, no source). 0.5 sits
between the two: the difference is half as large as the weights themselves.

**Severity and score.** Warning. Score = ``scoring.score(1, r / limit)``: the whole layer is
implicated, log-scaled by how far past the limit it moved.

**What to do.** If the layer was not meant to train this much, check the learning rate, the
optimizer state that was restored, and whether the layer was re-initialised. Layers that
are meant to move (a new head) get a higher limit with an override:
``[[override]] layers = "head.*"`` and ``layer-drift = { limit = 2.0 }``.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass

from steelyard.comparison.checks import CompareContext, compare_rule, number
from steelyard.comparison.report import Status
from steelyard.findings import Finding, Severity
from steelyard.rules.base import RuleSettings, threshold
from steelyard.rules.scoring import score


@dataclass(frozen=True)
class LayerDriftSettings:
    """Thresholds of ``layer-drift``."""

    limit: float = threshold(0.5)


def layer_drift(ctx: CompareContext, settings: RuleSettings[LayerDriftSettings]) -> Iterator[Finding]:
    """The rule's findings over every compared layer."""
    for diff in ctx.diffs:
        if diff.status is not Status.CHANGED or diff.relative_change is None:
            continue
        limit = settings.for_layer(ctx.layer(diff)).limit
        change = diff.relative_change
        if not change > limit:  # NaN (non-finite weights) is new-nonfinite's business
            continue
        excess = change / limit if limit > 0 else float("inf")
        yield ctx.finding(
            "layer-drift",
            diff,
            severity=Severity.WARNING,
            score=score(1.0, excess),
            message=f"weights moved by {number(change)} of their norm (limit {limit:g}); "
            f"cosine to OLD {number(diff.cosine)}",
            hint="check the learning rate and whether the layer was re-initialised; if it is "
            "meant to move, raise layer-drift's limit for it in an [[override]] section of the policy",
            evidence={
                "relative_change": change,
                "limit": limit,
                "cosine": diff.cosine,
                "top_units": [u.unit for u in diff.top_units],
            },
        )


RULE = compare_rule(
    name="layer-drift",
    severity=Severity.WARNING,
    settings=LayerDriftSettings,
    summary="a layer that moved by more than half its norm was replaced, diverged or over-trained",
    check=layer_drift,
)
