"""The terminal report of ``steelyard compare`` at 80, 120 and 200 columns.

Cases: the demo pair; a float checkpoint against its GGUF export written by the ``gguf``
package (layers matched under other names, ``blk.1.ffn_up`` for
``model.layers.1.mlp.up_proj``, with stored types, the largest single change, the update rank
and a flattened row); and two checkpoints written with the ``safetensors`` reference library
whose names are long and differ only in the middle
(``model.language_model.decoder.transformer_layers.7.self_attn.q_proj`` and ``...17...``,
which hold non-finite values in OLD, so have no measured change and lead the table), with the
key projections of blocks 7 and 17 replaced and the rest nudged so that the table has more
than its 40 rows.

Each case runs ``steelyard compare`` through click's CliRunner with ``COLUMNS`` set, writing the
table and the JSON document from the same run, and checks the table against the JSON: no line
wider than the terminal, every gated finding's message whole (broken only at spaces), every
layer name shown distinguishably with OLD's name readable beside or under it, the counts in the
header equal to the rows, and the optional columns present with the JSON's values. Tables are
parsed from the underline under their header, as ``tests/test_terminal_layout.py`` does.
"""

from __future__ import annotations

import json
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from click.testing import CliRunner
from rich.cells import cell_len
from safetensors.numpy import load_file, save_file

from steelyard.cli import app
from tests.test_terminal_layout import (
    ELLIPSIS,
    _assert_distinguishable,
    _assert_wrapped_whole,
    _cells,
    _shown_matches,
    _table_after,
    _write_transformer,
)

REPO = Path(__file__).resolve().parents[1]
DEMO = REPO / "fixtures" / "demo"
WIDTHS = (80, 120, 200)
COMPACT_BELOW = 110  # the grid's threshold (render/grid.py), restated so a change is seen


@dataclass(frozen=True)
class Run:
    width: int
    text: str
    document: dict[str, Any]

    @property
    def lines(self) -> list[str]:
        return self.text.splitlines()


def _compare(old: Path, new: Path, width: int, out: Path) -> Run:
    table, document = out / f"compare-{width}.txt", out / f"compare-{width}.json"
    result = CliRunner().invoke(
        app,
        ["compare", str(old), str(new), "-o", str(table), "-o", str(document), "-q"],
        env={"COLUMNS": str(width), "NO_COLOR": "1"},
    )
    assert result.exit_code in (0, 1), result.output
    return Run(width, table.read_text(encoding="utf-8"), json.loads(document.read_text()))


def _long_pair(root: Path) -> tuple[Path, Path]:
    """OLD: a decoder with long names; NEW: two key projections named alike but for the middle
    replaced by fresh draws (a layer-drift finding each), every other weight nudged by 1 %."""
    prefix = "model.language_model.decoder.transformer_layers"
    old = _write_transformer(root / "old", prefix)
    tensors = load_file(str(old))
    rng = np.random.default_rng(41)
    new_tensors = {}
    for name, values in tensors.items():
        moved = values * (1 + 0.01 * rng.standard_normal(values.shape))
        new_tensors[name] = np.nan_to_num(moved, nan=0.0, posinf=0.0).astype(np.float32)
    for block in (7, 17):
        name = f"{prefix}.{block}.self_attn.k_proj.weight"
        new_tensors[name] = rng.standard_normal(tensors[name].shape).astype(np.float32)
    new = root / "new" / "model.safetensors"
    new.parent.mkdir(parents=True)
    save_file(new_tensors, str(new))
    return old, new


def _gguf_pair(root: Path) -> tuple[Path, Path]:
    pytest.importorskip("gguf")
    from tests.compare.test_across_precisions import _export, _float_model

    tensors = _float_model(root / "hf", np.random.default_rng(17))
    _export(root / "model.gguf", tensors, permute=True, flatten=5)
    return root / "hf", root / "model.gguf"


@pytest.fixture(scope="module")
def runs(tmp_path_factory: pytest.TempPathFactory) -> dict[tuple[str, int], Run]:
    root = tmp_path_factory.mktemp("compare-layout")
    pairs = {
        "demo": (DEMO / "pumpwear-healthy.safetensors", DEMO / "pumpwear-nightly-bad.safetensors"),
        "gguf": _gguf_pair(root / "gguf"),
        "long": _long_pair(root / "long"),
    }
    out = tmp_path_factory.mktemp("compare-reports")
    return {(case, w): _compare(*pair, w, out) for case, pair in pairs.items() for w in WIDTHS}


CASES = ("demo", "gguf", "long")


def _gated(run: Run) -> list[dict[str, Any]]:
    return [f for f in run.document["findings"] if not f["present_in_old"]]


@dataclass
class Row:
    cells: list[str]
    below: list[str]


