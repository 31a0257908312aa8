"""The page machinery shared by the HTML reports: the template environment (autoescaping every
value that comes from a file), number formats, and the inline scripts and styles.

Templates, styles and the page script live beside this module in ``templates/``; the chart
runtime comes from :mod:`steelyard.render.html.bundle`.
"""

from __future__ import annotations

import json
import math
from functools import lru_cache
from importlib import resources
from typing import TYPE_CHECKING, Any, Protocol

from markupsafe import Markup, escape

from steelyard.findings import FailOn, Finding, units_cell
from steelyard.render.html.bundle import chart_runtime
from steelyard.report import CAUTION

if TYPE_CHECKING:
    import jinja2

#: Characters after which a long layer or file name may wrap (never inside a word).
_BREAK_AFTER = "./_-:"


def number(value: Any, digits: int = 4) -> str:
    """One format for every number: integers with thousands separators, other values to
    ``digits`` significant figures (thousands separators above 10,000), "—" when unknown."""
    if value is None:
        return "—"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return f"{value:,}"
    if isinstance(value, float):
        if math.isnan(value):
            return "—"
        if math.isinf(value):
            return "∞" if value > 0 else "−∞"
        if 1e4 <= abs(value) < 1e15:
            return f"{value:,.0f}"
        return f"{value:.{digits}g}"
    return str(value)


def breakable(text: str) -> Markup:
    """``text`` escaped, with a line-break opportunity after each separator."""
    out = "".join(
        f"{escape(ch)}<wbr>" if ch in _BREAK_AFTER else str(escape(ch)) for ch in str(text)
    )
    return Markup(out)


def script_json(value: Any) -> Markup:
    """JSON that can sit inside a ``<script>`` element: no ``<``, ``>`` or ``&`` survive as
    such, so no value from a file can close the element or start markup."""
    text = json.dumps(value, allow_nan=False, separators=(",", ":"), ensure_ascii=False)
    text = text.replace("<", "\\u003c").replace(">", "\\u003e").replace("&", "\\u0026")
    return Markup(text.replace("\u2028", "\\u2028").replace("\u2029", "\\u2029"))


def sparkline(histogram: tuple[int, ...] | list[int]) -> Markup:
    """A tiny bar drawing of a layer's norm histogram (units per log-spaced bin)."""
    if not histogram or max(histogram) == 0:
        return Markup("")
    top = max(histogram)
    bars = "".join(
        f'<rect x="{i * 6}" y="{16 - h:.1f}" width="5" height="{h:.1f}"><title>{c:,} units</title></rect>'
        for i, c in enumerate(histogram)
        for h in [max(1.0, 16 * c / top) if c else 0.0]
    )
    width = 6 * len(histogram)
    return Markup(
        f'<svg class="spark" width="{width}" height="16" viewBox="0 0 {width} 16" '
        f'role="img" aria-label="units per norm bin: {", ".join(map(str, histogram))}">{bars}</svg>'
    )


def _pretty(evidence: Any) -> str:
    return json.dumps(evidence, indent=1, sort_keys=True, default=str, allow_nan=True)


def _units(finding: Finding) -> str:
    return units_cell(finding, limit=8)


@lru_cache(maxsize=1)
def environment() -> jinja2.Environment:
    """The template environment: autoescaping on, undefined names are errors."""
    import jinja2

    env = jinja2.Environment(
        loader=jinja2.PackageLoader("steelyard.render.html", "templates"),
        autoescape=True,
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
    )
    env.filters.update(
        num=number, breakable=breakable, script_json=script_json, sparkline=sparkline,
        pretty=_pretty, units=_units,
    )
    return env


def _asset(name: str) -> str:
    return (resources.files("steelyard.render.html") / "templates" / name).read_text(encoding="utf-8")


def render_page(template: str, specs: list[tuple[str, dict[str, Any]]], **context: Any) -> str:
    """Fill ``template`` with ``context``, the chart specifications and the inline assets."""
    return environment().get_template(template).render(
        css=Markup(_asset("style.css")),
        page_js=_asset("page.js"),
        runtime=chart_runtime(),
        caution=CAUTION,
        specs=specs,
        **context,
    )


class _Run(Protocol):
    """What every report (audit, comparison, timeline) says about its run."""

    @property
    def tool_version(self) -> str: ...
    @property
    def created(self) -> str: ...
    @property
    def policy_source(self) -> str: ...
    @property
    def fail_on(self) -> str: ...
    @property
    def passed(self) -> bool: ...


def masthead(run: _Run, gate_off: bool) -> dict[str, Any]:
    """The page header's values: version, time, policy, the gate in words and the verdict
    badge (``report only`` when ``gate_off``, else pass or fail)."""
    return {
        "version": run.tool_version,
        "created": run.created,
        "policy_source": run.policy_source,
        "gate_text": gate_text(run.fail_on),
        "verdict": verdict(gate_off, not run.passed),
    }


def verdict(gate_off: bool, failed: bool) -> dict[str, str]:
    """The verdict badge: its words and its style class."""
    if gate_off:
        return {"text": "report only", "css": "report-only"}
    return {"text": "fail", "css": "fail"} if failed else {"text": "pass", "css": "pass"}


def gate_text(fail_on: str) -> str:
    """The gate in words for the masthead."""
    threshold = FailOn(fail_on).threshold
    return "gate off" if threshold is None else f"fails on {threshold.value} and above"
