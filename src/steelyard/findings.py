"""Findings: what a rule reports, with a fingerprint that survives value changes."""

from __future__ import annotations

import hashlib
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from enum import Enum
from typing import Any


class Severity(str, Enum):
    """How bad a finding is; ``rank`` orders them, worst first."""

    ERROR = "error"
    WARNING = "warning"
    INFO = "info"

    @property
    def rank(self) -> int:
        """0 for error, 1 for warning, 2 for info."""
        return _RANK[self]

    def at_least(self, other: Severity) -> bool:
        """True when this severity is as bad as ``other`` or worse."""
        return self.rank <= other.rank


_RANK = {Severity.ERROR: 0, Severity.WARNING: 1, Severity.INFO: 2}


class FailOn(str, Enum):
    """What fails a gate: findings of a severity or worse, or nothing (a report-only run).
    The one place the word ``never`` is given a meaning; reports keep the value as text."""

    ERROR = "error"
    WARNING = "warning"
    INFO = "info"
    NEVER = "never"

    @property
    def threshold(self) -> Severity | None:
        """The lowest failing severity; None when nothing fails."""
        return None if self is FailOn.NEVER else Severity(self.value)


@dataclass(frozen=True, slots=True)
class Finding:
    """One problem a rule saw in one place."""

    rule: str
    """The rule's name, which is its ID in reports and policies."""
    severity: Severity
    layer: str | None
    """The layer's name, or None for findings about a bare tensor or the whole file."""
    tensor: str | None
    """Stored name of the tensor concerned (a layer's weight for layer findings)."""
    units: tuple[int, ...]
    """Rows of the canonical view concerned (sorted); empty when the whole tensor is."""
    score: float
    """Rule-specific badness used for ranking (documented per rule in docs/rules.md)."""
    message: str
    """What was measured against which limit."""
    hint: str
    """What to do about it."""
    evidence: Mapping[str, Any] = field(default_factory=dict)
    """Small JSON-ready mapping of the numbers behind the finding."""
    part: str = ""
    """Which part of the tensor ``units`` index (a recurrent gate), else empty."""
    checkpoint: str = ""
    """Path of the checkpoint the finding is about (set by the audit); not fingerprinted."""

    @property
    def id(self) -> str:
        """Stable fingerprint of (rule, tensor or layer, units), free of measured values."""
        where = self.tensor if self.tensor is not None else (self.layer or "")
        units = ",".join(str(u) for u in self.units)
        text = "\x1f".join((self.rule, where, self.part, units))
        return hashlib.sha256(text.encode("utf-8")).hexdigest()[:16]


def severity_counts(findings: Iterable[Finding]) -> dict[str, int]:
    """How many of ``findings`` there are of each severity, by its name (every severity
    listed, worst first, 0 where there is none)."""
    out = {s.value: 0 for s in Severity}
    for finding in findings:
        out[finding.severity.value] += 1
    return out


def at_or_above(findings: Iterable[Finding], fail_on: Severity | None) -> list[Finding]:
    """The ``findings`` at or above the gate ``fail_on``, in their order; none when there is
    no gate (None, a report-only run)."""
    if fail_on is None:
        return []
    return [f for f in findings if f.severity.at_least(fail_on)]


def compact_units(units: tuple[int, ...] | list[int], limit: int = 12) -> str:
    """``0-3,7,9-12`` with a count when long, for terminal reports."""
    if not units:
        return "—"
    ranges: list[str] = []
    start = prev = units[0]
    for unit in [*units[1:], None]:
        if unit is not None and unit == prev + 1:
            prev = unit
            continue
        ranges.append(str(start) if start == prev else f"{start}-{prev}")
        if unit is not None:
            start = prev = unit
    text = ",".join(ranges[:limit])
    if len(ranges) > limit:
        text += f",… ({len(units)} units)"
    return text


def units_cell(finding: Finding, limit: int = 12) -> str:
    """The units column of a report: the units, or the named part when the finding is about a
    part rather than rows (``head 3``, ``experts 0,2``)."""
    if not finding.units and finding.part:
        return finding.part
    return compact_units(finding.units, limit)
