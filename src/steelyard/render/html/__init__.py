"""Self-contained HTML reports: the audit (one or many checkpoints), the comparison and the
timeline of a training run.

One file per report, with styles, scripts, chart runtime and data inline, so it opens offline
and can be attached to a review. Built from the report objects alone, like every renderer.
Needs the ``html`` extra (Jinja2 and vl-convert-python), imported only when a report is drawn.
"""

from steelyard.render.html.audit_page import render_audit_html
from steelyard.render.html.compare_page import render_compare_html
from steelyard.render.html.timeline_page import render_timeline_html

__all__ = ["render_audit_html", "render_compare_html", "render_timeline_html"]
