"""Markdown, SARIF and JUnit for ``steelyard compare``.

SARIF and JUnit reuse the audit renderers through a small adapter: the comparison becomes an
audit :class:`~steelyard.report.Report` of NEW whose findings are the gated ones and whose
baselined findings are those already present in OLD; the comparison rules are then added to
SARIF's rules table and to JUnit's test cases, which the audit renderers build from the audit
registry only. Markdown has its own short body: verdict, layer changes, findings, caution.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

from steelyard.comparison.report import CompareReport, LayerDiff, Status
from steelyard.ranking import rank
from steelyard.render.compare_table import coverage_line, number, overview, rank_cell
from steelyard.render.json_report import _clean
from steelyard.render.markdown import _cell, _rows, top_then_rest
from steelyard.report import CAUTION, CheckpointAudit, LayerHealth, Report
from steelyard.rules import Command, registry
from steelyard.text_safety import shown_deep


def as_audit_report(report: CompareReport) -> Report:
    """The comparison as an audit report of NEW (present-in-OLD findings as baselined)."""
    comparison = report.comparison
    seen: set[str] = set()
    layers: list[LayerHealth] = []
    for diff in comparison.layers:
        block = diff.new_layer or diff.old_layer
        if block is None or diff.name in seen:
            continue
        seen.add(diff.name)
        norms = diff.fan_in_norm_new or diff.fan_in_norm_old or (float("nan"),) * 3
        layers.append(
            LayerHealth(
                layer={**block, "name": diff.name},
                fan_in_norm=norms,
                norm_histogram=(),
                dead=0,
                twins=0,
                unsupported_share=None,
            )
        )
    audit = CheckpointAudit(
        checkpoint=comparison.new,
        layers=tuple(layers),
        findings=rank(comparison.gated),
        gradient_source=None,
        notes=comparison.notes,
        ignored=comparison.ignored,
        baselined=comparison.audit_present,
    )
    return Report(
        tool_version=report.tool_version,
        created=report.created,
        fail_on=report.fail_on,
        policy_source=report.policy_source,
        audits=(audit,),
        baseline={
            "path": str(comparison.old.get("path", "")),
            "matched": len(comparison.audit_present),
            "fixed": [],
        },
    )


# ---- SARIF --------------------------------------------------------------------------------
def render_compare_sarif(report: CompareReport) -> str:
    """SARIF 2.1.0: the audit's log of NEW plus the comparison rules in the rules table."""
    from steelyard.render import sarif

    log = sarif.sarif_log(as_audit_report(report), Command.COMPARE)
    comparison = report.comparison
    log["runs"][0]["properties"]["compare"] = _clean(
        {"old": dict(comparison.old), "new": dict(comparison.new), "layers": comparison.statuses()}
    )
    return sarif.dump(log)


# ---- JUnit --------------------------------------------------------------------------------
def render_compare_junit(report: CompareReport) -> str:
    """JUnit XML: the audit's suite for NEW plus one test case per comparison rule and layer."""
    from steelyard.render import junit

    report = shown_deep(report)  # names from files: escaped (XML forbids most controls)
    root = junit.junit_tree(as_audit_report(report))
    suite = root.find("testsuite")
    assert suite is not None
    comparison = report.comparison
    path = str(comparison.new.get("path", ""))
    names = list(dict.fromkeys(d.name for d in comparison.layers))
    tests, failures = junit.add_rule_cases(
        suite,
        registry(Command.COMPARE),
        names,
        comparison.findings,
        report.gate,
        path,
        classname_prefix="compare.",
    )
    for node in (suite, root):
        node.set("tests", str(int(node.get("tests", "0")) + tests))
        node.set("failures", str(int(node.get("failures", "0")) + failures))
    return junit.dump(root)


