"""Hostile LoRA adapters: factors that disagree with each other or with the config, ranks
that claim far more than is stored, configs that are not what they say, and patterns built to
make a regular-expression engine backtrack forever.

Every adapter is written at test time with the ``safetensors`` package in peft's layout
(``base_model.model.<module>.lora_A.weight`` ``[r, in]``, ``lora_B.weight`` ``[out, r]``,
``adapter_config.json`` beside it) and is small; each case runs the real CLI in a child under
the harness's limits and expects one line, exit 2 (or a clean, bounded result for a valid
but hostile adapter). Before adapters were read, every one of these files loaded as plain
safetensors and exited 0 or 1.
"""

from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from safetensors.numpy import save_file

from steelyard.errors import LoadError
from steelyard.loaders.adapter import adapter_of, load_adapter
from tests.hostile.harness import assert_bounded, assert_refused, assert_stayed_inside, run

A = "base_model.model.fc1.lora_A.weight"
B = "base_model.model.fc1.lora_B.weight"


def _adapter(folder: Path, tensors: dict[str, np.ndarray], config: Any | bytes) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    save_file(
        {k: np.ascontiguousarray(v) for k, v in tensors.items()},
        str(folder / "adapter_model.safetensors"),
    )
    raw = config if isinstance(config, bytes) else json.dumps(config).encode()
    (folder / "adapter_config.json").write_bytes(raw)
    return folder


def _refused(folder: Path, cwd: Path, cli: bool, *fragments: str, command: str = "layers") -> None:
    """Refused with one reason: through the real CLI in the harness's child (exit 2, one
    line, bounded) for the first case of each class, in-process for its variants (the same
    LoadError, without a child's start-up cost, so the hostile suite stays fast)."""
    if cli:
        assert_refused(run([command, str(folder)], cwd), *fragments)
        return
    with pytest.raises(LoadError) as refused:
        load_adapter(folder)
    text = str(refused.value)
    assert "\n" not in text
    for fragment in fragments:
        assert fragment.lower() in text.lower(), (fragment, text)


def _pair(r_a: int, r_b: int, out: int = 8, inp: int = 6) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(r_a * 100 + r_b)
    return {
        A: rng.standard_normal((r_a, inp)).astype(np.float32),
        B: rng.standard_normal((out, r_b)).astype(np.float32),
    }


@pytest.mark.parametrize(("r_a", "r_b"), [(4, 3), (1, 16), (16, 1), (8, 2)])
def test_rank_mismatch_between_a_and_b_is_refused(tmp_path: Path, r_a: int, r_b: int) -> None:
    folder = _adapter(tmp_path / "m", _pair(r_a, r_b), {"r": r_a, "lora_alpha": 8})
    _refused(folder, tmp_path, (r_a, r_b) == (4, 3), "rank", "lora_B", command="audit")


@pytest.mark.parametrize(("stored", "claimed"), [(4, 8), (8, 4), (2, 1)])
def test_config_rank_disagreeing_with_the_factors_is_refused(
    tmp_path: Path, stored: int, claimed: int
) -> None:
    folder = _adapter(tmp_path / "m", _pair(stored, stored), {"r": claimed, "lora_alpha": 8})
    _refused(folder, tmp_path, stored == 4, f"r={claimed}")


@pytest.mark.parametrize("claimed", [10**12, 2**63, 65_537, 0, -4])
def test_huge_or_empty_config_rank_is_refused(tmp_path: Path, claimed: int) -> None:
    folder = _adapter(tmp_path / "m", _pair(4, 4), {"r": claimed})
    _refused(folder, tmp_path, claimed == 10**12, "adapter_config.json", "r is")


@pytest.mark.parametrize(
    "shapes",
    [
        ((2**40, 0), (0, 2**40)),  # zero stored bytes claiming rank 2**40
        ((70_000, 0), (0, 70_000)),
        ((3, 0), (0, 3)),  # an update with no rows and no inputs
    ],
)
def test_factor_shapes_claiming_huge_ranks_store_nothing_and_are_refused(
    tmp_path: Path, shapes: tuple[tuple[int, int], tuple[int, int]]
) -> None:
    (a_shape, b_shape) = shapes
    tensors = {A: np.zeros(a_shape, np.float32), B: np.zeros(b_shape, np.float32)}
    folder = _adapter(tmp_path / "m", tensors, {"lora_alpha": 8})
    _refused(folder, tmp_path, a_shape[0] == 2**40, command="audit")


def test_a_long_thin_rank_within_the_cap_stays_bounded(tmp_path: Path) -> None:
    # Rank 60,000 on a 1 × 1 update: valid, and the spectrum comes from a 1 × 1 core.
    tensors = {A: np.ones((60_000, 1), np.float32), B: np.full((1, 60_000), 1e-3, np.float32)}
    folder = _adapter(tmp_path / "m", tensors, {"r": 60_000, "lora_alpha": 1})
    outcome = run(["audit", str(folder)], tmp_path)
    assert_bounded(outcome)
    assert outcome.code in (0, 1), outcome.stderr


