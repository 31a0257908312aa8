"""Ranking: one total order over findings, worst first."""

from __future__ import annotations

from collections.abc import Iterable

from steelyard.findings import Finding


def rank_key(finding: Finding) -> tuple[int, float, str, str, str, tuple[int, ...]]:
    """Severity, then score (higher first), then rule, then location."""
    return (
        finding.severity.rank,
        -finding.score,
        finding.rule,
        finding.layer or "",
        finding.tensor or "",
        finding.units,
    )


def rank(findings: Iterable[Finding]) -> tuple[Finding, ...]:
    """Findings in report order."""
    return tuple(sorted(findings, key=rank_key))
