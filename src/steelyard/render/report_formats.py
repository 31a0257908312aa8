"""One table of the audit report's formats, for the CLI's ``--format`` and ``Report.render``."""

from __future__ import annotations

from collections.abc import Callable
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


def render_report(report: Report, format: str, *, color: bool = False, width: int = 120) -> str:
    """``report`` in ``format`` (one of :data:`AUDIT_FORMATS`); ``color`` and ``width`` only
    shape the table. Raises ``ValueError`` for another name."""
    from steelyard.render.json_report import render_json
    from steelyard.render.junit import render_junit
    from steelyard.render.markdown import render_markdown
    from steelyard.render.sarif import render_sarif
    from steelyard.render.table_report import render_table

    renderers: dict[str, Callable[[], str]] = {
        "table": lambda: render_table(report, color=color, width=width),
        "json": lambda: render_json(report),
        "markdown": lambda: render_markdown(report),
        "sarif": lambda: render_sarif(report),
        "junit": lambda: render_junit(report),
        "html": lambda: html_renderers().render_audit_html(report),
    }
    if format not in renderers:
        raise ValueError(f"unknown format {format!r}: one of {', '.join(AUDIT_FORMATS)}")
    return renderers[format]()
