"""Markdown for a pull-request comment: verdict, counts, top findings, the rest collapsed."""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import TypeVar

from steelyard.coverage import describe
from steelyard.findings import Finding, units_cell
from steelyard.report import CAUTION, CheckpointAudit, Report
from steelyard.text_safety import shown_deep

#: Findings shown in the main table; the rest go in a collapsible block.
TOP = 10

_Item = TypeVar("_Item")


def _cell(text: str) -> str:
    return text.replace("|", "\\|").replace("\n", " ")


def _rows(findings: Sequence[Finding]) -> list[str]:
    lines = ["| severity | rule | layer | units | finding |", "| --- | --- | --- | --- | --- |"]
    for finding in findings:
        lines.append(
            f"| {finding.severity.value} | `{finding.rule}` | `{_cell(finding.layer or '—')}` | "
            f"{_cell(units_cell(finding, limit=6))} | {_cell(finding.message)} |"
        )
    return lines


def collapsed(summary: str, body: list[str]) -> list[str]:
    """``body`` inside a block that shows only ``summary`` until opened (GitHub renders
    ``<details>``; the blank lines let the Markdown inside it render)."""
    return [f"<details><summary>{summary}</summary>", "", *body, "", "</details>"]


def top_then_rest(
    items: Sequence[_Item], rows: Callable[[Sequence[_Item]], list[str]], what: str
) -> list[str]:
    """The table ``rows`` makes of the first :data:`TOP` ``items``, and the rest, if any,
    in a collapsed table after it ("12 more ``what``")."""
    lines = rows(items[:TOP])
    if len(items) > TOP:
        lines += ["", *collapsed(f"{len(items) - TOP} more {what}", rows(items[TOP:]))]
    return lines


def _audit(report: Report, audit: CheckpointAudit) -> list[str]:
    counts = audit.counts()
    failing = audit.failing(report.gate)
    verdict = (
        "⚪ report only" if report.gate is None else ("❌ **fail**" if failing else "✅ **pass**")
    )
    block = audit.checkpoint
    lines = [
        f"### `{block['path']}`: {verdict}",
        "",
        f"{block['format']}, {int(block['parameters']):,} parameters, {len(audit.layers)} layers; "
        f"gradient support: {audit.gradient_source or 'none'}.",
        "",
        *([f"Coverage: {describe(audit.coverage)}.", ""] if audit.coverage is not None else []),
        f"**{counts['error']}** errors, **{counts['warning']}** warnings, **{counts['info']}** info "
        f"(gate: `--fail-on {report.fail_on}`).",
        "",
    ]
    if audit.baselined:
        lines += [f"{len(audit.baselined)} findings matched the baseline.", ""]
    if audit.findings:
        lines += top_then_rest(audit.findings, _rows, "findings")
    else:
        lines.append("No findings.")
    lines.append("")
    if audit.suppressed:
        ignored = [
            f"- `{s.finding.rule}` on `{_cell(s.finding.layer or '—')}`: {_cell(s.finding.message)} "
            f"(ignored for layers `{_cell(s.layers)}`: {_cell(s.reason)})"
            for s in audit.suppressed
        ]
        lines += [*collapsed(f"{len(audit.suppressed)} findings ignored by the policy", ignored), ""]
    uncovered = audit.coverage.uncovered if audit.coverage is not None else ()
    if uncovered:
        tensors = [f"- `{_cell(u.name)}` {list(u.shape)}, {u.parameters:,} parameters" for u in uncovered]
        lines += [*collapsed(f"{len(uncovered)} tensors in no layer", tensors), ""]
    if audit.notes:
        lines += [f"- note: {_cell(note)}" for note in audit.notes] + [""]
    return lines


def _inputs(report: Report) -> list[str]:
    lines: list[str] = []
    if report.errors:
        lines += [f"### ❌ {len(report.errors)} checkpoints could not be read", ""]
        lines += [f"- `{_cell(e.path)}`: {_cell(e.reason)}" for e in report.errors] + [""]
    if report.skipped:
        skipped = [f"- `{_cell(s.path)}`: {_cell(s.reason)}" for s in report.skipped]
        lines += [*collapsed(f"{len(report.skipped)} files skipped", skipped), ""]
    lines += [f"- {_cell(n)}" for n in (*report.notes, *report.policy_notes)]
    if report.notes or report.policy_notes:
        lines.append("")
    return lines


def render_markdown(report: Report) -> str:
    """The comment body."""
    report = shown_deep(report)  # names from files: escaped, one line each
    overall = "✅ passed" if report.passed else "❌ failed"
    if report.gate is None:
        overall = "⚪ report only"
    lines = [f"## steelyard weight audit: {overall}", ""]
    for audit in report.audits:
        lines += _audit(report, audit)
    lines += _inputs(report)
    if report.baseline is not None:
        fixed = report.baseline.get("fixed", [])
        lines += [
            f"Baseline `{report.baseline['path']}`: {report.baseline['matched']} matched, {len(fixed)} fixed.",
            "",
        ]
    lines += [
        f"_{CAUTION}_",
        "",
        f"<sub>steelyard {report.tool_version}, policy: {report.policy_source}</sub>",
        "",
    ]
    return "\n".join(lines)
