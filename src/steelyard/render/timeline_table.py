"""The terminal view of ``steelyard timeline``: the checkpoints in order, the verdict, one row
per layer with a compact series (first → last, and the step where a count first changed), the
findings over the run (where each appeared and went away), the notes and the caution."""

from __future__ import annotations

import os
from collections.abc import Callable

from rich.console import RenderableType
from rich.table import Table
from rich.text import Text

from steelyard.findings import Severity, compact_units
from steelyard.render.compare_table import number
from steelyard.render.text import titled_table, to_text
from steelyard.report import CAUTION
from steelyard.run_timeline.result import Drift, FindingSpan, LayerPoint, LayerSeries, Timeline
from steelyard.text_safety import shown

_STYLE = {Severity.ERROR: "bold red", Severity.WARNING: "yellow", Severity.INFO: "cyan"}
#: Layer rows and findings shown (JSON has them all).
MAX_ROWS = 60


def _where(timeline: Timeline, index: int | None) -> str:
    """A checkpoint as the reader knows it: its step, else its position ``#i``."""
    if index is None:
        return "—"
    position = timeline.checkpoints[index].position
    if position.value is None:
        return f"#{index}"
    return f"{position.value}" if position.unit == "step" else f"{position.unit} {position.value}"


def _present(series: LayerSeries) -> list[tuple[int, LayerPoint]]:
    return [(i, p) for i, p in enumerate(series.points) if p is not None]


def _span(points: list[tuple[int, LayerPoint]], value: Callable[[LayerPoint], float | None]) -> str:
    first, last = value(points[0][1]), value(points[-1][1])
    return number(first) if len(points) == 1 else f"{number(first)}→{number(last)}"


def _count(
    timeline: Timeline, points: list[tuple[int, LayerPoint]], value: Callable[[LayerPoint], int]
) -> str:
    """``first→last`` and the step where the count first moved from its first value."""
    first = value(points[0][1])
    last = value(points[-1][1])
    moved = next((i for i, p in points if value(p) != first), None)
    text = f"{first}→{last}" if len(points) > 1 else str(first)
    return text if moved is None else f"{text} @{_where(timeline, moved)}"


def _drift(drift: Drift | None, cosine: bool = False) -> str:
    if drift is None:
        return "—"
    return number(drift.cosine if cosine else drift.relative_change)


def _layer_findings(timeline: Timeline, series: LayerSeries) -> str:
    spans = [s for s in timeline.findings if s.layer == series.name]
    return ", ".join(f"{s.rule}@{_where(timeline, s.appeared)}" for s in spans) or "—"


def _common_folder(paths: list[str]) -> str:
    """The folder every checkpoint sits under ('' when they share none worth naming)."""
    try:
        common = os.path.commonpath(paths)
    except ValueError:  # absolute and relative paths mixed
        return ""
    return "" if common in ("", os.sep) or common in paths else common


def _checkpoints(timeline: Timeline) -> RenderableType:
    paths = [c.path for c in timeline.checkpoints]
    folder = _common_folder(paths)
    sources = {c.position.source for c in timeline.checkpoints}
    title = f"Checkpoints (ordered by {timeline.order}"
    if len(sources) == 1 and None not in sources:
        title += f"; steps from {sources.pop()}"
    title += f") in {shown(folder)}" if folder else ")"
    names = ["#", "step", "from", "findings", "path"]
    if "steps from" in title:
        names.remove("from")
    table = _fitted(titled_table(title, names, {"#", "step", "findings"}))
    for entry in timeline.checkpoints:
        cells = {
            "#": str(entry.index),
            "step": _where(timeline, entry.index) if entry.position.value is not None else "—",
            "from": entry.position.source or "—",
            "findings": str(entry.findings),
            "path": shown(os.path.relpath(entry.path, folder) if folder else entry.path),
        }
        table.add_row(*(cells[n] for n in names))
    return table


#: Columns whose text may fold onto more lines (names, paths, lists); the others keep their
#: numbers whole.
_FOLDING = {"layer", "findings", "path", "where", "units when it appeared"}
#: Layer columns left out below :data:`WIDE` columns, so the rest keep their numbers whole.
_WIDE_ONLY = {"shape", "norm max", "Δ prev", "cos first"}
WIDE = 120


def _fitted(table: Table) -> Table:
    for column in table.columns:
        if str(column.header) in _FOLDING:
            column.overflow = "fold"
        else:
            column.no_wrap = True
    return table


