"""The terminal audit report: header, verdict, ranked findings, layer health, caution."""

from __future__ import annotations

import math

from rich.console import Group, RenderableType
from rich.table import Table
from rich.text import Text

from steelyard.findings import Finding, Severity, compact_units
from steelyard.render.text import human_bytes, human_count, titled_table, to_text
from steelyard.report import CAUTION, CheckpointAudit, Report
from steelyard.rules import registry

_STYLE = {Severity.ERROR: "bold red", Severity.WARNING: "yellow", Severity.INFO: "cyan"}
_BARS = "▁▂▃▄▅▆▇█"
#: Findings shown in full in the terminal; the rest are counted (JSON has them all).
MAX_SHOWN = 40


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
                compact_units(finding.units, limit=6),
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
    if audit.ignored:
        parts.append(
            Text(f"{audit.ignored} findings silenced by the policy's ignore entries", style="dim")
        )
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
    parts += [Text(f"note: {note}", style="dim") for note in audit.notes]
    return parts


def render_table(report: Report, *, color: bool = False, width: int = 120) -> str:
    """The whole terminal report."""
    parts: list[RenderableType] = []
    for index, audit in enumerate(report.audits):
        if index:
            parts.append(Text("─" * min(width, 100), style="dim"))
        parts.extend(_audit(report, audit))
    if len(report.audits) > 1:
        verdict = "PASS" if report.passed else "FAIL"
        parts.append(
            Text.assemble(
                ("overall ", "bold"),
                (verdict, "bold green" if report.passed else "bold red"),
                f" over {len(report.audits)} checkpoints",
            )
        )
    parts += [Text(""), Text(CAUTION, style="italic")]
    return to_text([Group(*parts)], color=color, width=width)


__all__ = ["human_bytes", "render_table", "spark"]
