"""The terminal audit report: header, verdict, ranked findings, layer health, caution."""

from __future__ import annotations

import math

from rich.console import Group, RenderableType
from rich.table import Table
from rich.text import Text

from steelyard.coverage import describe
from steelyard.findings import Finding, Severity, units_cell
from steelyard.render.text import human_bytes, human_count, titled_table, to_text
from steelyard.report import CAUTION, CheckpointAudit, Report
from steelyard.rules import registry
from steelyard.text_safety import shown_deep

_STYLE = {Severity.ERROR: "bold red", Severity.WARNING: "yellow", Severity.INFO: "cyan"}
_BARS = "▁▂▃▄▅▆▇█"
#: Findings shown in full in the terminal; the rest are counted (JSON has them all).
MAX_SHOWN = 40
#: Tensors in no layer named in the terminal (JSON lists them all).
_UNCOVERED_SHOWN = 8


def spark(histogram: tuple[int, ...]) -> str:
    """A small bar of counts per bin."""
    if not histogram or max(histogram) == 0:
        return ""
    top = max(histogram)
    return "".join(" " if c == 0 else _BARS[min(7, math.ceil(7 * c / top))] for c in histogram)


def _number(value: float) -> str:
    return "—" if not math.isfinite(value) else f"{value:.3g}"


def _grouped(findings: tuple[Finding, ...]) -> list[tuple[Finding, list[str]]]:
    """Info findings that say the same thing about several layers become one row."""
    rows: list[tuple[Finding, list[str]]] = []
    for finding in findings:
        if finding.severity is Severity.INFO and not finding.units:
            for seen, layers in rows:
                if (seen.severity, seen.rule, seen.message, seen.hint) == (
                    finding.severity,
                    finding.rule,
                    finding.message,
                    finding.hint,
                ) and not seen.units:
                    layers.append(finding.layer or "—")
                    break
            else:
                rows.append((finding, [finding.layer] if finding.layer else []))
        else:
            rows.append((finding, [finding.layer] if finding.layer else []))
    return rows


def _verdict(report: Report, audit: CheckpointAudit) -> Text:
    counts = audit.counts()
    failing = audit.failing(report.gate)
    summary = f"{counts['error']} errors, {counts['warning']} warnings, {counts['info']} info"
    if report.gate is None:
        return Text.assemble(
            ("REPORT ONLY ", "bold"), f"{summary} (gate disabled: --fail-on never)"
        )
    if failing:
        return Text.assemble(
            ("FAIL ", "bold red"), f"{summary}; {len(failing)} at or above {report.fail_on}"
        )
    return Text.assemble(("PASS ", "bold green"), f"{summary}; none at or above {report.fail_on}")


def _audit(report: Report, audit: CheckpointAudit) -> list[RenderableType]:
    block = audit.checkpoint
    header = Text.assemble(
        ("checkpoint ", "bold"),
        str(block["path"]),
        "\n",
        ("format ", "bold"),
        str(block["format"]),
        ("   parameters ", "bold"),
        f"{int(block['parameters']):,}",
        ("   layers ", "bold"),
        str(len(audit.layers)),
        ("   gradient support ", "bold"),
        audit.gradient_source or "none",
        "\n",
        ("policy ", "bold"),
        report.policy_source,
        ("   sha256 ", "bold"),
        str(block.get("sha256", ""))[:16] + "…",
        *(
            ("\n", ("coverage ", "bold"), describe(audit.coverage))
            if audit.coverage is not None
            else ()
        ),
    )
    parts: list[RenderableType] = [header, _verdict(report, audit), Text("")]
    specs = registry()
    if audit.findings:
        findings = Table(show_edge=False, header_style="bold", pad_edge=False, expand=False)
        for column in ("#", "severity", "rule", "layer", "units", "finding"):
            findings.add_column(column, overflow="fold", max_width=24 if column == "layer" else None)
        explained: set[str] = set()
        for index, (finding, layers) in enumerate(_grouped(audit.findings[:MAX_SHOWN]), 1):
            body = Text(finding.message)
            if finding.rule not in explained and finding.rule in specs:
                # The why is the rule's, not the finding's: say it once per report.
                body.append(f"\nwhy: {specs[finding.rule].summary}", style="dim")
                explained.add(finding.rule)
            body.append(f"\nhint: {finding.hint}", style="italic")
            findings.add_row(
                str(index),
                Text(finding.severity.value, style=_STYLE[finding.severity]),
                finding.rule,
                ", ".join(layers) or "—",
                units_cell(finding, limit=6),
                body,
            )
        parts.append(findings)
        if len(audit.findings) > MAX_SHOWN:
            parts.append(
                Text(
                    f"… and {len(audit.findings) - MAX_SHOWN} more (use --format json)", style="dim"
                )
            )
    else:
        parts.append(Text("no findings", style="green"))
    if audit.baselined:
        parts.append(
            Text(
                f"{len(audit.baselined)} findings matched the baseline and are not gated on",
                style="dim",
            )
        )
    if audit.suppressed:
        parts.append(
            Text(f"{len(audit.suppressed)} findings silenced by the policy's ignore entries:", style="dim")
        )
        parts += [
            Text(
                f"  {s.finding.rule} on {s.finding.layer or 'the checkpoint'}: "
                f"{s.finding.message} (ignored for layers {s.layers!r}: {s.reason})",
                style="dim",
            )
            for s in audit.suppressed[:MAX_SHOWN]
        ]
    if audit.layers:
        health = titled_table(
            "layer health",
            (
                "layer",
                "kind",
                "units",
                "fan-in norm min",
                "median",
                "max",
                "distribution",
                "dead",
                "twins",
                "unsupported",
            ),
            right=("units", "fan-in norm min", "median", "max", "dead", "twins", "unsupported"),
        )
        for row in audit.layers:
            low, mid, high = row.fan_in_norm
            share = "—" if row.unsupported_share is None else f"{100 * row.unsupported_share:.2g}%"
            health.add_row(
                str(row.layer["name"]),
                str(row.layer["kind"]),
                human_count(int(row.layer["units"])),
                _number(low),
                _number(mid),
                _number(high),
                spark(row.norm_histogram),
                str(row.dead or "—"),
                str(row.twins or "—"),
                share,
            )
        parts += [Text(""), health]
    uncovered = audit.coverage.uncovered if audit.coverage is not None else ()
    if uncovered:
        shown = ", ".join(f"{u.name} {list(u.shape)}" for u in uncovered[:_UNCOVERED_SHOWN])
        more = (
            f" and {len(uncovered) - _UNCOVERED_SHOWN:,} more (--format json lists them all)"
            if len(uncovered) > _UNCOVERED_SHOWN
            else ""
        )
        parts.append(Text(f"in no layer: {shown}{more}", style="dim"))
    parts += [Text(f"note: {note}", style="dim") for note in audit.notes]
    return parts


