"""The HTML reports as documents: self-contained, escaped, small, and drawing the numbers the
audit measured. Browser behaviour is in ``test_html_in_browser.py``."""

from __future__ import annotations

import html
import json
import re
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

import steelyard
from steelyard.cli import app
from steelyard.errors import SteelyardError
from steelyard.render.html.charts import SHARE_FLOOR
from steelyard.report import CAUTION
from tests.render_html._pages import (
    HOSTILE_NAMES,
    audit_html,
    compare_pair,
    deep_mlp,
    hostile_model,
)

pytest.importorskip("jinja2")
pytest.importorskip("vl_convert")


def _specs(page: str) -> dict[str, dict[str, object]]:
    found = re.findall(r'<script type="application/json" id="([^"]+)">(.*?)</script>', page, re.S)
    return {spec_id: json.loads(text) for spec_id, text in found}


def test_the_page_fetches_nothing(tmp_path: Path) -> None:
    """Offline by construction: no element points at another resource (HTML 5 fetching
    attributes: src, href on link, srcset, CSS url() and @import)."""
    page = audit_html(deep_mlp(tmp_path / "m.safetensors", depth=12))
    markup = re.sub(r"(<script\b[^>]*>).*?</script>", r"\1</script>", page, flags=re.S)
    assert not re.search(r"<(script|img|iframe|link|source|video|audio)[^>]*\s(src|href|srcset)=", markup, re.I)
    assert not re.search(r"\shref=\"(?!#)", markup)  # links only within the page
    assert "@import" not in page
    assert not re.search(r"url\(\s*['\"]?(https?:)?//", page)
    assert page.startswith("<!doctype html>")
    assert CAUTION in html.unescape(page)  # the usual caution travels with every report


def test_names_from_files_cannot_escape(tmp_path: Path) -> None:
    """Hostile layer names appear only escaped: as text in the tables, as \\u003c in chart data."""
    page = audit_html(hostile_model(tmp_path / "hostile.safetensors"))
    for name in HOSTILE_NAMES:
        assert name not in page
    assert "<img src=x" not in page
    # Only our own script elements: the chart data, the runtime and the page script.
    opened = re.findall(r"<script\b[^>]*>", page)
    assert all(tag in ('<script type="application/json" id="' + i + '">' for i in _specs(page)) or tag == "<script>"
               for tag in opened)
    # The names survive, escaped, in the layer table (HTML-escaped) and in the chart data.
    assert "&lt;img src=x onerror=" in page
    specs = _specs(page)
    layers = [row["layer"] for spec in specs.values() for row in spec.get("datasets", {}).get("layers", [])]
    assert any(name.startswith("</script>") for name in layers)


def test_spread_chart_draws_the_measured_norms(tmp_path: Path) -> None:
    """The chart's percentiles are numpy's percentiles of the row norms of the weights as the
    reference safetensors reader returns them (numpy.percentile, linear interpolation)."""
    from safetensors.numpy import load_file

    path = deep_mlp(tmp_path / "m.safetensors", depth=11, width=48)
    page = audit_html(path)
    rows = _specs(page)["cp0-chart-spread"]["datasets"]["layers"]  # type: ignore[index]
    tensors = load_file(path)
    assert [r["layer"] for r in rows] == [f"fc{i}" for i in range(1, 12)]
    for row in rows:
        norms = np.linalg.norm(tensors[f"{row['layer']}.weight"].astype(np.float64), axis=1)
        expected = np.percentile(norms, [5, 25, 50, 75, 95])
        got = [row["p5"], row["p25"], row["median"], row["p75"], row["p95"]]
        np.testing.assert_allclose(got, expected, rtol=1e-5)
    # Layer 10 has one unit scaled 60×: it is drawn as a far-out unit, with its number.
    outliers = _specs(page)["cp0-chart-spread"]["datasets"]["outliers"]  # type: ignore[index]
    assert {(o["layer"], o["unit"]) for o in outliers} == {("fc10", 3)}


def test_every_chart_is_valid_vega_lite(tmp_path: Path) -> None:
    """Each specification validates against the Vega-Lite v6 JSON schema shipped with altair
    (the schema published by the Vega project)."""
    jsonschema = pytest.importorskip("jsonschema")
    schema_module = pytest.importorskip("altair.vegalite.v6.schema.core")
    schema = schema_module.load_schema()
    old, new = compare_pair(tmp_path)
    pages = [
        audit_html(deep_mlp(tmp_path / "m.safetensors", depth=12), hostile_model(tmp_path / "h.safetensors")),
        steelyard.compare(old, new).render("html"),
        audit_html(Path("fixtures/transformers_heads/moe_decoder")),
    ]
    count = 0
    for page in pages:
        for spec in _specs(page).values():
            jsonschema.validate(spec, schema)
            count += 1
    assert count >= 6


