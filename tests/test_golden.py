"""Golden reports for every format on the demo fixtures.

Refresh after an intended change with ``python -m pytest tests/test_golden.py --update-golden``
and review the diff. JSON-based formats are compared after rounding floats to six significant
digits, so last-digit BLAS differences between machines do not matter; text formats exactly.
"""

from __future__ import annotations

import json
import math
import os
from pathlib import Path
from typing import Any

import pytest
from click.testing import CliRunner

from steelyard.cli import app

REPO = Path(__file__).resolve().parents[1]
GOLDEN = REPO / "tests" / "golden"
BAD = "fixtures/demo/pumpwear-nightly-bad.safetensors"
GRADS = "fixtures/demo/pumpwear-nightly-bad.grads.safetensors"
HEALTHY = "fixtures/demo/pumpwear-healthy.safetensors"
KERAS_BAD = "fixtures/demo/pumpwear-nightly-bad.keras"

CASES: dict[str, list[str]] = {
    "audit-bad.txt": ["audit", BAD, "--grads", GRADS],
    "audit-bad.json": ["audit", BAD, "--grads", GRADS, "-f", "json"],
    "audit-bad.md": ["audit", BAD, "--grads", GRADS, "-f", "markdown"],
    "audit-bad.sarif": ["audit", BAD, "--grads", GRADS, "-f", "sarif"],
    "audit-bad.junit.xml": ["audit", BAD, "--grads", GRADS, "-f", "junit"],
    "audit-keras-bad.json": ["audit", KERAS_BAD, "-f", "json"],
    "audit-healthy.txt": ["audit", HEALTHY],
    "audit-two.json": ["audit", HEALTHY, BAD, "-f", "json", "--grads", GRADS],
    "layers-onnx.txt": ["layers", "fixtures/demo/pumpwear-nightly-bad.onnx"],
    "layers-keras.json": ["layers", KERAS_BAD, "-f", "json"],
    "compare-bad.json": ["compare", HEALTHY, BAD, "-f", "json"],
    "compare-bad.md": ["compare", HEALTHY, BAD, "-f", "markdown"],
    "compare-bad.sarif": ["compare", HEALTHY, BAD, "-f", "sarif"],
    "compare-bad.junit.xml": ["compare", HEALTHY, BAD, "-f", "junit"],
}


def _rounded(value: Any) -> Any:
    if isinstance(value, float):
        return float(f"{value:.6g}") if math.isfinite(value) else value
    if isinstance(value, dict):
        return {k: _rounded(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_rounded(v) for v in value]
    return value


def _normal(name: str, text: str) -> Any:
    if name.endswith((".json", ".sarif")):
        return _rounded(json.loads(text))
    return text


@pytest.mark.parametrize("name", sorted(CASES))
def test_golden(name: str, update_golden: bool, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(REPO)
    monkeypatch.setenv("SOURCE_DATE_EPOCH", "1764547200")
    monkeypatch.setenv("NO_COLOR", "1")
    monkeypatch.setenv("COLUMNS", "120")
    result = CliRunner().invoke(app, CASES[name])
    assert result.exit_code in (0, 1), result.stderr
    target = GOLDEN / name
    if update_golden or not target.exists():
        if not update_golden and os.environ.get("CI"):
            pytest.fail(f"{target} is missing: run pytest --update-golden and commit it")
        target.write_text(result.stdout, encoding="utf-8")
    assert _normal(name, result.stdout) == _normal(name, target.read_text(encoding="utf-8"))