_CONFIGS = [
    (b"{not json", "not valid JSON"),
    (b"[" * 200_000 + b"]" * 200_000, "adapter_config.json"),
    (b'{"r": 4, "r": 8}', "duplicate"),
    (b'"just a string"', "not a JSON object"),
    ({"r": "4"}, "not an integer"),
    ({"r": True}, "not an integer"),
    ({"r": 4, "lora_alpha": "8"}, "not a number"),
    ({"r": 4, "lora_alpha": 1e400}, "not finite"),
    ({"r": 4, "use_rslora": "yes"}, "use_rslora"),
    ({"r": 4, "peft_type": "LOHA"}, "LOHA"),
    ({"r": 4, "rank_pattern": ["fc1"]}, "rank_pattern"),
    ({"r": 4, "rank_pattern": {"fc1": 10**9}}, "rank_pattern"),
    ({"r": 4, "alpha_pattern": {"fc1": None}}, "alpha_pattern"),
    ({"r": 4, "target_modules": 7}, "target_modules"),
    ({"r": 4, "target_modules": ["x" * 10_000]}, "target_modules"),
]


@pytest.mark.parametrize(
    ("config", "fragment"), _CONFIGS, ids=[str(i) for i in range(len(_CONFIGS))]
)
def test_hostile_config_json_is_refused_with_one_reason(
    tmp_path: Path, config: Any, fragment: str
) -> None:
    folder = _adapter(tmp_path / "m", _pair(4, 4), config)
    with pytest.raises(LoadError) as refused:
        load_adapter(folder)
    assert fragment.lower() in str(refused.value).lower()
    assert "\n" not in str(refused.value)


@pytest.mark.parametrize("case", [1, 9], ids=["deep", "loha"])
def test_hostile_config_json_exits_2_in_one_line_from_the_cli(tmp_path: Path, case: int) -> None:
    config, fragment = _CONFIGS[case]
    folder = _adapter(tmp_path / "m", _pair(4, 4), config)
    assert_refused(run(["layers", str(folder)], tmp_path), fragment)


def test_oversized_config_is_refused_before_parsing(tmp_path: Path) -> None:
    padding = b" " * (5 * 2**20)
    folder = _adapter(tmp_path / "m", _pair(4, 4), b'{"r": 4' + padding + b"}")
    assert_refused(run(["layers", str(folder)], tmp_path), "adapter config")


@pytest.mark.parametrize(
    "pattern",
    ["(a+)+$", "(a|aa)*b", "(.*a){12}", "a*a*a*a*a*a*a*b", "x" * 600],
    ids=["nested-plus", "alternation-star", "repeated-dotstar", "many-stars", "long-literal"],
)
@pytest.mark.parametrize("key", ["rank_pattern", "alpha_pattern", "target_modules"])
def test_backtracking_patterns_are_refused_not_evaluated(
    tmp_path: Path, pattern: str, key: str
) -> None:
    value: Any = pattern if key == "target_modules" else {pattern: 4}
    tensors = {
        "base_model.model." + "a" * 40 + ".lora_A.weight": np.ones((4, 6), np.float32),
        "base_model.model." + "a" * 40 + ".lora_B.weight": np.ones((8, 4), np.float32),
    }
    folder = _adapter(tmp_path / "m", tensors, {"r": 4, key: value})
    if pattern == "x" * 600 and key == "target_modules":
        # A long literal name is not a pattern: it just matches nothing.
        assert adapter_of(load_adapter(folder)) is not None
        return
    if key == "rank_pattern" and pattern == "(a+)+$":
        # One through the CLI: a backtracking engine would run for hours on "a" * 40.
        assert_refused(run(["layers", str(folder)], tmp_path), "pattern")
        return
    with pytest.raises(LoadError, match="pattern"):
        load_adapter(folder)


def test_magnitude_vector_of_the_wrong_length_is_refused(tmp_path: Path) -> None:
    tensors = {
        **_pair(4, 4),
        "base_model.model.fc1.lora_magnitude_vector": np.ones(5, np.float32),
    }
    folder = _adapter(tmp_path / "m", tensors, {"r": 4, "use_dora": True})
    assert_refused(run(["layers", str(folder)], tmp_path), "lora_magnitude_vector")


@pytest.mark.parametrize("missing", [A, B])
def test_a_factor_without_its_partner_is_refused(tmp_path: Path, missing: str) -> None:
    tensors = _pair(4, 4)
    del tensors[missing]
    folder = _adapter(tmp_path / "m", tensors, {"r": 4})
    _refused(folder, tmp_path, missing == A, "but no")


def test_integer_factors_are_refused(tmp_path: Path) -> None:
    tensors = {A: np.ones((4, 6), np.int32), B: np.ones((8, 4), np.int32)}
    folder = _adapter(tmp_path / "m", tensors, {"r": 4})
    _refused(folder, tmp_path, False, "not a float factor")


def test_config_linked_outside_the_folder_is_never_opened(tmp_path: Path) -> None:
    outside = tmp_path / "outside"
    outside.mkdir()
    canary = outside / "adapter_config.json"
    canary.write_text(json.dumps({"r": 4, "lora_alpha": 4096, "target_modules": ["canary_zz9"]}))
    folder = tmp_path / "model"
    _adapter(folder, _pair(4, 4), b"{}")
    (folder / "adapter_config.json").unlink()
    os.symlink(canary, folder / "adapter_config.json")
    outcome = run(["layers", str(folder / "adapter_model.safetensors")], folder)
    assert_bounded(outcome)
    assert_stayed_inside(outcome, outside)
    assert "canary_zz9" not in outcome.stdout + outcome.stderr
    assert "4096" not in outcome.stdout
