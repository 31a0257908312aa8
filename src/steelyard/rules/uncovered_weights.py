"""``uncovered-weights``: parameters that no layer rule looked at.

**What it checks.** The share of the checkpoint's counted parameters (floating and quantized
weight tensors) that belong to some layer of the graph (its weight, bias, normalisation
parameters or the tensors its weights are made from), that is, what the layer rules saw:

    share = Σ covered tensor sizes / Σ counted tensor sizes.

Every tensor in no layer is listed in the report beside the share. ``nonfinite`` still scans
them all; only the layer rules (dead units, norms, twins, untrained layers, …) cannot.

**Why it matters.** A gate must never pass what it did not check. A checkpoint whose tensor
names the loader does not recognise (another framework's naming scheme, ad-hoc names) yields
few or no layers; without this rule every layer rule would then pass it silently. A small
uncovered remainder is normal (position embeddings, learned scalars, norm gains before a
block): the default ``min-share`` of 0.9 is a judgement, common practice, no source.

**Severity and score.** Error when no parameter is covered (nothing was checked, including
a checkpoint with no parameters at all); warning when the share is below ``min-share``.
Score ``scoring.score(1 − share, min-share / max(share, 1e-6))``.

**What to do.** Declare the unrecognised layers in a layout file (see ``docs/formats.md``),
or, when the uncovered tensors really are not layers, lower ``min-share`` for this model in
the policy with a comment saying why.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass

from steelyard.coverage import coverage_of
from steelyard.findings import Finding, Severity
from steelyard.numbers import percent
from steelyard.rules.base import AuditContext, RuleSettings, RuleSpec, fraction, model_finding
from steelyard.rules.scoring import score

_LISTED = 10


@dataclass(frozen=True)
class UncoveredWeightsSettings:
    """Thresholds of ``uncovered-weights``."""

    min_share: float = fraction(0.9)


def check(
    ctx: AuditContext, settings: RuleSettings[UncoveredWeightsSettings]
) -> Iterator[Finding]:
    """Yield one finding when the covered share of parameters is below ``min-share``."""
    limit = settings.rule_wide.min_share
    coverage = coverage_of(ctx.checkpoint)
    share = coverage.share
    if coverage.covered > 0 and share >= limit:
        return
    nothing = coverage.covered == 0
    largest = [u.name for u in coverage.uncovered[:_LISTED]]
    more = len(coverage.uncovered) - len(largest)
    if coverage.parameters == 0:
        message = "the checkpoint holds no parameters: nothing was checked"
    elif nothing:
        message = (
            f"no layer was recognised: none of {coverage.parameters:,} parameters in "
            f"{len(coverage.uncovered):,} tensors was seen by the layer rules"
        )
    else:
        message = (
            f"the layer rules saw {percent(share)} of {coverage.parameters:,} parameters, below "
            f"min-share {limit:.0%}; {len(coverage.uncovered):,} tensors are in no layer"
        )
    yield model_finding(
        RULE.name,
        severity=Severity.ERROR if nothing else Severity.WARNING,
        score=score(1.0 - share, limit / max(share, 1e-6)),
        message=message,
        hint="declare the missing layers in a layout file, or lower min-share for this "
        "model in the policy with the reason",
        evidence={
            "parameters": coverage.parameters,
            "covered": coverage.covered,
            "share": share,
            "min_share": limit,
            "uncovered_tensors": len(coverage.uncovered),
            "largest_uncovered": largest + ([f"… and {more:,} more"] if more > 0 else []),
        },
    )


RULE = RuleSpec(
    name="uncovered-weights",
    severity=Severity.WARNING,
    settings=UncoveredWeightsSettings,
    summary="weights in no recognised layer were never seen by the layer rules, so a gate "
    "that passes says nothing about them",
    doc=__doc__ or "",
    whole=check,
)
