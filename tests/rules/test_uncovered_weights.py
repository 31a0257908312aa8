"""uncovered-weights: the share of parameters the layer rules saw, against ``min-share``.

The parameter counts are checked against the tensors as the reference writer (safetensors)
stored them: element counts are products of shapes (numpy).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from steelyard.api import load
from steelyard.checkpoint_audit import run_rules
from steelyard.findings import Finding, Severity
from steelyard.policy import Policy
from steelyard.rules.uncovered_weights import RULE
from tests.conftest import mlp_tensors, write_safetensors


def _findings(path: Path, policy: Policy | None = None) -> list[Finding]:
    return run_rules(load(path), policy or Policy(), None, rules={RULE.name: RULE})[0]


def test_a_model_whose_layers_hold_every_parameter_passes(tmp_path: Path) -> None:
    path = write_safetensors(tmp_path / "m.safetensors", mlp_tensors(np.random.default_rng(0)))
    assert _findings(path) == []


def test_parameters_in_no_layer_below_min_share_are_reported(tmp_path: Path) -> None:
    tensors = mlp_tensors(np.random.default_rng(0))
    # A large 3-D tensor under a name no convention reads as a layer.
    tensors["mystery_table"] = np.ones((4, 50, 10), np.float32)
    path = write_safetensors(tmp_path / "m.safetensors", tensors)
    (finding,) = _findings(path)
    total = sum(int(np.prod(t.shape)) for t in tensors.values())
    covered = total - 2000
    assert finding.evidence["parameters"] == total
    assert finding.evidence["covered"] == covered
    assert finding.evidence["share"] == covered / total
    assert finding.severity is Severity.WARNING and finding.layer is None
    assert "mystery_table" in finding.evidence["largest_uncovered"]
    # The policy may accept the share, with the threshold read as a typed number.
    assert _findings(path, Policy(rules={RULE.name: {"min-share": covered / total}})) == []


def test_a_file_with_no_layer_at_all_is_an_error(tmp_path: Path) -> None:
    path = write_safetensors(tmp_path / "m.safetensors", {"a": np.ones((3, 5, 7), np.float32)})
    (finding,) = _findings(path)
    assert finding.severity is Severity.ERROR and finding.evidence["covered"] == 0


def test_switched_off_by_the_policy_it_reports_nothing(tmp_path: Path) -> None:
    path = write_safetensors(tmp_path / "m.safetensors", {"a": np.ones((3, 5, 7), np.float32)})
    assert _findings(path, Policy(rules={RULE.name: {"enabled": False}})) == []