def _summary(report: Report) -> list[RenderableType]:
    """The run's last word: one row per checkpoint, every failure named."""
    table = titled_table(
        "summary", ("checkpoint", "verdict", "errors", "warnings", "coverage"),
        right=("errors", "warnings", "coverage"),
    )
    rows: list[tuple[str, Text, str, str, str]] = []
    for audit in report.audits:
        counts = audit.counts()
        failing = audit.failing(report.gate)
        verdict = (
            Text("report", style="bold")
            if report.gate is None
            else Text("FAIL", style="bold red")
            if failing
            else Text("PASS", style="bold green")
        )
        share = "—" if audit.coverage is None else f"{100 * audit.coverage.share:.1f}%"
        rows.append(
            (str(audit.checkpoint["path"]), verdict, f"{counts['error']:,}", f"{counts['warning']:,}", share)
        )
    rows += [(e.path, Text("UNREADABLE", style="bold red"), "—", "—", "—") for e in report.errors]
    for row in sorted(rows, key=lambda r: r[0]):
        table.add_row(*row)
    return [Text(""), table]


def _inputs(report: Report) -> list[RenderableType]:
    parts: list[RenderableType] = []
    for error in report.errors:
        parts.append(Text.assemble(("unreadable ", "bold red"), error.line))
    for skipped in report.skipped:
        parts.append(Text(f"skipped {skipped.path}: {skipped.reason}", style="dim"))
    parts += [Text(f"note: {note}", style="dim") for note in report.notes]
    parts += [Text(f"policy: {note}", style="yellow") for note in report.policy_notes]
    return parts


def render_table(report: Report, *, color: bool = False, width: int = 120) -> str:
    """The whole terminal report."""
    report = shown_deep(report)  # names from files: escaped, one line each
    parts: list[RenderableType] = []
    for index, audit in enumerate(report.audits):
        if index:
            parts.append(Text("─" * min(width, 100), style="dim"))
        parts.extend(_audit(report, audit))
    inputs = _inputs(report)
    if inputs:
        parts += [Text(""), *inputs]
    if len(report.audits) + len(report.errors) > 1:
        verdict = "PASS" if report.passed else "FAIL"
        unreadable = f", {len(report.errors)} unreadable" if report.errors else ""
        parts += _summary(report)
        parts.append(
            Text.assemble(
                ("overall ", "bold"),
                (verdict, "bold green" if report.passed else "bold red"),
                f" over {len(report.audits)} checkpoints audited{unreadable}",
            )
        )
    elif report.errors or not report.audits:
        parts.append(Text.assemble(("overall ", "bold"), ("FAIL", "bold red"), ": nothing audited"))
    parts += [Text(""), Text(CAUTION, style="italic")]
    return to_text([Group(*parts)], color=color, width=width)


__all__ = ["human_bytes", "render_table", "spark"]