def _layer_cells(timeline: Timeline, series: LayerSeries) -> dict[str, str]:
    points = _present(series)
    last = points[-1][1]
    return {
        "layer": shown(series.name),
        "shape": f"{series.units}×{series.fan_in}",
        "norm median": _span(points, lambda p: p.fan_in_norm_median),
        "norm max": _span(points, lambda p: p.fan_in_norm_max),
        "dead": _count(timeline, points, lambda p: p.dead),
        "NaN/Inf": _count(timeline, points, lambda p: p.nonfinite),
        "Δ prev": _drift(last.from_previous),
        "Δ first": _drift(last.from_first),
        "cos first": _drift(last.from_first, cosine=True),
        "findings": shown(_layer_findings(timeline, series)),
    }


def _layers(timeline: Timeline, width: int) -> RenderableType:
    names = [
        "layer",
        "shape",
        "norm median",
        "norm max",
        "dead",
        "NaN/Inf",
        "Δ prev",
        "Δ first",
        "cos first",
        "findings",
    ]
    if width < WIDE:
        names = [n for n in names if n not in _WIDE_ONLY]
    numeric = {"norm median", "norm max", "Δ prev", "Δ first", "cos first"}
    title = (
        "Layers: fan-in norm median/max, dead units and NaN/Inf first→last (@ the step a "
        "count first changed); drift (Δ: relative change) in the last checkpoint; findings "
        "@ the step they appeared"
    )
    table = _fitted(titled_table(title, names, numeric))
    for series in timeline.layers[:MAX_ROWS]:
        cells = _layer_cells(timeline, series)
        table.add_row(*(cells[n] for n in names))
    return table


def _findings(timeline: Timeline) -> RenderableType:
    table = titled_table(
        "Findings over the run",
        ("rule", "where", "appeared", "went away", "at the end", "units when it appeared"),
        set(),
    )
    _fitted(table)
    for span in timeline.findings[:MAX_ROWS]:
        table.add_row(
            span.rule,
            shown(span.layer or span.tensor or "(checkpoint)"),
            _where(timeline, span.appeared),
            _went_away(timeline, span),
            Text(span.last_severity.value, style=_STYLE[span.last_severity])
            if span.last_severity is not None
            else Text("gone"),
            compact_units(span.units_first),
        )
    return table


def _went_away(timeline: Timeline, span: FindingSpan) -> str:
    if span.disappeared is None:
        return "—"
    back = len(span.spans) > 1
    return _where(timeline, span.disappeared) + (" (came back)" if back else "")


def _verdict(timeline: Timeline) -> Text:
    failing = timeline.failing()
    if timeline.gate is None:
        return Text.assemble(("REPORT ONLY", "bold"), " (fail-on never)")
    if failing:
        return Text.assemble(
            ("FAIL", "bold red"),
            f"  {len(failing)} finding(s) of the last checkpoint at or above {timeline.fail_on}",
        )
    return Text.assemble(
        ("PASS", "bold green"),
        f"  no finding of the last checkpoint at or above {timeline.fail_on}",
    )


def render_timeline_table(timeline: Timeline, *, color: bool = False, width: int = 120) -> str:
    """The terminal report (ANSI styles only with ``color``)."""
    parts: list[RenderableType] = [
        Text.assemble(
            ("steelyard timeline ", "bold"),
            f"{len(timeline.checkpoints)} checkpoints, {len(timeline.layers)} layers, "
            f"policy {timeline.policy_source}",
        ),
        _verdict(timeline),
        Text(""),
        _checkpoints(timeline),
        Text(""),
        _layers(timeline, width),
    ]
    if len(timeline.layers) > MAX_ROWS:
        parts.append(Text(f"… {len(timeline.layers) - MAX_ROWS} more layers in --format json"))
    parts += [
        Text(""),
        _findings(timeline) if timeline.findings else Text("No findings in any checkpoint."),
    ]
    if len(timeline.findings) > MAX_ROWS:
        parts.append(Text(f"… {len(timeline.findings) - MAX_ROWS} more findings in --format json"))
    if timeline.notes:
        parts += [Text(""), Text("Notes", style="bold")]
        parts += [Text(f"  {shown(note)}") for note in timeline.notes]
    parts += [Text(""), Text(CAUTION, style="italic")]
    return to_text(parts, color=color, width=width)
