"""constraint-breach: a kernel constraint the Keras file declares must hold on the weights.

References: Keras applies a layer's ``kernel_constraint`` after every optimizer step
(keras.constraints docs), so weights written by Keras satisfy it; ``MaxNorm(m, axis=0)`` bounds
the L2 norm of each output unit's incoming weights, ``NonNeg`` keeps every weight >= 0,
``UnitNorm`` sets each norm to 1. Kernels are read with the reference HDF5 reader h5py.
"""

from __future__ import annotations

import json
from pathlib import Path

import h5py
import numpy as np
import pytest

from steelyard.api import load
from steelyard.checkpoint_audit import run_rules
from steelyard.findings import Finding
from steelyard.policy import LayerOverride, Policy
from steelyard.rules.constraint_breach import RULE

FIXTURES = Path(__file__).resolve().parents[2] / "fixtures"
BAD = FIXTURES / "demo" / "pumpwear-nightly-bad.h5"


def _findings(path: Path, policy: Policy | None = None) -> list[Finding]:
    return run_rules(load(path), policy or Policy(), None, rules={RULE.name: RULE})[0]


@pytest.mark.parametrize("name", ["mlp.h5", "mlp.keras", "cnn.h5", "cnn.keras"])
def test_weights_written_by_keras_satisfy_their_declared_constraints(name: str) -> None:
    # MaxNorm, UnitNorm, NonNeg and MinMaxNorm(rate=1) were enforced by Keras while training.
    assert _findings(FIXTURES / "real" / "keras" / name) == []


def test_units_past_a_declared_max_norm_are_reported_with_their_norms() -> None:
    with h5py.File(BAD, "r") as handle:
        kernel = np.asarray(handle["model_weights/fc2/pumpwear_nightly_bad/fc2/kernel"])
        config = json.loads(handle.attrs["model_config"])
    declared = next(
        layer["config"]["kernel_constraint"]["config"]
        for layer in config["config"]["layers"]
        if layer["config"].get("name") == "fc2"
    )
    norms = np.linalg.norm(kernel.astype(np.float64), axis=declared["axis"])  # per output unit
    expected = np.flatnonzero(norms > declared["max_value"] * (1 + 1e-4))
    assert expected.size  # the demo file plants breaches in fc2 (fixtures/README.md)
    (finding,) = [f for f in _findings(BAD) if f.layer == "fc2"]
    assert finding.units == tuple(int(u) for u in expected)
    assert finding.severity.value == "error"
    for unit, norm in finding.evidence["norms"].items():
        assert norm == pytest.approx(norms[int(unit)], rel=1e-6)


def test_the_tolerance_comes_from_the_policy_per_layer() -> None:
    with h5py.File(BAD, "r") as handle:
        kernel = np.asarray(handle["model_weights/fc2/pumpwear_nightly_bad/fc2/kernel"])
    worst = float(np.linalg.norm(kernel.astype(np.float64), axis=0).max()) / 3.0 - 1
    loose = Policy(overrides=(LayerOverride("fc2", {RULE.name: {"tolerance": worst * 1.01}}),))
    assert [f for f in _findings(BAD, loose) if f.layer == "fc2"] == []
