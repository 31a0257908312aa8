"""The terminal audit report: header, verdict, ranked findings, layer health, run summary,
caution.

Every line is laid out here (through :mod:`steelyard.render.grid` and
:mod:`steelyard.render.fitting`) to at most the given width, so rich never folds a word or a
name in the middle. Below :data:`~steelyard.render.findings_view.COMPACT_BELOW` columns the
findings and the layer health use their compact layouts.
"""

from __future__ import annotations

import math

from rich.console import Group, RenderableType
from rich.text import Text

from steelyard.digest import digest_shown
from steelyard.render.findings_view import (
    findings_section,
)
from steelyard.render.fitting import distinct_tails
from steelyard.render.grid import COMPACT_BELOW, Cell, Column, Grid, indented, labelled
from steelyard.render.text import (
    count,
    coverage_line,
    human_bytes,
    number,
    percent,
    plural,
    to_text,
)
from steelyard.report import CAUTION, CheckpointAudit, LayerHealth, Report
from steelyard.rules import registry
from steelyard.text_safety import shown_deep

_BARS = "▁▂▃▄▅▆▇█"
#: Tensors in no layer named in the terminal (JSON lists them all).
_UNCOVERED_SHOWN = 8
#: Suppressed findings listed (JSON has them all).
_SUPPRESSED_SHOWN = 40


def spark(histogram: tuple[int, ...]) -> str:
    """A small bar of counts per bin."""
    if not histogram or max(histogram) == 0:
        return ""
    top = max(histogram)
    return "".join(" " if c == 0 else _BARS[min(7, math.ceil(7 * c / top))] for c in histogram)


def _verdict(report: Report, audit: CheckpointAudit) -> Text:
    counts = audit.counts()
    failing = audit.failing(report.gate)
    summary = (
        f"{plural(counts['error'], 'error')}, {plural(counts['warning'], 'warning')}, "
        f"{counts['info']:,} info"
    )
    if report.gate is None:
        return Text.assemble(("REPORT ONLY", "bold"), f" {summary} (gate disabled: --fail-on never)")
    if failing:
        return Text.assemble(
            ("FAIL", "bold red"), f" {summary}; {count(len(failing))} at or above {report.fail_on}"
        )
    return Text.assemble(("PASS", "bold green"), f" {summary}; none at or above {report.fail_on}")


def _header(report: Report, audit: CheckpointAudit, width: int) -> list[Text]:
    block = audit.checkpoint
    size = f", {human_bytes(int(block['file_size']))}" if "file_size" in block else ""
    pairs: list[tuple[str, str | Text]] = [
        ("checkpoint", str(block["path"])),
        digest_shown(block),
        (
            "format",
            f"{block['format']}{size}; {plural(int(block['parameters']), 'parameter')} in "
            f"{plural(len(audit.layers), 'layer')}",
        ),
        ("gradients", audit.gradient_source or "none"),
        ("policy", report.policy_source),
    ]
    if audit.coverage is not None:
        pairs.append(("coverage", coverage_line(audit.coverage)))
    pairs.append(("verdict", _verdict(report, audit)))
    return [line for label, value in pairs for line in labelled(label, value, width)]


def _flagged(row: LayerHealth) -> str:
    """The compact table's one column for what the rules flagged in the layer."""
    flags = [
        *([f"{count(row.dead)} dead"] if row.dead else []),
        *([plural(row.twins, "twin")] if row.twins else []),
        *(
            [f"{percent(row.unsupported_share)} unsupported"]
            if row.unsupported_share
            else []
        ),
    ]
    return ", ".join(flags) or "—"


