"""The terminal view of ``steelyard compare``: header, verdict, findings, ranked layer changes
with a small bar each, unit detail for the most changed layers, and the caution."""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

from rich.console import Group, RenderableType
from rich.table import Table
from rich.text import Text

from steelyard.comparison.report import CompareReport, LayerDiff, Status
from steelyard.findings import Finding, Severity, compact_units, units_cell
from steelyard.ranking import rank
from steelyard.render.text import titled_table, to_text
from steelyard.report import CAUTION
from steelyard.text_safety import shown_deep

_STYLE = {Severity.ERROR: "bold red", Severity.WARNING: "yellow", Severity.INFO: "cyan"}
_STATUS_STYLE = {
    Status.SAME: "green",
    Status.CHANGED: "yellow",
    Status.ADDED: "cyan",
    Status.REMOVED: "magenta",
    Status.RESHAPED: "magenta",
}
_EIGHTHS = " ▏▎▍▌▋▊▉"
#: Cells of the change bar; a full bar is the largest change shown (at least 1.0).
BAR_CELLS = 10
#: Layer rows and findings shown in the terminal (JSON has them all).
MAX_ROWS = 40
#: Changed layers whose most changed units are listed.
DETAIL_LAYERS = 3


def bar(value: float | None, full: float, cells: int = BAR_CELLS) -> str:
    """A horizontal bar of ``value / full`` in eighths of a cell."""
    if value is None or full <= 0:
        return ""
    if not math.isfinite(value):
        return "█" * cells
    eighths = round(min(1.0, max(0.0, value / full)) * cells * 8)
    whole, rest = divmod(eighths, 8)
    return "█" * whole + (_EIGHTHS[rest] if rest else "")


def number(value: float | None) -> str:
    """Three significant digits, a dash for unknown."""
    if value is None:
        return "—"
    return "inf" if math.isinf(value) else f"{value:.3g}"


def _header(report: CompareReport) -> Text:
    old, new = report.comparison.old, report.comparison.new

    def side(block: Mapping[str, Any]) -> str:
        digest = str(block.get("sha256", ""))[:12]
        return f"{block['path']}  ({block['format']}, {int(block['parameters']):,} parameters, sha256 {digest}…)"

    frozen = ", ".join(report.frozen) if report.frozen else "none"
    return Text.assemble(
        ("old ", "bold"),
        side(old),
        "\n",
        ("new ", "bold"),
        side(new),
        "\n",
        ("policy ", "bold"),
        report.policy_source,
        ("   frozen ", "bold"),
        frozen,
    )


def verdict(report: CompareReport) -> Text:
    """PASS / FAIL / REPORT ONLY with the counts behind it."""
    comparison = report.comparison
    counts = comparison.counts()
    summary = f"{counts['error']} errors, {counts['warning']} warnings, {counts['info']} info"
    present = len(comparison.audit_present)
    tail = f"; {present} audit findings already present in OLD (not gated)" if present else ""
    if report.gate is None:
        return Text.assemble(
            ("REPORT ONLY ", "bold"), f"{summary} (gate disabled: --fail-on never){tail}"
        )
    failing = comparison.failing(report.gate)
    if failing:
        return Text.assemble(
            ("FAIL ", "bold red"), f"{summary}; {len(failing)} at or above {report.fail_on}{tail}"
        )
    return Text.assemble(
        ("PASS ", "bold green"), f"{summary}; none at or above {report.fail_on}{tail}"
    )


def overview(report: CompareReport) -> str:
    """One line: layers per status and the overall change."""
    comparison = report.comparison
    statuses = comparison.statuses()
    permuted = sum(1 for d in comparison.layers if d.permuted)
    precision = sum(1 for d in comparison.layers if d.precision_only)
    extras = [f"{permuted} permuted"] if permuted else []
    extras += [f"{precision} precision-only"] if precision else []
    same = f"{statuses['same']} same" + (f" ({', '.join(extras)})" if extras else "")
    parts = [same] + [f"{statuses[s.value]} {s.value}" for s in Status if s is not Status.SAME]
    return f"layers: {', '.join(parts)}; overall relative change {number(comparison.overall_relative_change)}"


def percent(share: float) -> str:
    """A share as a percentage that never rounds a partial share to 100 % or a non-zero one to
    0 %."""
    if 0.0 < share < 0.001:
        return "<0.1%"
    if 0.999 < share < 1.0:
        return ">99.9%"
    return f"{share:.1%}"


def coverage_line(report: CompareReport) -> str | None:
    """One line: matched layers and the share of each side's parameters compared value by
    value (None for a comparison built without coverage)."""
    cover = report.comparison.coverage
    if cover is None:
        return None
    return (
        f"coverage: {cover.matched}/{cover.layers_new} NEW layers matched, {cover.compared} "
        f"compared by value: {percent(cover.share_new)} of NEW's {cover.parameters_new:,} "
        f"parameters, {percent(cover.share_old)} of OLD's {cover.parameters_old:,}"
    )


def _findings_table(findings: list[tuple[Finding, str]]) -> Table:
    table = Table(show_edge=False, header_style="bold", pad_edge=False)
    for column in ("#", "severity", "rule", "layer", "units", "finding"):
        table.add_column(column, overflow="fold")
    for index, (finding, where) in enumerate(findings[:MAX_ROWS], 1):
        body = Text(finding.message)
        body.append(f"\nhint: {finding.hint}", style="italic")
        if where:
            body.append(f"\n{where}", style="dim")
        table.add_row(
            str(index),
            Text(finding.severity.value, style=_STYLE[finding.severity]),
            finding.rule,
            finding.layer or "—",
            units_cell(finding, limit=6),
            body,
        )
    return table


