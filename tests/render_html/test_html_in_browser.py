"""The HTML reports in a real browser: Debian's chromium, driven headless by Playwright.

Every page is opened with the network cut off (any request that is not the file itself is
aborted and recorded), so "self-contained" is checked by the browser, not by reading markup.
Without chromium these tests skip, unless STEELYARD_REQUIRE_BROWSER is set (CI sets it, so a
missing browser fails CI instead of passing it silently).
"""

from __future__ import annotations

import os
import shutil
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

import steelyard
from tests.render_html._pages import audit_html, compare_pair, deep_mlp, hostile_model

playwright_api = pytest.importorskip("playwright.sync_api")
pytest.importorskip("vl_convert")

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")


@pytest.fixture(scope="module")
def browser() -> Iterator[Any]:
    if CHROMIUM is None:
        if os.environ.get("STEELYARD_REQUIRE_BROWSER"):
            pytest.fail("STEELYARD_REQUIRE_BROWSER is set but no chromium is installed")
        pytest.skip("no chromium on this machine (apt-get install chromium)")
    with playwright_api.sync_playwright() as driver:
        launched = driver.chromium.launch(executable_path=CHROMIUM, args=["--no-sandbox"])
        yield launched
        launched.close()


class Opened:
    """A page loaded from a file with every other request refused and recorded."""

    def __init__(self, browser: Any, path: Path, javascript: bool = True) -> None:
        self.context = browser.new_context(java_script_enabled=javascript, viewport={"width": 1280, "height": 900})
        self.page = self.context.new_page()
        self.fetched: list[str] = []
        self.errors: list[str] = []
        self.dialogs: list[str] = []
        url = path.resolve().as_uri()

        def route(request_route: Any) -> None:
            if request_route.request.url == url:
                request_route.continue_()
            else:
                self.fetched.append(request_route.request.url)
                request_route.abort()

        self.page.route("**/*", route)
        self.page.on("pageerror", lambda error: self.errors.append(str(error)))
        self.page.on("console", lambda msg: self.errors.append(msg.text) if msg.type in ("error", "warning") else None)
        self.page.on("dialog", lambda dialog: (self.dialogs.append(dialog.message), dialog.dismiss()))
        self.page.goto(url)
        if javascript:
            self.page.wait_for_function(
                "Array.from(document.querySelectorAll('[data-chart]')).every(n => n.dataset.drawn)",
                timeout=30_000,
            )

    def close(self) -> None:
        self.context.close()


#: Where the screenshots for review go (CI keeps the folder as an artifact).
ARTIFACTS = Path(os.environ.get("STEELYARD_ARTIFACTS", Path(__file__).resolve().parents[2] / ".artifacts" / "html"))


def screenshots(opened: Opened, name: str) -> list[Path]:
    """Full-page screenshots at 1280 and 390 pixels wide (a laptop and a phone), for review;
    the narrow page must not scroll sideways beyond its wide tables."""
    ARTIFACTS.mkdir(parents=True, exist_ok=True)
    shots = []
    for width in (1280, 390):
        opened.page.set_viewport_size({"width": width, "height": 900})
        opened.page.wait_for_timeout(300)  # charts re-fit their container
        target = ARTIFACTS / f"{name}-{width}.png"
        opened.page.screenshot(path=str(target), full_page=True)
        assert target.stat().st_size > 10_000
        shots.append(target)
    return shots


def _write(tmp_path: Path, name: str, text: str) -> Path:
    target = tmp_path / name
    target.write_text(text, encoding="utf-8")
    return target


def test_audit_page_draws_every_chart_offline(browser: Any, tmp_path: Path) -> None:
    page_file = _write(tmp_path, "audit.html", audit_html(deep_mlp(tmp_path / "m.safetensors", depth=30)))
    opened = Opened(browser, page_file)
    try:
        page = opened.page
        charts = page.query_selector_all("[data-chart]")
        assert len(charts) >= 2
        assert all(c.get_attribute("data-drawn") == "yes" for c in charts)
        # The spread chart draws one box per layer (Vega renders marks as SVG paths).
        boxes = page.eval_on_selector("[data-chart$='spread']", "n => n.querySelectorAll('g.boxes_marks path').length")
        assert boxes == 30
        assert opened.fetched == [] and opened.errors == []
        screenshots(opened, "audit-deep-mlp")
    finally:
        opened.close()


def test_hovering_a_layer_shows_its_numbers(browser: Any, tmp_path: Path) -> None:
    page_file = _write(tmp_path, "audit.html", audit_html(deep_mlp(tmp_path / "m.safetensors", depth=12)))
    opened = Opened(browser, page_file)
    try:
        page = opened.page
        box = page.query_selector_all("[data-chart$='spread'] g.boxes_marks path")[9]  # fc10, in depth order
        size = box.bounding_box()
        box.hover(position={"x": size["width"] / 2, "y": 1})  # clear of the median line
        tooltip = page.wait_for_selector("#vg-tooltip-element.visible", timeout=5_000)
        text = tooltip.inner_text()
        assert "fc10" in text and "median" in text
    finally:
        opened.close()