def _health(audit: CheckpointAudit, width: int, tails: dict[str, str]) -> list[Text]:
    """The layer-health table; the compact one drops the kind (``steelyard layers`` has it)
    and folds the rule-filled columns into one."""
    compact = width < COMPACT_BELOW
    measured = [
        Column("units", align="right"),
        Column("min" if compact else "fan-in norm min", align="right", wrap="words"),
        Column("median", align="right"),
        Column("max", align="right"),
        Column("histogram"),
    ]
    if compact:
        columns = [
            Column("layer", wrap="name", floor=40, one_line=True),
            *measured,
            Column("flagged", wrap="words", floor=12),
        ]
    else:
        columns = [
            Column("layer", wrap="name", floor=40, one_line=True),
            Column("kind"),
            *measured,
            Column("dead", align="right"),
            Column("twins", align="right"),
            Column("unsupported", align="right"),
        ]
    grid = Grid(tuple(columns), tails=tails)
    for row in audit.layers:
        low, mid, high = row.fan_in_norm
        values = [
            count(int(row.layer["units"])),
            number(low),
            number(mid),
            number(high),
            spark(row.norm_histogram),
        ]
        if compact:
            grid.add(str(row.layer["name"]), *values, _flagged(row))
            continue
        share = "—" if row.unsupported_share is None else percent(row.unsupported_share)
        grid.add(
            str(row.layer["name"]),
            str(row.layer["kind"]),
            *values,
            count(row.dead) if row.dead else "—",
            count(row.twins) if row.twins else "—",
            share,
        )
    flags = (
        "flagged: units the dead-unit and twin-units rules flagged, and the share of weights "
        "the unsupported-weight rule flagged"
        if compact
        else "dead and twins: units the dead-unit and twin-units rules flagged; unsupported: "
        "share of the layer's weights the unsupported-weight rule flagged (— without gradient "
        "support)"
    )
    legend = (
        "min, median, max: L2 norm of each unit's incoming weights (fan-in norm) across the "
        "layer's units; histogram: how many units fall in each of a few fan-in norm bins, "
        f"log-spaced from min (left) to max (right), the tallest bar the fullest bin; {flags}"
    )
    return [
        Text("layer health", style="bold"),
        *grid.render(width),
        *indented(legend, width, "dim", indent=0),
    ]


def _audit(report: Report, audit: CheckpointAudit, width: int) -> list[Text]:
    parts = _header(report, audit, width)
    parts.append(Text(""))
    names = [str(row.layer["name"]) for row in audit.layers]
    names += [f.layer for f in audit.findings if f.layer]
    tails = distinct_tails(names)
    specs = registry()  # an audit's findings come from the audit's rules only
    if audit.findings:
        parts += findings_section(audit.findings, specs, width, tails)
    else:
        parts.append(Text("no findings", style="green"))
    if audit.baselined:
        parts += indented(
            f"{plural(len(audit.baselined), 'finding')} matched the baseline and are not gated on",
            width,
            "dim",
            indent=0,
        )
    if audit.suppressed:
        parts += indented(
            f"{plural(len(audit.suppressed), 'finding')} silenced by the policy's ignore entries:",
            width,
            "dim",
            indent=0,
        )
        for s in audit.suppressed[:_SUPPRESSED_SHOWN]:
            parts += indented(
                f"{s.finding.rule} on {s.finding.layer or 'the checkpoint'}: {s.finding.message} "
                f"(ignored for layers {s.layers!r}: {s.reason})",
                width,
                "dim",
            )
    if audit.layers:
        parts += [Text(""), *_health(audit, width, tails)]
    uncovered = audit.coverage.uncovered if audit.coverage is not None else ()
    if uncovered:
        shown_names = ", ".join(f"{u.name} {list(u.shape)}" for u in uncovered[:_UNCOVERED_SHOWN])
        more = (
            f" and {count(len(uncovered) - _UNCOVERED_SHOWN)} more (--format json lists them all)"
            if len(uncovered) > _UNCOVERED_SHOWN
            else ""
        )
        parts += indented(f"in no layer: {shown_names}{more}", width, "dim", indent=0)
    for note in audit.notes:
        parts += indented(f"note: {note}", width, "dim", indent=0)
    return parts