def _status(diff: LayerDiff) -> Text:
    label = diff.status.value
    if diff.permuted:
        label += " (permuted)"
    elif diff.precision_only:
        label += f" ({diff.precision or 'precision'} rounding)"
    return Text(label, style=_STATUS_STYLE[diff.status])


def _layers_table(layers: tuple[LayerDiff, ...]) -> Table:
    shown = layers[:MAX_ROWS]
    finite = [
        d.relative_change
        for d in shown
        if d.relative_change is not None and math.isfinite(d.relative_change)
    ]
    full = max([1.0, *finite])
    # Columns a comparison across precisions or of a low-rank fine-tune needs, only then.
    stored = any(d.stored_old != d.stored_new for d in shown)
    ranked = any(d.update_rank is not None or d.update_rank_above for d in shown)
    flattened = any(d.rows_flattened for d in shown)
    columns = ["layer", "status", "rel. change", "", "cosine"]
    columns += ["stored", "max |Δ|"] if stored else []
    columns += ["rank"] if ranked else []
    columns += ["fan-in norm median", "died", "revived"]
    columns += ["flattened"] if flattened else []
    table = titled_table(
        "layer changes, largest first",
        tuple(columns),
        right=("rel. change", "cosine", "max |Δ|", "rank", "died", "revived", "flattened"),
    )
    for diff in shown:
        old_norm = diff.fan_in_norm_old[1] if diff.fan_in_norm_old else None
        new_norm = diff.fan_in_norm_new[1] if diff.fan_in_norm_new else None
        row: list[RenderableType] = [
            diff.name
            if diff.old_name in (None, diff.name)
            else f"{diff.name} (OLD {diff.old_name})",
            _status(diff),
            number(diff.relative_change),
            bar(diff.relative_change, full),
            number(diff.cosine),
        ]
        if stored:
            row += [f"{diff.stored_old or '—'} → {diff.stored_new or '—'}", number(diff.max_abs_change)]
        if ranked:
            row.append(rank_cell(diff))
        row += [
            f"{number(old_norm)} → {number(new_norm)}",
            str(len(diff.units_died) or "—"),
            str(len(diff.units_revived) or "—"),
        ]
        if flattened:
            row.append(str(len(diff.rows_flattened) or "—"))
        table.add_row(*row)
    return table


def rank_cell(diff: LayerDiff) -> str:
    """The update's effective rank, ``>64`` past the resolved limit, ``—`` when not measured."""
    if diff.update_rank is not None:
        return str(diff.update_rank)
    return f">{diff.update_rank_above}" if diff.update_rank_above else "—"


def _detail(layers: tuple[LayerDiff, ...]) -> list[RenderableType]:
    changed = [d for d in layers if d.status is Status.CHANGED and d.top_units][:DETAIL_LAYERS]
    if not changed:
        return []
    parts: list[RenderableType] = [Text(""), Text("most changed units", style="bold")]
    for diff in changed:
        units = ", ".join(
            f"{u.unit}: {number(u.relative_change)} (norm {number(u.old_norm)} → {number(u.new_norm)})"
            for u in diff.top_units
        )
        parts.append(Text.assemble((f"{diff.name}  ", "bold"), units))
        if diff.units_died:
            parts.append(Text(f"  died: {compact_units(diff.units_died)}", style="yellow"))
    return parts


def render_compare_table(report: CompareReport, *, color: bool = False, width: int = 120) -> str:
    """The whole terminal report."""
    report = shown_deep(report)  # names from files: escaped, one line each
    comparison = report.comparison
    parts: list[RenderableType] = [
        _header(report),
        verdict(report),
        Text(overview(report)),
    ]
    line = coverage_line(report)
    if line:
        parts.append(Text(line))
    parts.append(Text(""))
    fresh = {f.id for f in comparison.audit_new}
    rows = [
        (f, "audit of NEW: new since OLD" if f.id in fresh else "") for f in rank(comparison.gated)
    ]
    if rows:
        parts.append(_findings_table(rows))
        if len(rows) > MAX_ROWS:
            parts.append(
                Text(f"… and {len(rows) - MAX_ROWS} more (use --format json)", style="dim")
            )
    else:
        parts.append(Text("no findings", style="green"))
    if comparison.audit_present:
        parts.append(
            Text(
                f"{len(comparison.audit_present)} audit findings of NEW were already present in "
                "OLD; `steelyard audit NEW` gates on them",
                style="dim",
            )
        )
    if comparison.ignored:
        parts.append(
            Text(
                f"{comparison.ignored} findings silenced by the policy's ignore entries",
                style="dim",
            )
        )
    if comparison.layers:
        parts += [Text(""), _layers_table(comparison.layers)]
        if len(comparison.layers) > MAX_ROWS:
            parts.append(
                Text(
                    f"… and {len(comparison.layers) - MAX_ROWS} more layers (use --format json)",
                    style="dim",
                )
            )
    parts += _detail(comparison.layers)
    parts += [Text(f"note: {note}", style="dim") for note in comparison.notes]
    parts += [Text(""), Text(CAUTION, style="italic")]
    return to_text([Group(*parts)], color=color, width=width)