def test_two_hundred_layers_stay_small(tmp_path: Path) -> None:
    """A 200-layer model's report stays well under 3 MB (the chart runtime is about 0.9 MB)."""
    page = audit_html(deep_mlp(tmp_path / "deep.safetensors", depth=200, width=32))
    size = len(page.encode("utf-8"))
    assert size < 1_600_000, size
    exploded = re.findall(r'data-rule="fan-in-norm".*?<a href="#(cp0-layer-\d+)">', page, re.S)
    assert len(exploded) == 20  # one exploded unit in every 10th layer, each linked to its row
    assert page.count('id="cp0-layer-') == 200


def test_multi_checkpoint_run_lists_every_checkpoint_and_unreadable_input(tmp_path: Path) -> None:
    good = deep_mlp(tmp_path / "a.safetensors", depth=3)
    broken = tmp_path / "broken.safetensors"
    broken.write_bytes(b"\x10\x00\x00\x00\x00\x00\x00\x00{not json at all")
    report = steelyard.audit([good, broken])
    page = report.render("html")
    assert "a.safetensors" in page and "broken.safetensors" in page
    assert 'id="unreadable"' in page
    assert '<span class="verdict fail">fail</span>' in page.split("<main>")[0]  # a run with an unreadable input never passes


def test_compare_page_draws_change_along_depth(tmp_path: Path) -> None:
    old, new = compare_pair(tmp_path)
    report = steelyard.compare(old, new)
    page = report.render("html")
    specs = _specs(page)
    rows = specs["change-0"]["data"]["values"]  # type: ignore[index]
    by_layer = {r["layer"]: r for r in rows}
    assert [r["depth"] for r in rows] == sorted(r["depth"] for r in rows)
    assert by_layer["fc3"]["change"] is None  # untouched: no bar on a log axis
    assert by_layer["fc2"]["change"] > 0.1
    assert by_layer["fc1"]["died"] == 1
    assert "change-2" in specs  # a unit died, so the died/revived panel is drawn
    assert "units-died" in page or "units died" in page


def test_cli_infers_html_from_the_ending_and_keeps_the_exit_code(tmp_path: Path) -> None:
    path = deep_mlp(tmp_path / "m.safetensors", depth=10)
    out = tmp_path / "report.html"
    result = CliRunner().invoke(
        app, ["audit", str(path), "--fail-on", "warning", "-o", str(out), "-o", str(tmp_path / "r.json")]
    )
    assert result.exit_code == 1, result.stderr  # the exploded unit's warning fails this gate
    assert out.read_text(encoding="utf-8").startswith("<!doctype html>")
    assert json.loads((tmp_path / "r.json").read_text())["summary"]["warning"] >= 1
    mismatch = CliRunner().invoke(app, ["audit", str(path), "-f", "json", "-o", str(out)])
    assert mismatch.exit_code == 2


def test_missing_extra_is_one_clear_error(monkeypatch: pytest.MonkeyPatch) -> None:
    import builtins

    real_import = builtins.__import__

    def without_vl_convert(name: str, *args: object, **kwargs: object) -> object:
        if name == "vl_convert":
            raise ImportError("No module named 'vl_convert'", name="vl_convert")
        return real_import(name, *args, **kwargs)  # type: ignore[arg-type]

    from steelyard.render.html import bundle

    monkeypatch.setenv("XDG_CACHE_HOME", "/nonexistent-steelyard-cache")
    monkeypatch.setattr(builtins, "__import__", without_vl_convert)
    with pytest.raises(SteelyardError, match=r"steelyard\[html\]"):
        bundle.chart_runtime()


def test_spectrum_chart_places_the_top_singular_value_against_the_edge() -> None:
    """The demo's never-trained layer: the chart's top singular value is numpy's largest
    singular value of the weights (read with the reference safetensors package), and the
    Marchenko–Pastur edge σ(√m + √n) (Marchenko & Pastur 1967) is recomputed here from σ."""
    from safetensors.numpy import load_file

    path = Path("fixtures/demo/pumpwear-nightly-bad.safetensors")
    page = audit_html(path)
    rows = _specs(page)["cp0-chart-spectrum"]["data"]["values"]  # type: ignore[index]
    report = steelyard.audit(path)
    flagged = [f for f in report.findings if f.rule == "untrained-layer"]
    by_layer = {r["layer"]: r for r in rows}
    assert flagged and {f.layer for f in flagged} <= set(by_layer)  # every tested layer is drawn
    assert all(by_layer[str(f.layer)]["verdict"] == "looks untrained" for f in flagged)
    weights = load_file(path)
    for finding in flagged:
        row = by_layer[str(finding.layer)]
        matrix = weights[f"{row['layer']}.weight"].astype(np.float64)
        top = np.linalg.svd(matrix, compute_uv=False)[0]
        assert row["top"] == pytest.approx(top, rel=0.05)  # Lanczos may stop within 5 % of a fluctuation
        m, n = matrix.shape
        # the report keeps six significant digits
        assert row["edge"] == pytest.approx(finding.evidence["sigma"] * (np.sqrt(m) + np.sqrt(n)), rel=1e-5)
        assert row["allowed"] > row["edge"] >= row["top"] * 0.5


