"""Golden timeline reports of the committed run, at 80 and 140 columns (table) and as JSON
with floats rounded to six significant digits (so last-digit BLAS differences between
machines do not matter). Refresh after an intended change with
``python -m pytest tests/timeline/test_golden_timeline.py --update-golden`` and review the
diff."""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

import pytest
from click.testing import CliRunner

from steelyard.cli import app
from tests.conftest import REPO

GOLDEN = Path(__file__).resolve().parent / "golden"
RUN = "fixtures/timeline_run"
CASES = {
    "timeline-80.txt": (["timeline", RUN, "--fail-on", "never"], "80"),
    "timeline-140.txt": (["timeline", RUN], "140"),
    "timeline.json": (["timeline", RUN, "-f", "json"], "120"),
}


def _rounded(value: Any) -> Any:
    if isinstance(value, float):
        return float(f"{value:.6g}") if math.isfinite(value) else value
    if isinstance(value, dict):
        return {k: _rounded(v) for k, v in value.items() if k != "created"}
    if isinstance(value, list):
        return [_rounded(v) for v in value]
    return value


@pytest.mark.parametrize("name", sorted(CASES))
def test_golden(name: str, update_golden: bool, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(REPO)  # paths in the report relative to the repository
    args, columns = CASES[name]
    env = {"COLUMNS": columns, "SOURCE_DATE_EPOCH": "1767225600", "NO_COLOR": "1"}
    result = CliRunner().invoke(app, ["--color", "never", *args], env=env)
    assert result.exit_code in (0, 1), result.output
    golden = GOLDEN / name
    if update_golden:
        golden.write_text(result.stdout, encoding="utf-8")
    expected = golden.read_text(encoding="utf-8")
    if name.endswith(".json"):
        assert _rounded(json.loads(result.stdout)) == _rounded(json.loads(expected))
    else:
        assert result.stdout == expected
