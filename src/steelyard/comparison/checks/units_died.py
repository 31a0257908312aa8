"""``units-died``: units alive in OLD are dead in NEW.

**What it checks.** For every layer present in both checkpoints with the same shape, the
audit's ``dead-unit`` tests (constant, unused, never active, silenced; with the policy's
``dead-unit`` thresholds and ``input-range``) run on each side. Units dead in NEW but not
in OLD are reported; when NEW's units are a verified permutation of OLD's, OLD's units are
mapped through it first. Units dead in OLD and alive in NEW are listed as revived in the
layer table, not reported.

**Why it matters.** Units that die between two checkpoints are capacity lost in that stretch
of training, usually to a learning rate too high for ReLU units, an L1 penalty or weight
decay driving rows to zero, or a normalisation scale decaying to zero. Catching it between
checkpoints points at the run that did it.

**Severity and score.** Warning. Score = ``scoring.score(died / units, 1 + died)``.

**What to do.** Compare the training settings of the two runs (learning rate, penalty,
warm-up); ``steelyard audit NEW`` names which dead-unit test each unit fails.
"""

from __future__ import annotations

from collections.abc import Iterator

from steelyard.comparison.checks import CompareContext, compare_rule
from steelyard.findings import Finding, Severity
from steelyard.numbers import count
from steelyard.rules.base import NoSettings, RuleSettings
from steelyard.rules.scoring import score


def units_died(ctx: CompareContext, settings: RuleSettings[NoSettings]) -> Iterator[Finding]:
    """The rule's findings over every compared layer."""
    for diff in ctx.diffs:
        if not diff.units_died:
            continue
        total = int((diff.new_layer or {}).get("units", 0)) or len(diff.units_died)
        died = len(diff.units_died)
        yield ctx.finding(
            "units-died",
            diff,
            severity=Severity.WARNING,
            units=diff.units_died,
            score=score(died / total, 1 + died),
            message=f"{count(died)} of {count(total)} units alive in OLD are dead in NEW"
            + (f" ({count(len(diff.units_revived))} revived)" if diff.units_revived else ""),
            hint="compare the two runs' learning rate, penalties and warm-up; `steelyard audit NEW` "
            "names the dead-unit test each unit fails",
            evidence={
                "died": died,
                "units_total": total,
                "units_revived": list(diff.units_revived),
            },
        )


RULE = compare_rule(
    name="units-died",
    severity=Severity.WARNING,
    summary="units that died since OLD are capacity lost in that stretch of training",
    check=units_died,
)
