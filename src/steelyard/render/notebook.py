"""A report's rich display in a notebook (``Report._repr_html_``): the verdict, the counts and
the ten worst findings as a small HTML table, every value from the files escaped. The full
report stays one ``report.render(...)`` away."""

from __future__ import annotations

from html import escape

from steelyard.findings import severity_counts
from steelyard.report import CAUTION, Report

_TOP = 10


def render_notebook_html(report: Report) -> str:
    """The HTML fragment a notebook shows for ``report``."""
    findings = report.findings
    counts = severity_counts(findings)
    verdict = "PASS" if report.passed else "FAIL"
    colour = "#1a7f37" if report.passed else "#b3261e"
    gate = "gate off" if report.gate is None else f"fails on {report.gate.value} and above"
    rows = "".join(
        "<tr>"
        f"<td>{escape(f.severity.value)}</td><td>{escape(f.rule)}</td>"
        f"<td>{escape(f.layer or '(checkpoint)')}</td><td>{escape(f.message)}</td>"
        "</tr>"
        for f in findings[:_TOP]
    )
    more = len(findings) - _TOP
    tail = f"<p>… and {more:,} more: <code>report.render('table')</code></p>" if more > 0 else ""
    table = (
        "<table><thead><tr><th>severity</th><th>rule</th><th>layer</th><th>finding</th></tr>"
        f"</thead><tbody>{rows}</tbody></table>"
        if rows
        else ""
    )
    return (
        '<div class="steelyard-report">'
        f'<p><b style="color:{colour}">{verdict}</b> ({escape(gate)}): '
        f"{len(report.audits):,} checkpoint(s) audited, {len(report.errors):,} unreadable; "
        f"{counts['error']:,} errors, {counts['warning']:,} warnings, {counts['info']:,} info</p>"
        f"{table}{tail}<p><i>{escape(CAUTION)}</i></p></div>"
    )
