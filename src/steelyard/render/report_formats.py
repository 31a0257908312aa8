"""One table of the audit report's formats, for the CLI's ``--format`` and ``Report.render``."""

from __future__ import annotations

import importlib
from types import ModuleType

from steelyard.errors import SteelyardError
from steelyard.report import Report

#: The names ``steelyard audit --format`` and ``Report.render`` accept.
AUDIT_FORMATS = ("table", "json", "markdown", "sarif", "junit", "html")


def html_renderers() -> ModuleType:
    """The HTML renderers, or one clear error when the ``html`` extra is not installed."""
    try:
        import steelyard.render.html as html
    except ImportError as exc:
        raise SteelyardError(
            f"HTML reports need the html extra ({exc.name} is not installed): "
            "pip install 'steelyard[html]'"
        ) from None
    return html


#: Each document format's renderer (module under steelyard.render, function of a Report):
#: only the one asked for is imported, so a JSON report never imports rich.
_DOCUMENTS = {
    "json": ("json_report", "render_json"),
    "markdown": ("markdown", "render_markdown"),
    "sarif": ("sarif", "render_sarif"),
    "junit": ("junit", "render_junit"),
}


def render_report(report: Report, format: str, *, color: bool = False, width: int = 120) -> str:
    """``report`` in ``format`` (one of :data:`AUDIT_FORMATS`); ``color`` and ``width`` only
    shape the table. Raises ``ValueError`` for another name."""
    if format not in AUDIT_FORMATS:
        raise ValueError(f"unknown format {format!r}: one of {', '.join(AUDIT_FORMATS)}")
    if format == "table":
        from steelyard.render.table_report import render_table

        return render_table(report, color=color, width=width)
    if format == "html":
        page: str = html_renderers().render_audit_html(report)
        return page
    module, function = _DOCUMENTS[format]
    text: str = getattr(importlib.import_module(f"steelyard.render.{module}"), function)(report)
    return text