def _summary(report: Report, width: int) -> list[Text]:
    """The run's last word: one row per checkpoint, then every failure named in full."""
    paths = [str(a.checkpoint["path"]) for a in report.audits] + [e.path for e in report.errors]
    grid = Grid(
        tails=distinct_tails(paths),
        columns=(
            Column("checkpoint", wrap="name", floor=24, one_line=True),
            Column("verdict"),
            Column("errors", align="right"),
            Column("warnings", align="right"),
            Column("coverage", align="right"),
        )
    )
    rows: list[tuple[str, Cell, str, str, str]] = []
    failures: list[str] = []
    for audit in report.audits:
        counts = audit.counts()
        failing = audit.failing(report.gate)
        path = str(audit.checkpoint["path"])
        if report.gate is None:
            mark = Cell.of("report", "bold")
        elif failing:
            mark = Cell.of("FAIL", "bold red")
            failures.append(
                f"FAIL {path}: {plural(len(failing), 'finding')} at or above {report.fail_on}"
            )
        else:
            mark = Cell.of("PASS", "bold green")
        share = "—" if audit.coverage is None else percent(audit.coverage.share)
        rows.append((path, mark, count(counts["error"]), count(counts["warning"]), share))
    for error in report.errors:
        rows.append((error.path, Cell.of("UNREADABLE", "bold red"), "—", "—", "—"))
        failures.append(f"UNREADABLE {error.path}: {error.reason}")
    for row in sorted(rows, key=lambda r: r[0]):
        grid.add(*row)
    lines = [Text(""), Text("summary", style="bold"), *grid.render(width)]
    for failure in sorted(failures, key=lambda f: f.split(" ", 1)[1]):
        lines += indented(failure, width, "red", indent=0)
    if report.gate is None and report.passed:
        verdict, style = "REPORT ONLY", "bold"  # as each checkpoint's row says: no gate
    else:
        verdict, style = ("PASS", "bold green") if report.passed else ("FAIL", "bold red")
    unreadable = f", {count(len(report.errors))} unreadable" if report.errors else ""
    lines.append(
        Text.assemble(
            ("overall ", "bold"),
            (verdict, style),
            f" over {plural(len(report.audits), 'checkpoint')} audited{unreadable}",
        )
    )
    return lines


def _inputs(report: Report, width: int, summarised: bool) -> list[Text]:
    parts: list[Text] = []
    for error in () if summarised else report.errors:  # the summary names them otherwise
        parts += indented(f"unreadable {error.line}", width, "bold red", indent=0)
    for skipped in report.skipped:
        parts += indented(f"skipped {skipped.path}: {skipped.reason}", width, "dim", indent=0)
    for note in report.notes:
        parts += indented(f"note: {note}", width, "dim", indent=0)
    for note in report.policy_notes:
        parts += indented(f"policy: {note}", width, "yellow", indent=0)
    return parts


def render_table(report: Report, *, color: bool = False, width: int = 120) -> str:
    """The whole terminal report, no line wider than ``width`` (at least 40)."""
    width = max(40, width)
    report = shown_deep(report)  # names from files: escaped, one line each
    parts: list[Text] = []
    for index, audit in enumerate(report.audits):
        if index:
            parts += [Text(""), Text("─" * min(width, 100), style="dim")]
        parts += _audit(report, audit, width)
    summarised = len(report.audits) + len(report.errors) > 1
    inputs = _inputs(report, width, summarised)
    if inputs:
        parts += [Text(""), *inputs]
    if summarised:
        parts += _summary(report, width)
    elif report.errors or not report.audits:
        parts.append(Text.assemble(("overall ", "bold"), ("FAIL", "bold red"), ": nothing audited"))
    parts += [Text(""), *indented(CAUTION, width, "italic", indent=0)]
    renderables: list[RenderableType] = [Group(*parts)]
    return to_text(renderables, color=color, width=width)


__all__ = ["human_bytes", "render_table", "spark"]
