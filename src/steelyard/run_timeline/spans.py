"""Following each finding across the run: where it appeared, where it went away, when it
came back. Only a few integers per finding are kept, whatever the number of checkpoints."""

from __future__ import annotations

from dataclasses import dataclass, field

from steelyard.findings import Finding, Severity
from steelyard.run_timeline.result import FindingSpan
from steelyard.run_timeline.summary import FindingKey


def _units(findings: list[Finding]) -> tuple[int, ...]:
    return tuple(sorted({u for f in findings for u in f.units}))


def _worst(findings: list[Finding]) -> Severity:
    return min((f.severity for f in findings), key=lambda s: s.rank)


@dataclass
class _Track:
    severity: Severity
    units_first: tuple[int, ...]
    units_last: tuple[int, ...] = ()
    spans: list[list[int]] = field(default_factory=list)
    last_severity: Severity | None = None


class SpanTracker:
    """Feed it each checkpoint's findings in timeline order; :meth:`spans` gives the result."""

    def __init__(self) -> None:
        self._tracks: dict[FindingKey, _Track] = {}
        self._count = 0

    def add(self, findings: dict[FindingKey, list[Finding]]) -> None:
        """The findings of the next checkpoint (grouped by key)."""
        index = self._count
        self._count += 1
        for key, group in findings.items():
            severity = _worst(group)
            track = self._tracks.get(key)
            if track is None:
                track = self._tracks[key] = _Track(severity, _units(group))
            if severity.rank < track.severity.rank:
                track.severity = severity
            track.units_last = _units(group)
            if track.spans and track.spans[-1][1] == index - 1:
                track.spans[-1][1] = index
            else:
                track.spans.append([index, index])
        for key, track in self._tracks.items():
            track.last_severity = _worst(findings[key]) if key in findings else None

    def spans(self) -> tuple[FindingSpan, ...]:
        """Every finding seen, by first appearance, then rule, then place."""
        out = []
        for (rule, layer, tensor), track in self._tracks.items():
            appeared = track.spans[0][0]
            end = track.spans[0][1]
            out.append(
                FindingSpan(
                    rule=rule,
                    layer=layer,
                    tensor=tensor,
                    severity=track.severity,
                    last_severity=track.last_severity,
                    appeared=appeared,
                    disappeared=end + 1 if end + 1 < self._count else None,
                    spans=tuple((a, b) for a, b in track.spans),
                    units_first=track.units_first,
                    units_last=track.units_last,
                )
            )
        out.sort(key=lambda s: (s.appeared, s.rule, s.layer or "", s.tensor or ""))
        return tuple(out)
