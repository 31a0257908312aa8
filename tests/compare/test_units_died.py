"""units-died: units alive in OLD and dead in NEW, with revived units listed, not reported.

A unit whose incoming weights and bias are all zero outputs a constant, and one whose
outgoing (consumer) weights are all zero is unused: both are dead by the dead-unit rule's
definition (common practice, no source). Files are written by the reference safetensors
package."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from steelyard.api import compare
from steelyard.findings import Finding
from tests.conftest import mlp_tensors, write_safetensors


def _kill(tensors: dict[str, np.ndarray], unit: int) -> None:
    tensors["fc1.weight"][unit] = 0.0
    tensors["fc1.bias"][unit] = 0.0
    tensors["fc2.weight"][:, unit] = 0.0


def _died(tmp_path: Path, old: dict[str, np.ndarray], new: dict[str, np.ndarray]) -> list[Finding]:
    report = compare(
        write_safetensors(tmp_path / "old.safetensors", old),
        write_safetensors(tmp_path / "new.safetensors", new),
    )
    return [f for f in report.comparison.findings if f.rule == "units-died"]


def test_units_that_died_are_named_and_revived_ones_are_listed(tmp_path: Path) -> None:
    old = mlp_tensors(np.random.default_rng(21), (8, 32, 6))
    new = {k: v.copy() for k, v in old.items()}
    _kill(old, 4)  # dead in OLD, alive in NEW: revived
    for unit in (7, 19, 30):
        _kill(new, unit)
    (finding,) = _died(tmp_path, old, new)
    assert finding.layer == "fc1" and finding.severity.value == "warning"
    assert set(finding.units) == {7, 19, 30}
    assert finding.evidence["died"] == 3 and finding.evidence["units_total"] == 32
    assert finding.evidence["units_revived"] == [4]


def test_units_dead_on_both_sides_did_not_die_in_between(tmp_path: Path) -> None:
    old = mlp_tensors(np.random.default_rng(22), (8, 32, 6))
    _kill(old, 9)
    new = {k: v.copy() for k, v in old.items()}
    new["fc2.weight"] = new["fc2.weight"] * 1.01  # trained a little further; unit 9 stays dead
    assert _died(tmp_path, old, new) == []
