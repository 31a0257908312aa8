"""frozen-layer-moved: a layer matching the policy's ``frozen`` globs must be identical in
NEW, up to the rounding of the lower stored precision.

Files are written by the reference safetensors package; the float16 rounding is numpy's
(IEEE 754 binary16, round to nearest even)."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from steelyard.api import compare
from steelyard.findings import Finding
from steelyard.policy import Policy
from tests.conftest import mlp_tensors, write_safetensors


def _old(tmp_path: Path) -> tuple[Path, dict[str, np.ndarray]]:
    tensors = mlp_tensors(np.random.default_rng(11), (8, 24, 6))
    return write_safetensors(tmp_path / "old.safetensors", tensors), tensors


def _moved(old: Path, new: Path, globs: tuple[str, ...] = ("fc1",)) -> list[Finding]:
    report = compare(old, new, Policy(frozen=globs))
    return [f for f in report.comparison.findings if f.rule == "frozen-layer-moved"]


def test_a_frozen_layer_that_changed_is_an_error_and_unfrozen_changes_are_not(tmp_path: Path) -> None:
    old, tensors = _old(tmp_path)
    new = {k: v.copy() for k, v in tensors.items()}
    new["fc1.weight"][3, :2] += 0.5  # 2 of 192 elements
    new["fc2.weight"] *= 1.5  # not frozen
    (finding,) = _moved(old, write_safetensors(tmp_path / "new.safetensors", new))
    assert finding.layer == "fc1" and finding.severity.value == "error"
    assert finding.evidence["moved_elements"] == 2
    assert finding.evidence["glob"] == "fc1"


def test_nothing_is_reported_without_frozen_globs_or_for_an_identical_layer(tmp_path: Path) -> None:
    old, tensors = _old(tmp_path)
    new = {k: v.copy() for k, v in tensors.items()}
    new["fc2.weight"] += 0.1
    path = write_safetensors(tmp_path / "new.safetensors", new)
    assert _moved(old, path) == []
    changed = {k: v.copy() for k, v in tensors.items()}
    changed["fc1.weight"] += 0.1
    assert _moved(old, write_safetensors(tmp_path / "changed.safetensors", changed), ()) == []


def test_a_frozen_layer_only_rounded_to_half_precision_has_not_moved(tmp_path: Path) -> None:
    old, tensors = _old(tmp_path)
    new = dict(tensors)
    new["fc1.weight"] = tensors["fc1.weight"].astype(np.float16)
    new["fc1.bias"] = tensors["fc1.bias"].astype(np.float16)
    assert _moved(old, write_safetensors(tmp_path / "new.safetensors", new)) == []


def test_a_frozen_layer_whose_units_were_reordered_is_reported_as_permuted(tmp_path: Path) -> None:
    # The function is unchanged (fc2's columns follow fc1's rows), the stored weights are not.
    old, tensors = _old(tmp_path)
    order = np.random.default_rng(3).permutation(24)
    new = dict(tensors)
    new["fc1.weight"] = tensors["fc1.weight"][order]
    new["fc1.bias"] = tensors["fc1.bias"][order]
    new["fc2.weight"] = tensors["fc2.weight"][:, order]
    findings = _moved(old, write_safetensors(tmp_path / "new.safetensors", new))
    assert [f.layer for f in findings] == ["fc1"]
    assert findings[0].evidence["permuted"] is True