def test_timeline_page_draws_the_timelines_numbers(tmp_path: Path) -> None:
    """Every point of the line charts is the value of the steelyard.timeline/1 document of the
    same run (the committed torch-trained run with a planted death and a planted NaN)."""
    timeline = steelyard.timeline([Path("fixtures/timeline_run")])
    document = timeline.to_dict()
    page = timeline.render("html")
    specs = _specs(page)
    steps = [c["step"] for c in document["checkpoints"]]
    medians = {(r["layer"], r["x"]): r["value"] for r in specs["measure-median"]["data"]["values"]}  # type: ignore[index]
    dead = {(r["layer"], r["x"]): r["value"] for r in specs["measure-dead"]["data"]["values"]}  # type: ignore[index]
    for layer in document["layers"]:
        series = layer["series"]
        for i, step in enumerate(steps):
            if not layer["present"][i]:
                continue
            assert medians[(layer["name"], step)] == pytest.approx(series["fan_in_norm_median"][i])
            assert dead[(layer["name"], step)] == series["dead_units"][i]
    cells = specs["presence"]["data"]["values"]  # type: ignore[index]
    died = sorted(c["x"] for c in cells if c["finding"].startswith("dead-unit"))
    assert died[0] == 600  # planted: the first checkpoint where the units are dead (fixtures/timeline_run/planted.json)
    out = tmp_path / "run.html"
    result = CliRunner().invoke(app, ["timeline", "fixtures/timeline_run", "-o", str(out), "--fail-on", "never"])
    assert result.exit_code == 0, result.stderr
    assert out.read_text(encoding="utf-8").startswith("<!doctype html>")
    refused = CliRunner().invoke(app, ["timeline", "fixtures/timeline_run", "-o", str(tmp_path / "run.sarif")])
    assert refused.exit_code == 2 and "writes table, json, html" in refused.stderr


def test_heads_and_experts_map_shows_every_head_and_outlines_the_planted_ones() -> None:
    """The planted Mixtral-style fixture (fixtures/transformers_heads/moe_decoder, planted.json):
    every head and expert of both blocks is drawn with its norm as a share of its block's
    median, and the planted idle head and idle expert are outlined and far below the median."""
    folder = Path("fixtures/transformers_heads/moe_decoder")
    planted = json.loads((folder / "planted.json").read_text())
    page = steelyard.audit(folder / "planted", policy=steelyard.policy.Policy()).render("html")
    rows = _specs(page)["cp0-chart-parts"]["data"]["values"]  # type: ignore[index]
    heads = {(r["block"], r["index"]): r for r in rows if r["kind"] == "head"}
    experts = {(r["block"], r["index"]): r for r in rows if r["kind"] == "expert"}
    assert len(heads) == 8 and len(experts) == 8  # 2 blocks × 4 heads, 2 blocks × 4 experts
    idle_head = heads[(planted["idle_heads"][0]["block"], planted["idle_heads"][0]["head"])]
    assert idle_head["flagged"] and idle_head["share"] < 0.01
    idle_expert = experts[(planted["idle_experts"][0]["block"], planted["idle_experts"][0]["expert"])]
    assert idle_expert["flagged"] and idle_expert["share"] < 0.01
    clean = [r for r in heads.values() if not r["flagged"]]
    assert clean and all(0.5 < r["share"] < 2 for r in clean)


def test_heads_map_outlines_twins_and_colours_an_all_zero_head() -> None:
    """The trained Keras fixture (fixtures/keras_heads, planted.json, written by keras 3 through
    fixtures/gen_keras_heads.py): its idle head's output columns are exactly zero, so its share
    of the block median is 0, which a logarithmic colour scale cannot place; the map colours it
    at the floor and keeps the true 0 for its tooltip. Twin findings name two heads each, and
    both are outlined."""
    folder = Path("fixtures/keras_heads")
    planted = json.loads((folder / "planted.json").read_text())
    page = steelyard.audit(folder / "planted.keras", policy=steelyard.policy.Policy()).render("html")
    rows = _specs(page)["cp0-chart-parts"]["data"]["values"]  # type: ignore[index]
    heads = {(r["block"].rsplit("/", 1)[-1], r["index"]): r for r in rows if r["kind"] == "head"}
    idle = heads[(planted["idle_heads"][0]["block"], planted["idle_heads"][0]["head"])]
    assert idle["flagged"] and idle["share"] == 0 and idle["shade"] == SHARE_FLOOR
    twins = {(t["block"], h) for t in planted["twin_heads"] for h in t["heads"]}
    assert twins and all(heads[key]["flagged"] for key in twins)
    planted_keys = twins | {(planted["idle_heads"][0]["block"], planted["idle_heads"][0]["head"])}
    assert not any(r["flagged"] for key, r in heads.items() if key not in planted_keys)
    assert all(r["shade"] >= SHARE_FLOOR for r in rows if r["shade"] is not None)