# ---- Markdown -----------------------------------------------------------------------------
def _layer_rows(layers: Sequence[LayerDiff]) -> list[str]:
    stored = any(d.stored_old != d.stored_new for d in layers)
    ranked = any(d.update_rank is not None or d.update_rank_above for d in layers)
    head = ["layer", "status", "relative change", "cosine"]
    head += ["stored", "max abs change"] if stored else []
    head += ["update rank"] if ranked else []
    head += ["died", "revived"]
    lines = ["| " + " | ".join(head) + " |", "|" + " --- |" * len(head)]
    for diff in layers:
        status = diff.status.value
        if diff.permuted:
            status += " (permuted)"
        elif diff.precision_only:
            status += f" ({diff.precision or 'precision'} rounding)"
        cells = [f"`{_cell(diff.name)}`", status, number(diff.relative_change), number(diff.cosine)]
        if stored:
            cells += [f"{diff.stored_old or '—'} → {diff.stored_new or '—'}", number(diff.max_abs_change)]
        if ranked:
            cells.append(rank_cell(diff))
        cells += [str(len(diff.units_died) or "—"), str(len(diff.units_revived) or "—")]
        lines.append("| " + " | ".join(cells) + " |")
    return lines


def render_compare_markdown(report: CompareReport) -> str:
    """A pull-request comment body."""
    report = shown_deep(report)  # names from files: escaped, one line each
    comparison = report.comparison
    if report.gate is None:
        verdict = "⚪ report only"
    else:
        verdict = "❌ failed" if comparison.failing(report.gate) else "✅ passed"
    counts = comparison.counts()
    old, new = comparison.old, comparison.new
    lines = [
        f"## steelyard compare: {verdict}",
        "",
        f"`{_cell(str(old['path']))}` ({old['format']}) → `{_cell(str(new['path']))}` ({new['format']})",
        "",
        f"**{counts['error']}** errors, **{counts['warning']}** warnings, **{counts['info']}** info "
        f"(gate: `--fail-on {report.fail_on}`).",
        "",
        overview(report) + ".",
        "",
    ]
    line = coverage_line(report)
    if line:
        lines += [line[0].upper() + line[1:] + ".", ""]
    if comparison.audit_present:
        lines += [
            f"{len(comparison.audit_present)} audit findings of NEW were already present in OLD (not gated).",
            "",
        ]
    moved = [
        d
        for d in comparison.layers
        if d.status is not Status.SAME or d.permuted or d.precision_only
    ]
    if moved:
        lines += [*top_then_rest(moved, _layer_rows, "layers"), ""]
    else:
        lines += ["Every layer is identical.", ""]
    gated = rank(comparison.gated)
    if gated:
        lines += top_then_rest(gated, _rows, "findings")
    else:
        lines.append("No findings.")
    if comparison.notes:
        lines += ["", *(f"- note: {_cell(n)}" for n in comparison.notes)]
    lines += [
        "",
        f"_{CAUTION}_",
        "",
        f"<sub>steelyard {report.tool_version}, policy: {report.policy_source}</sub>",
        "",
    ]
    return "\n".join(lines)


#: The names ``steelyard compare --format`` and ``CompareReport.render`` accept.
COMPARE_FORMATS = ("table", "json", "markdown", "sarif", "junit", "html")


def render_comparison(
    report: CompareReport, format: str, *, color: bool = False, width: int = 120
) -> str:
    """``report`` in ``format`` (one of :data:`COMPARE_FORMATS`); ``color`` and ``width``
    only shape the table. Raises ``ValueError`` for another name."""
    from steelyard.render.compare_table import render_compare_table
    from steelyard.render.report_formats import html_renderers

    renderers: dict[str, Callable[[], str]] = {
        "table": lambda: render_compare_table(report, color=color, width=width),
        "json": report.to_json,
        "markdown": lambda: render_compare_markdown(report),
        "sarif": lambda: render_compare_sarif(report),
        "junit": lambda: render_compare_junit(report),
        "html": lambda: html_renderers().render_compare_html(report),
    }
    if format not in renderers:
        raise ValueError(f"unknown format {format!r}: one of {', '.join(COMPARE_FORMATS)}")
    return renderers[format]()
