"""layer-drift: the relative change ‖B − A‖_F / ‖A‖_F of a layer's weights against ``limit``.

The relative change is checked against numpy (float64 Frobenius norms) over the tensors as the
reference writer (safetensors) stored them.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from steelyard.api import compare
from steelyard.findings import Finding
from steelyard.policy import LayerOverride, Policy
from tests.conftest import mlp_tensors, write_safetensors


def _pair(tmp_path: Path, moved: float) -> tuple[Path, Path, float]:
    """OLD, and NEW whose fc1 weights moved by about ``moved`` of their norm; the exact
    relative change by numpy."""
    rng = np.random.default_rng(7)
    old = mlp_tensors(rng, (6, 16, 4))
    new = {k: v.copy() for k, v in old.items()}
    a = old["fc1.weight"].astype(np.float64)
    step = rng.standard_normal(a.shape)
    new["fc1.weight"] = (a + step * (moved * np.linalg.norm(a) / np.linalg.norm(step))).astype(np.float32)
    exact = float(
        np.linalg.norm(new["fc1.weight"].astype(np.float64) - a) / np.linalg.norm(a)
    )
    return (
        write_safetensors(tmp_path / "old.safetensors", old),
        write_safetensors(tmp_path / "new.safetensors", new),
        exact,
    )


def _drift(old: Path, new: Path, policy: Policy | None = None) -> list[Finding]:
    report = compare(old, new, policy or Policy())
    return [f for f in report.comparison.findings if f.rule == "layer-drift"]


def test_a_layer_that_moved_past_the_limit_is_reported_with_its_relative_change(
    tmp_path: Path,
) -> None:
    old, new, exact = _pair(tmp_path, 0.8)
    (finding,) = _drift(old, new)
    assert finding.layer == "fc1" and finding.severity.value == "warning"
    assert finding.evidence["relative_change"] == pytest.approx(exact, rel=1e-6)
    assert finding.evidence["limit"] == 0.5


def test_a_layer_that_moved_less_than_the_limit_passes(tmp_path: Path) -> None:
    old, new, exact = _pair(tmp_path, 0.2)
    assert exact < 0.5
    assert _drift(old, new) == []


def test_the_limit_comes_from_the_policy_per_layer(tmp_path: Path) -> None:
    old, new, exact = _pair(tmp_path, 0.8)
    override = LayerOverride("fc1", {"layer-drift": {"limit": exact * 1.01}})
    assert _drift(old, new, Policy(overrides=(override,))) == []
    (finding,) = _drift(old, new, Policy(rules={"layer-drift": {"severity": "error"}}))
    assert finding.severity.value == "error"  # the engine applies the policy's severity
