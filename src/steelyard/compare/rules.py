"""Where the comparison rules used to live; they are now one module each under
:mod:`steelyard.compare.checks`, registered in the one registry :func:`steelyard.rules.registry`.

Kept only so that callers written against the old names keep working until they import from
the new places: ``CompareContext`` → :class:`steelyard.compare.checks.CompareContext`;
``compare_registry()`` → ``steelyard.rules.registry(Command.COMPARE)``; ``run_compare_rules``
→ :func:`steelyard.compare.checks.run` (which returns the suppressed findings, not a count).
"""

from __future__ import annotations

from steelyard.compare.checks import CompareContext, compare_rules, run
from steelyard.findings import Finding
from steelyard.rules.base import RuleSpec

CompareRuleSpec = RuleSpec
"""The comparison rules are :class:`~steelyard.rules.RuleSpec` records like every rule."""


def compare_registry() -> dict[str, RuleSpec]:
    """Comparison rule name → spec."""
    return compare_rules()


def run_compare_rules(ctx: CompareContext) -> tuple[list[Finding], int]:
    """The kept comparison findings and how many the policy's ignore entries silenced."""
    findings, suppressed = run(ctx)
    return findings, len(suppressed)


__all__ = ["CompareContext", "CompareRuleSpec", "compare_registry", "run_compare_rules"]