def test_findings_filter_by_severity_rule_and_text(browser: Any, tmp_path: Path) -> None:
    page_file = _write(tmp_path, "audit.html", audit_html(Path("fixtures/demo/pumpwear-nightly-bad.safetensors")))
    opened = Opened(browser, page_file)
    try:
        page = opened.page
        rows = page.locator("tr.finding")
        total = rows.count()
        visible = lambda: sum(1 for i in range(total) if rows.nth(i).is_visible())  # noqa: E731
        errors = page.locator("tr.finding[data-severity=error]").count()
        assert total > errors > 0
        page.uncheck("form.filters input[value=warning]")
        page.uncheck("form.filters input[value=info]")
        assert visible() == errors
        page.check("form.filters input[value=warning]")
        page.select_option("form.filters select[name=rule]", "dead-unit")
        assert visible() == page.locator("tr.finding[data-rule=dead-unit]").count() >= 1
        page.select_option("form.filters select[name=rule]", "")
        page.fill("form.filters input[name=text]", "fc3")
        assert visible() == sum(1 for i in range(total) if "fc3" in rows.nth(i).inner_text())
        assert "of" in page.inner_text(".shown-count")
    finally:
        opened.close()


def test_page_reads_without_javascript(browser: Any, tmp_path: Path) -> None:
    page_file = _write(tmp_path, "audit.html", audit_html(Path("fixtures/demo/pumpwear-nightly-bad.safetensors")))
    opened = Opened(browser, page_file, javascript=False)
    try:
        page = opened.page
        rows = page.locator("tr.finding")
        assert rows.count() >= 1 and all(rows.nth(i).is_visible() for i in range(rows.count()))
        assert not page.locator("form.filters").is_visible()  # controls that need scripts stay hidden
        assert page.locator("table").nth(1).is_visible()  # the layer table
    finally:
        opened.close()


def test_hostile_names_run_no_script(browser: Any, tmp_path: Path) -> None:
    page_file = _write(tmp_path, "hostile.html", audit_html(hostile_model(tmp_path / "h.safetensors")))
    opened = Opened(browser, page_file)
    try:
        page = opened.page
        assert page.evaluate("window.__pwned === undefined")
        assert opened.dialogs == [] and opened.fetched == []
        shown = page.inner_text("main")
        assert "<img src=x" in shown and "</script><script>" in shown  # shown as text, not run
        assert page.locator("main img").count() == 0
    finally:
        opened.close()


def test_prints_to_pdf_without_controls(browser: Any, tmp_path: Path) -> None:
    page_file = _write(tmp_path, "audit.html", audit_html(Path("fixtures/demo/pumpwear-nightly-bad.safetensors")))
    opened = Opened(browser, page_file)
    try:
        page = opened.page
        page.emulate_media(media="print")
        assert not page.locator("form.filters").is_visible()
        pdf = page.pdf(format="A4")
        assert pdf.startswith(b"%PDF-") and len(pdf) > 20_000
    finally:
        opened.close()


def test_compare_page_draws_offline(browser: Any, tmp_path: Path) -> None:
    old, new = compare_pair(tmp_path)
    page_file = _write(tmp_path, "compare.html", steelyard.compare(old, new).render("html"))
    opened = Opened(browser, page_file)
    try:
        page = opened.page
        charts = page.query_selector_all("[data-chart]")
        assert len(charts) == 3 and all(c.get_attribute("data-drawn") == "yes" for c in charts)
        assert opened.fetched == [] and opened.errors == []
        assert page.locator("tr#layer-0").inner_text().startswith("0")
        screenshots(opened, "compare")
    finally:
        opened.close()


def test_timeline_page_draws_offline(browser: Any, tmp_path: Path) -> None:
    timeline = steelyard.timeline([Path("fixtures/timeline_run")])
    page_file = _write(tmp_path, "timeline.html", timeline.render("html"))
    opened = Opened(browser, page_file)
    try:
        charts = opened.page.query_selector_all("[data-chart]")
        assert len(charts) >= 5 and all(c.get_attribute("data-drawn") == "yes" for c in charts)
        assert opened.fetched == [] and opened.errors == []
    finally:
        opened.close()


def test_heads_map_draws_a_head_whose_circuit_is_zero(browser: Any, tmp_path: Path) -> None:
    """The Keras fixture's idle head has an all-zero output-value circuit (share 0 of its
    block's median, which a log colour scale cannot place): the map still draws one cell per
    head of both attention blocks (4 + 4), with no console error."""
    page_file = _write(tmp_path, "heads.html", audit_html(Path("fixtures/keras_heads/planted.keras")))
    opened = Opened(browser, page_file)
    try:
        chart = "[data-chart$='parts']"
        assert opened.page.get_attribute(chart, "data-drawn") == "yes"
        cells = opened.page.eval_on_selector(chart, "n => n.querySelectorAll('g.mark-rect.role-mark path').length")
        assert cells == 8
        assert opened.fetched == [] and opened.errors == []
        screenshots(opened, "audit-keras-heads")
    finally:
        opened.close()
