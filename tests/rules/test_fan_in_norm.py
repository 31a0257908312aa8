"""fan-in-norm: units whose incoming L2 norm is far above the layer's median.

Norms are checked against numpy.linalg.norm over the rows of the weights as the reference
writer (safetensors) stored them (PyTorch Linear layout ``[out, in]``).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from steelyard.api import load
from steelyard.checkpoint_audit import run_rules
from steelyard.findings import Finding, Severity
from steelyard.policy import LayerOverride, Policy
from steelyard.rules.fan_in_norm import RULE
from tests.conftest import mlp_tensors, write_safetensors


def _findings(path: Path, policy: Policy | None = None) -> list[Finding]:
    return run_rules(load(path), policy or Policy(), None, rules={RULE.name: RULE})[0]


def _planted(tmp_path: Path) -> tuple[Path, dict[str, np.ndarray]]:
    tensors = mlp_tensors(np.random.default_rng(1), (6, 16, 4))
    tensors["fc1.weight"][5] *= 40.0
    return write_safetensors(tmp_path / "m.safetensors", tensors), tensors


def test_a_unit_past_ratio_times_the_median_norm_is_reported(tmp_path: Path) -> None:
    path, tensors = _planted(tmp_path)
    norms = np.linalg.norm(tensors["fc1.weight"].astype(np.float64), axis=1)
    expected = np.flatnonzero(norms > 8.0 * np.median(norms))
    assert expected.tolist() == [5]
    (finding,) = _findings(path)
    assert finding.layer == "fc1" and finding.units == (5,)
    assert finding.severity is Severity.WARNING and finding.evidence["test"] == "relative"
    assert finding.evidence["largest"] == pytest.approx(norms[5], rel=1e-6)
    assert finding.evidence["median"] == pytest.approx(np.median(norms), rel=1e-6)


def test_a_healthy_twin_passes(tmp_path: Path) -> None:
    path = write_safetensors(
        tmp_path / "m.safetensors", mlp_tensors(np.random.default_rng(1), (6, 16, 4))
    )
    assert _findings(path) == []


def test_thresholds_come_from_the_policy_per_layer(tmp_path: Path) -> None:
    path, tensors = _planted(tmp_path)
    norms = np.linalg.norm(tensors["fc1.weight"].astype(np.float64), axis=1)
    ratio = float(norms[5] / np.median(norms))
    lenient = Policy(overrides=(LayerOverride("fc1", {RULE.name: {"ratio": ratio * 1.01}}),))
    assert _findings(path, lenient) == []
    # An absolute limit (max-norm, unset by default) catches every row above it.
    limit = float(np.sort(norms)[-3])
    strict = Policy(rules={RULE.name: {"ratio": 1e6, "max-norm": limit}})
    (finding,) = [f for f in _findings(path, strict) if f.layer == "fc1"]
    assert finding.evidence["test"] == "max-norm"
    assert finding.units == tuple(int(u) for u in np.flatnonzero(norms > limit))
