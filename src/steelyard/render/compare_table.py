"""The terminal view of ``steelyard compare``: header, verdict, findings, ranked layer changes,
unit detail for the most changed layers, and the caution.

Every line is laid out here and in :mod:`steelyard.render.compare_layers_view` through
:mod:`steelyard.render.grid` and :mod:`steelyard.render.fitting`, to at most the given width:
prose wraps at spaces, names after their separators or shortened from the left to a tail no
other layer shares. Below :data:`~steelyard.render.grid.COMPACT_BELOW` columns the findings get
one line per row with the message under it, each rule's why and hints once below the table (as
the audit report does), and the layer changes their compact layout.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

from rich.console import Group
from rich.text import Text

from steelyard.comparison.report import CompareReport, Status
from steelyard.digest import digest_shown
from steelyard.findings import Finding
from steelyard.ranking import rank
from steelyard.render.compare_layers_view import (
    BAR_CELLS,
    DETAIL_LAYERS,
    bar,
    layer_changes,
    rank_cell,
    unit_detail,
)
from steelyard.render.findings_view import (
    MAX_ROWS,
    findings_section,
)
from steelyard.render.fitting import distinct_tails
from steelyard.render.grid import indented, labelled
from steelyard.render.text import count, percent, plural, to_text
from steelyard.render.text import number as one_number
from steelyard.report import CAUTION
from steelyard.rules import registry
from steelyard.text_safety import shown_deep

__all__ = [
    "BAR_CELLS",
    "DETAIL_LAYERS",
    "MAX_ROWS",
    "bar",
    "coverage_line",
    "number",
    "overview",
    "rank_cell",
    "render_compare_table",
    "verdict",
]

#: Widest line of a message in the wide findings table, for reading comfort.
_PROSE = 100
#: Said under a finding of the audit of NEW that OLD did not have.
NEW_IN_AUDIT = "from the audit of NEW; not in OLD"


def number(value: float | None) -> str:
    """Three significant digits, a dash for unknown (the Markdown report's and the timeline
    table's cells)."""
    if value is None:
        return "—"
    return "inf" if math.isinf(value) else f"{value:.3g}"


def _side(block: Mapping[str, Any]) -> str:
    return f"{block['format']}; {plural(int(block['parameters']), 'parameter')}"


def _counts(counts: Mapping[str, int]) -> str:
    return (
        f"{plural(counts['error'], 'error')}, {plural(counts['warning'], 'warning')}, "
        f"{count(counts['info'])} info"
    )


def verdict(report: CompareReport) -> Text:
    """PASS / FAIL / REPORT ONLY with the counts behind it."""
    comparison = report.comparison
    summary = _counts(comparison.counts())
    present = len(comparison.audit_present)
    tail = (
        f"; {plural(present, 'audit finding')} already present in OLD (not gated)"
        if present
        else ""
    )
    if report.gate is None:
        return Text.assemble(
            ("REPORT ONLY ", "bold"), f"{summary} (gate disabled: --fail-on never){tail}"
        )
    failing = comparison.failing(report.gate)
    if failing:
        return Text.assemble(
            ("FAIL ", "bold red"),
            f"{summary}; {count(len(failing))} at or above {report.fail_on}{tail}",
        )
    return Text.assemble(
        ("PASS ", "bold green"), f"{summary}; none at or above {report.fail_on}{tail}"
    )


def layer_summary(report: CompareReport) -> str:
    """Layers per status and the overall change."""
    comparison = report.comparison
    statuses = comparison.statuses()
    permuted = sum(1 for d in comparison.layers if d.permuted)
    precision = sum(1 for d in comparison.layers if d.precision_only)
    extras = [f"{count(permuted)} permuted"] if permuted else []
    extras += [f"{count(precision)} precision-only"] if precision else []
    same = f"{count(statuses['same'])} same" + (f" ({', '.join(extras)})" if extras else "")
    parts = [same] + [
        f"{count(statuses[s.value])} {s.value}" for s in Status if s is not Status.SAME
    ]
    overall = comparison.overall_relative_change
    change = "—" if overall is None else one_number(overall)
    return f"{', '.join(parts)}; overall relative change {change}"


def overview(report: CompareReport) -> str:
    """One line: layers per status and the overall change."""
    return f"layers: {layer_summary(report)}"


def coverage_text(report: CompareReport) -> str | None:
    """Matched layers and the share of each side's parameters compared value by value (None
    for a comparison built without coverage)."""
    cover = report.comparison.coverage
    if cover is None:
        return None
    return (
        f"{count(cover.matched)}/{count(cover.layers_new)} NEW layers matched, "
        f"{count(cover.compared)} compared by value: {percent(cover.share_new)} of NEW's "
        f"{count(cover.parameters_new)} parameters, {percent(cover.share_old)} of OLD's "
        f"{count(cover.parameters_old)}"
    )


def coverage_line(report: CompareReport) -> str | None:
    """``coverage: ...`` (see :func:`coverage_text`)."""
    text = coverage_text(report)
    return None if text is None else f"coverage: {text}"


def _header(report: CompareReport, width: int) -> list[Text]:
    comparison = report.comparison
    pairs: list[tuple[str, str | Text]] = []
    for side, block in (("old", comparison.old), ("new", comparison.new)):
        algorithm, digest = digest_shown(block)
        pairs += [
            (side, str(block["path"])),
            ("", _side(block)),
            (f"{side} {algorithm}", digest),
        ]
    pairs += [
        ("policy", report.policy_source),
        ("frozen", ", ".join(report.frozen) if report.frozen else "no layer"),
        ("layers", layer_summary(report)),
    ]
    cover = coverage_text(report)
    if cover is not None:
        pairs.append(("coverage", cover))
    pairs.append(("verdict", verdict(report)))
    return [line for label, value in pairs for line in labelled(label, value, width)]


def _findings(report: CompareReport, width: int, tails: dict[str, str]) -> list[Text]:
    comparison = report.comparison
    gated: tuple[Finding, ...] = rank(comparison.gated)
    parts: list[Text] = []
    if gated:
        specs = registry(None)
        fresh = {f.id for f in comparison.audit_new}
        parts += findings_section(gated, specs, width, tails, (fresh, NEW_IN_AUDIT))
    else:
        parts.append(Text("no findings", style="green"))
    present = len(comparison.audit_present)
    if gated and (present or comparison.ignored):
        parts.append(Text(""))  # the table ends where a line is empty
    if present:
        were = "was" if present == 1 else "were"
        parts += indented(
            f"{plural(present, 'audit finding')} of NEW {were} already present in OLD; "
            "`steelyard audit NEW` gates on them",
            width,
            "dim",
            indent=0,
        )
    if comparison.ignored:
        parts += indented(
            f"{plural(comparison.ignored, 'finding')} silenced by the policy's ignore entries",
            width,
            "dim",
            indent=0,
        )
    return parts


def render_compare_table(report: CompareReport, *, color: bool = False, width: int = 120) -> str:
    """The whole terminal report, no line wider than ``width`` (at least 40)."""
    width = max(40, width)
    report = shown_deep(report)  # names from files: escaped, one line each
    comparison = report.comparison
    names = [d.name for d in comparison.layers]
    names += [d.old_name for d in comparison.layers if d.old_name]
    names += [f.layer for f in comparison.gated if f.layer]
    tails = distinct_tails(names)
    parts: list[Text] = [*_header(report, width), Text("")]
    parts += _findings(report, width, tails)
    if comparison.layers:
        parts += [Text(""), *layer_changes(comparison.layers, width, tails)]
    parts += unit_detail(comparison.layers, width, tails)
    if comparison.notes:
        parts.append(Text(""))
    for note in comparison.notes:
        parts += indented(f"note: {note}", width, "dim", indent=0)
    parts += [Text(""), *indented(CAUTION, width, "italic", indent=0)]
    return to_text([Group(*parts)], color=color, width=width)
