"""new-nonfinite: values finite in OLD that are NaN or infinite in NEW (IEEE 754 NaN and
infinity, as numpy's isfinite defines them); values already non-finite in OLD are not new.
Files are written by the reference safetensors package."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from steelyard.api import compare
from steelyard.findings import Finding
from tests.conftest import mlp_tensors, write_safetensors


def _new_nonfinite(tmp_path: Path, old: dict[str, np.ndarray], new: dict[str, np.ndarray]) -> list[Finding]:
    report = compare(
        write_safetensors(tmp_path / "old.safetensors", old),
        write_safetensors(tmp_path / "new.safetensors", new),
    )
    assert not report.passed or not [f for f in report.comparison.findings if f.rule == "new-nonfinite"]
    return [f for f in report.comparison.findings if f.rule == "new-nonfinite"]


def test_only_values_that_became_non_finite_are_counted(tmp_path: Path) -> None:
    old = mlp_tensors(np.random.default_rng(31), (8, 16, 4))
    old["fc1.weight"][0, 0] = np.nan  # already broken in OLD
    new = {k: v.copy() for k, v in old.items()}
    new["fc1.weight"][2, 5] = np.nan
    new["fc1.weight"][3, 1] = -np.inf
    findings = _new_nonfinite(tmp_path, old, new)
    (finding,) = [f for f in findings if f.layer == "fc1"]
    assert finding.severity.value == "error"
    assert finding.evidence["new_nonfinite"] == 2
    assert set(finding.units) >= {2, 3} and 0 not in finding.units
    assert not [f for f in findings if f.layer == "fc2"]


def test_no_finding_when_nothing_new_is_non_finite(tmp_path: Path) -> None:
    old = mlp_tensors(np.random.default_rng(32), (8, 16, 4))
    old["fc2.bias"][1] = np.inf
    new = {k: v.copy() for k, v in old.items()}
    new["fc1.weight"] *= 0.9
    assert _new_nonfinite(tmp_path, old, new) == []
