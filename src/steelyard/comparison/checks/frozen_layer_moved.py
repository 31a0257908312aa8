"""``frozen-layer-moved``: a layer the policy declares frozen is not identical.

**What it checks.** Layers whose name in OLD or NEW matches one of the policy's ``frozen``
globs (``frozen = ["encoder.*"]``, fnmatch syntax) must be identical in NEW: weights, bias
and normalisation parameters (running statistics included), equal element by element or
within the rounding of the lower stored precision (``same``, possibly
``precision_only``). A frozen layer that changed, was removed or reshaped, or whose units
were reordered (even consistently with its neighbours, which keeps the function but
still rewrites the stored weights) is reported.

**Why it matters.** Freezing is how fine-tuning protects a component that other systems
rely on (a shared encoder, an embedding table, a safety classifier). A frozen layer that
moved means the freeze did not hold: an optimizer that still held its parameters, batch
normalisation left in training mode (running statistics move), or weight decay applied to
frozen weights.

**Severity and score.** Error. Score = ``scoring.score(moved share, 1e6)`` where the share
is the fraction of the layer's elements beyond precision (1 for removed, reshaped and
permuted layers).

**What to do.** Check which parameters the optimizer received, put normalisation layers of
frozen parts in evaluation mode, exclude them from weight decay, or take the frozen layers
from OLD unchanged.
"""

from __future__ import annotations

import fnmatch
from collections.abc import Iterator

from steelyard.comparison.checks import CompareContext, compare_rule, number
from steelyard.comparison.report import Status
from steelyard.findings import Finding, Severity
from steelyard.numbers import count
from steelyard.rules.base import NoSettings, RuleSettings
from steelyard.rules.scoring import score


def frozen_layer_moved(ctx: CompareContext, settings: RuleSettings[NoSettings]) -> Iterator[Finding]:
    """The rule's findings over every compared layer."""
    globs = ctx.policy.frozen
    if not globs:
        return
    for diff in ctx.diffs:
        names = [n for n in (diff.old_name, diff.new_name) if n]
        if diff.status is Status.ADDED or not any(
            fnmatch.fnmatchcase(n, g) for n in names for g in globs
        ):
            continue
        if diff.status is Status.SAME and not diff.permuted:
            continue
        if diff.status is Status.CHANGED:
            share = diff.moved_elements / diff.elements if diff.elements else 1.0
            what = (
                f"changed: {count(diff.moved_elements)} of {count(diff.elements)} elements differ beyond the "
                f"stored precision (relative change {number(diff.relative_change)})"
            )
        elif diff.status is Status.SAME:
            share = 1.0
            what = "was permuted: its units or inputs were reordered (the function is unchanged)"
        else:
            share = 1.0
            what = f"was {diff.status.value}"
        glob = next(g for g in globs for n in names if fnmatch.fnmatchcase(n, g))
        yield ctx.finding(
            "frozen-layer-moved",
            diff,
            severity=Severity.ERROR,
            score=score(share, 1e6),
            message=f"frozen layer (policy glob {glob!r}) {what}",
            hint="check which parameters the optimizer received and keep normalisation of frozen "
            "parts in evaluation mode, or restore this layer from OLD",
            evidence={
                "status": diff.status.value,
                "glob": glob,
                "relative_change": diff.relative_change,
                "moved_elements": diff.moved_elements,
                "elements": diff.elements,
                "permuted": diff.permuted,
            },
        )


RULE = compare_rule(
    name="frozen-layer-moved",
    severity=Severity.ERROR,
    summary="a layer the policy declares frozen changed, so the freeze did not hold",
    check=frozen_layer_moved,
)