def _finding_rows(run: Run) -> list[tuple[list[str], list[str]]]:
    """(cells, message lines) per row of the findings table, in either layout."""
    first, spans = _table_after(run.lines, r"findings \d")
    compact = run.width < COMPACT_BELOW
    out: list[tuple[list[str], list[str]]] = []
    for line in run.lines[first:]:
        if not line.strip():
            break
        cells = _cells(line, spans)
        if compact and line.startswith(" " * 5) and line[5] != " ":
            out[-1][1].append(line.strip())
        elif cells[0].isdigit():
            out.append((cells, [] if compact else [cells[-1]]))
        elif not line.startswith(" "):
            break  # the lines after the table (findings already present in OLD...)
        else:
            for index, cell in enumerate(cells[1:], 1):
                if cell and (compact or index < len(cells) - 1):
                    out[-1][0][index] += (" " if index == 4 else "") + cell
            if not compact and cells[-1]:
                out[-1][1].append(cells[-1])
    return out


def _layer_rows(run: Run) -> list[Row]:
    """The layer-changes rows: a line with an empty change (a number, never wrapped) continues
    the row above (a name wrapped after a separator, a status wrapped at a space); a line whose
    text starts at the fifth cell is said below the row."""
    first, spans = _table_after(run.lines, r"layer changes")
    columns = _columns(run)
    status, change = columns.index("status"), columns.index("change")
    names = [0, 1] if columns[1] == "OLD name" else [0]
    rows: list[Row] = []
    for line in run.lines[first:]:
        if not line.strip() or re.match(r"(… and|change: )", line):
            break
        if line.startswith("    ") and line[4] != " ":
            rows[-1].below.append(line.strip())
            continue
        cells = _cells(line, spans)
        if cells[change]:
            rows.append(Row(cells, []))
            continue
        for index in names:
            rows[-1].cells[index] += cells[index]
        if cells[status]:
            rows[-1].cells[status] += " " + cells[status]
    return rows


def _columns(run: Run) -> list[str]:
    """Header cells of the layer-changes table (two-line headers joined)."""
    first, spans = _table_after(run.lines, r"layer changes")
    title = next(i for i, line in enumerate(run.lines) if line.startswith("layer changes"))
    heads = [_cells(line, spans) for line in run.lines[title + 1 : first - 1]]
    return [" ".join(h[i] for h in heads if h[i]).strip() for i in range(len(spans))]


# --- the checks ----------------------------------------------------------------------------


@pytest.mark.parametrize("case", CASES)
@pytest.mark.parametrize("width", WIDTHS)
def test_no_line_is_wider_than_the_terminal(runs: dict[tuple[str, int], Run], case: str, width: int) -> None:
    too_wide = [line for line in runs[case, width].lines if cell_len(line) > width]
    assert not too_wide, too_wide[:3]


@pytest.mark.parametrize("case", CASES)
@pytest.mark.parametrize("width", WIDTHS)
def test_every_gated_message_is_whole(runs: dict[tuple[str, int], Run], case: str, width: int) -> None:
    run = runs[case, width]
    gated = _gated(run)
    assert gated, "each case plants at least one gated finding"
    rows = _finding_rows(run)
    assert len(rows) == len(gated)
    header = next(line for line in run.lines if re.match(r"findings \d", line))
    assert header == f"findings {len(gated):,}"
    _, spans = _table_after(run.lines, r"findings \d")
    room = width - 5 if width < COMPACT_BELOW else spans[-1][1] - spans[-1][0]
    unmatched = list(gated)
    for cells, text in rows:
        candidates = [f for f in unmatched if f["rule"] == cells[2] and _shown_matches(cells[3], f["layer"] or "—")]
        finding = next(f for f in candidates if " ".join(text).startswith(f["message"][:20]))
        _assert_wrapped_whole(finding["message"], text, room)
        unmatched.remove(finding)
    assert not unmatched
    summary = run.document["summary"]
    verdict = next(line for line in run.lines if line.startswith("verdict"))
    for severity in ("error", "warning"):
        n = summary[severity]
        assert f"{n:,} {severity}{'' if n == 1 else 's'}" in verdict


@pytest.mark.parametrize("case", CASES)
@pytest.mark.parametrize("width", WIDTHS)
def test_compact_layout_below_110_columns(runs: dict[tuple[str, int], Run], case: str, width: int) -> None:
    run = runs[case, width]
    first, spans = _table_after(run.lines, r"findings \d")
    heads = _cells(run.lines[first - 2], spans)
    compact = width < COMPACT_BELOW
    assert (heads[-1] == "finding") is not compact
    assert ("why it matters and what to do" in run.lines) is compact
    # Each rule's why is said once, in either layout.
    whys = [line for line in run.lines if line.strip().startswith("why: ")]
    assert len(whys) == len({cells[2] for cells, _ in _finding_rows(run)})


