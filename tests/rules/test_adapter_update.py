"""``adapter-update``: planted zero updates, unused rank, dwarfing updates and config
mismatches, against a healthy twin. Adapters are written with the ``safetensors`` package in
peft's layout (names ``base_model.model.<module>.lora_A.weight``/``lora_B.weight``, A ``[r,
in]``, B ``[out, r]``; peft 0.21 ``save_pretrained``, as the committed fixtures show)."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from safetensors.numpy import save_file

from steelyard.checkpoint_audit import audit_checkpoint
from steelyard.findings import Finding, Severity
from steelyard.loaders.adapter import load_adapter
from steelyard.policy import Policy

FIXTURES = Path(__file__).resolve().parents[2] / "fixtures" / "adapters"
RULE = "adapter-update"


def _write(
    folder: Path,
    factors: dict[str, tuple[np.ndarray, np.ndarray]],
    r: int,
    alpha: float = 8.0,
    targets: list[str] | None = None,
) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    tensors: dict[str, np.ndarray] = {}
    for module, (a, b) in factors.items():
        tensors[f"base_model.model.{module}.lora_A.weight"] = np.ascontiguousarray(a, np.float32)
        tensors[f"base_model.model.{module}.lora_B.weight"] = np.ascontiguousarray(b, np.float32)
    save_file(tensors, str(folder / "adapter_model.safetensors"))
    config = {
        "peft_type": "LORA",
        "r": r,
        "lora_alpha": alpha,
        "target_modules": targets if targets is not None else sorted(factors),
    }
    (folder / "adapter_config.json").write_text(json.dumps(config))
    return folder


def _findings(folder: Path, base: Path | None = None) -> list[Finding]:
    checkpoint = load_adapter(folder, base=base)
    audit = audit_checkpoint(checkpoint, Policy(), None, jobs=1)
    return [f for f in audit.findings if f.rule == RULE]


def _full_rank(
    rng: np.random.Generator, out: int, inp: int, r: int
) -> tuple[np.ndarray, np.ndarray]:
    return rng.standard_normal((r, inp)), rng.standard_normal((out, r)) * 0.01


def test_zero_b_is_an_error_naming_the_zero_initialisation(tmp_path: Path) -> None:
    rng = np.random.default_rng(1)
    a = rng.standard_normal((4, 16))
    folder = _write(tmp_path / "zero", {"fc1": (a, np.zeros((8, 4)))}, r=4)
    found = _findings(folder)
    assert [(f.layer, f.severity) for f in found] == [("fc1", Severity.ERROR)]
    assert "B is all zeros" in found[0].message


def test_committed_untrained_adapter_has_zero_updates() -> None:
    # fixtures/gen_adapters.py saves peft's adapter straight after get_peft_model (B = 0).
    found = _findings(FIXTURES / "untrained_mlp")
    assert sorted((f.layer, f.severity) for f in found) == [
        ("fc1", Severity.ERROR),
        ("fc2", Severity.ERROR),
    ]


def test_unused_rank_counts_singular_values_below_the_share(tmp_path: Path) -> None:
    rng = np.random.default_rng(2)
    # Rank 8 configured, but B·A has rank 2: two directions only (numpy confirms below).
    u = rng.standard_normal((12, 2))
    b = np.concatenate([u, np.zeros((12, 6))], axis=1)
    a = rng.standard_normal((8, 20))
    assert np.linalg.matrix_rank(b @ a) == 2  # numpy's rank of the product
    folder = _write(tmp_path / "lowrank", {"fc1": (a, b)}, r=8)
    found = _findings(folder)
    assert len(found) == 1 and found[0].severity is Severity.INFO
    assert found[0].evidence["effective_rank"] == 2
    assert found[0].evidence["rank"] == 8


def test_healthy_twin_full_rank_small_update_has_no_findings(tmp_path: Path) -> None:
    rng = np.random.default_rng(3)
    folder = _write(tmp_path / "healthy", {"fc1": _full_rank(rng, 24, 12, 4)}, r=4)
    # The base is the committed base_mlp (fc1: 24 × 12), weights ~ U(±1/√12).
    assert _findings(folder, base=FIXTURES / "base_mlp" / "model.safetensors") == []


def test_update_that_dwarfs_the_base_is_a_warning_with_the_ratio(tmp_path: Path) -> None:
    rng = np.random.default_rng(4)
    a, b = _full_rank(rng, 24, 12, 4)
    folder = _write(tmp_path / "big", {"fc1": (a, b * 1000.0)}, r=4)
    base = FIXTURES / "base_mlp" / "model.safetensors"
    found = _findings(folder, base=base)
    assert len(found) == 1 and found[0].severity is Severity.WARNING
    # The ratio against numpy on the materialised matrices.
    from safetensors.numpy import load_file

    w = load_file(str(base))["fc1.weight"]
    delta = (b * 1000.0) @ a * (8.0 / 4)
    expected = np.linalg.norm(delta) / np.linalg.norm(w)
    assert found[0].evidence["update_ratio"] == pytest.approx(expected, rel=1e-5)
    # Without a base the ratio cannot be judged: no warning.
    assert _findings(folder) == []


def test_target_modules_missing_from_the_file_and_stray_factors(tmp_path: Path) -> None:
    rng = np.random.default_rng(5)
    folder = _write(
        tmp_path / "mismatch",
        {"fc1": _full_rank(rng, 24, 12, 4), "fc2": _full_rank(rng, 12, 24, 4)},
        r=4,
        targets=["fc1", "q_proj"],
    )
    found = _findings(folder)
    messages = sorted(f.message for f in found if f.severity is Severity.WARNING)
    assert len(messages) == 2
    assert "'fc2' holds LoRA factors but target_modules does not name it" in messages[0]
    assert "target_modules names 'q_proj'" in messages[1]


def test_committed_trained_adapter_update_sizes_are_noted(tmp_path: Path) -> None:
    checkpoint = load_adapter(FIXTURES / "lora_mlp", base=FIXTURES / "base_mlp")
    audit = audit_checkpoint(checkpoint, Policy(), None, jobs=2)
    bands = [n for n in audit.notes if n.startswith(f"{RULE}: ‖ΔW‖/‖W‖")]
    listed = " ".join(bands)
    for layer in ("conv", "embed", "fc1", "fc2"):
        assert layer in listed


def test_dead_unit_leaves_an_update_read_alone_to_this_rule(tmp_path: Path) -> None:
    # An update's zero rows leave their units as the base has them: without the base,
    # dead-unit does not judge them (a note says so) and this rule reports the zero update
    # once per module. With --base the merged layers are judged as any (the committed
    # untrained adapter merged onto its base leaves the base's weights, which are healthy).
    rng = np.random.default_rng(7)
    half = rng.standard_normal((8, 4)) * 0.01
    half[:4] = 0.0  # half of fc1's units untouched by the update
    folder = _write(
        tmp_path / "partly",
        {"fc1": (rng.standard_normal((4, 16)), half), "fc2": (rng.standard_normal((4, 8)), np.zeros((6, 4)))},
        r=4,
    )
    audit = audit_checkpoint(load_adapter(folder), Policy(), None, jobs=1)
    assert [f for f in audit.findings if f.rule == "dead-unit"] == []
    assert [(f.rule, f.layer) for f in audit.findings if f.severity is Severity.ERROR] == [
        (RULE, "fc2")
    ]
    assert any(note.startswith("dead-unit: not judged on an adapter's updates") for note in audit.notes)
    merged = audit_checkpoint(
        load_adapter(FIXTURES / "untrained_mlp", base=FIXTURES / "base_mlp"), Policy(), None, jobs=1
    )
    assert not any("dead-unit: not judged" in note for note in merged.notes)