@pytest.mark.parametrize("case", CASES)
@pytest.mark.parametrize("width", WIDTHS)
def test_layer_names_stay_distinguishable(runs: dict[tuple[str, int], Run], case: str, width: int) -> None:
    run = runs[case, width]
    layers = run.document["layers"]
    rows = _layer_rows(run)
    shown = layers[: len(rows)]
    assert len(rows) == min(40, len(layers))
    _assert_distinguishable([r.cells[0] for r in rows], [entry["name"] for entry in shown])
    columns = _columns(run)
    for row, entry in zip(rows, shown, strict=True):
        if entry["old_name"] in (None, entry["name"]):
            assert not any(line.startswith("OLD name") for line in row.below)
            continue
        # OLD's name in full: in its own column, or under the row (joined after separators).
        if "OLD name" in columns:
            assert _shown_matches(row.cells[1], entry["old_name"])
        else:
            said = "".join(line for line in row.below if not line.startswith(("1 ", "2 ")))
            assert said.replace(" ", "") == f"OLDname:{entry['old_name']}"
    if len(layers) > 40:
        more = next(line for line in run.lines if line.startswith("… and"))
        assert more.startswith(f"… and {len(layers) - 40:,} more layers")


def test_long_names_are_shortened_from_the_left_only_when_narrow(runs: dict[tuple[str, int], Run]) -> None:
    narrow = [r.cells[0] for r in _layer_rows(runs["long", 80])]
    wide = [r.cells[0] for r in _layer_rows(runs["long", 200])]
    assert any(cell.startswith(ELLIPSIS) for cell in narrow)
    assert not any(cell.startswith(ELLIPSIS) for cell in wide)
    # The two replaced projections lead the table, told apart by their block numbers.
    assert any(re.search(r"\.7\.self_attn\.q_proj$", cell) for cell in narrow[:2])
    assert any(re.search(r"\.17\.self_attn\.q_proj$", cell) for cell in narrow[:2])


@pytest.mark.parametrize("width", WIDTHS)
def test_float_against_gguf_shows_the_optional_columns(runs: dict[tuple[str, int], Run], width: int) -> None:
    run = runs["gguf", width]
    columns = _columns(run)
    # Below 110 columns the compact layout; from 110 the wide one when its measures fit beside
    # the names (at 200 they do; at 120 these eleven columns need 124 cells).
    compact = "died" not in columns
    assert compact is (width < 200)
    for name in ("stored", "max |Δ|", "rank"):
        assert name in columns, columns
    assert ("flattened" in columns) is not compact
    layers = {entry["name"]: entry for entry in run.document["layers"]}
    index = {name: columns.index(name) for name in ("stored", "max |Δ|", "rank", "change", "cosine")}
    for row in _layer_rows(run):
        entry = layers[next(n for n in layers if _shown_matches(row.cells[0], n))]
        stored = (entry["stored_old"], entry["stored_new"])
        assert row.cells[index["stored"]] == (stored[0] if stored[0] == stored[1] else " → ".join(stored))
        # Three significant figures of the JSON's values (render/text.py's number format).
        for key, column in (("max_abs_change", "max |Δ|"), ("relative_change", "change"), ("cosine", "cosine")):
            assert float(row.cells[index[column]]) == pytest.approx(entry[key], rel=5e-3, abs=5e-4)
        rank = entry["update_rank"]
        assert row.cells[index["rank"]] == (f"{rank:,}" if rank is not None else "—")
        flattened = entry["rows_flattened"]
        if compact:
            said = [line for line in row.below if "flattened" in line]
            assert bool(said) is bool(flattened)
            if flattened:
                assert f"{len(flattened)} unit{'s' if len(flattened) > 1 else ''} flattened" in said[0]
        else:
            cell = row.cells[columns.index("flattened")]
            assert cell == (f"{len(flattened):,}" if flattened else "—")
    assert layers["blk.1.ffn_up"]["rows_flattened"] == [5]


def test_wide_table_gives_old_names_a_column_when_everything_fits(runs: dict[tuple[str, int], Run]) -> None:
    assert "OLD name" in _columns(runs["gguf", 200])
    assert "OLD name" not in _columns(runs["gguf", 80])


GOLDEN = REPO / "tests" / "golden"
HEALTHY = "fixtures/demo/pumpwear-healthy.safetensors"
BAD = "fixtures/demo/pumpwear-nightly-bad.safetensors"


@pytest.mark.parametrize("width", WIDTHS)
def test_golden_widths(width: int, update_golden: bool, monkeypatch: pytest.MonkeyPatch) -> None:
    # Refresh with: python -m pytest tests/test_compare_terminal_layout.py --update-golden
    monkeypatch.chdir(REPO)
    result = CliRunner().invoke(
        app, ["compare", HEALTHY, BAD], env={"COLUMNS": str(width), "NO_COLOR": "1"}
    )
    assert result.exit_code == 1, result.output
    target = GOLDEN / f"compare-bad-{width}.txt"
    if update_golden or not target.exists():
        target.write_text(result.stdout, encoding="utf-8")
    assert result.stdout == target.read_text(encoding="utf-8")
