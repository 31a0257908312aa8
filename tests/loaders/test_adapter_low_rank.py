"""An adapter's update ΔW = L·R read on its own: what the audit takes from the factors instead
of a pass over the product, against the product itself.

References: the product formed with numpy from the factors as the ``safetensors`` package
reads them (the format's reference reader), numpy sums of squares of the float32-rounded
product, and ``essential-weight``'s own ``measure`` on that product (its definition, tested
against the weights' definition in ``tests/rules/test_essential_weight.py``). The adapters are
invented here in peft's naming (``base_model.model.<module>.lora_A.weight``); the peft-written
fixtures of ``fixtures/adapters`` are used too.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from safetensors.numpy import save_file

from steelyard.api import audit
from steelyard.loaders import load
from steelyard.loaders.adapter import load_adapter
from steelyard.rules.essential_weight import measure, none_can_stand_out
from steelyard.stats import LayerStats, passes

FIXTURES = Path(__file__).resolve().parents[2] / "fixtures" / "adapters"
ALPHA, RANK = 32, 8


def _adapter(
    folder: Path,
    rng: np.random.Generator,
    shapes: dict[str, tuple[int, int]],
    outlier: bool = False,
    spike: bool = False,
) -> Path:
    """A trained-looking LoRA adapter (B non-zero) on ``shapes`` = module -> (out, in); with
    ``outlier``, one input column of every A is 400 × the others (an outlier input feature);
    with ``spike``, one entry of B's first column and one of A's first row are large, so
    that ΔW holds one weight far beyond its row and column (an essential weight)."""
    folder.mkdir(parents=True, exist_ok=True)
    tensors: dict[str, np.ndarray] = {}
    for module, (out, inp) in shapes.items():
        a = (rng.uniform(-1, 1, (RANK, inp)) / np.sqrt(inp)).astype(np.float32)
        if outlier:
            a[:, inp // 3] *= 400.0
        b = (rng.standard_normal((out, RANK)) * 0.01).astype(np.float32)
        if spike:
            b[out // 2, 0], a[0, inp // 2] = 5.0, 8.0
        tensors[f"base_model.model.{module}.lora_A.weight"] = a
        tensors[f"base_model.model.{module}.lora_B.weight"] = b
    save_file(tensors, str(folder / "adapter_model.safetensors"))
    config = {"peft_type": "LORA", "r": RANK, "lora_alpha": ALPHA, "target_modules": sorted(
        {m.rsplit(".", 1)[-1] for m in shapes})}
    (folder / "adapter_config.json").write_text(json.dumps(config))
    return folder


SHAPES = {
    "model.layers.0.self_attn.q_proj": (96, 64),
    "model.layers.0.mlp.up_proj": (300, 64),
    "model.layers.0.mlp.down_proj": (64, 300),
}


def _products(folder: Path) -> dict[str, np.ndarray]:
    """ΔW of every module from the stored factors (float64, then float32 as stored)."""
    from safetensors.numpy import load_file

    stored = load_file(str(folder / "adapter_model.safetensors"))
    scale = ALPHA / RANK
    out = {}
    for module in SHAPES:
        a = stored[f"base_model.model.{module}.lora_A.weight"].astype(np.float64)
        b = stored[f"base_model.model.{module}.lora_B.weight"].astype(np.float64)
        out[module] = ((scale * b) @ a).astype(np.float32)
    return out


def test_row_and_column_sums_come_from_the_factors(tmp_path: Path) -> None:
    folder = _adapter(tmp_path / "a", np.random.default_rng(1), SHAPES)
    checkpoint = load_adapter(folder)
    stats = LayerStats(checkpoint)
    reference = _products(folder)
    for layer in checkpoint.layers:
        assert stats.factors(layer) is not None
        product = reference[layer.name].astype(np.float64)
        # the float32-rounded product's sums: within float32 rounding of the exact ones
        np.testing.assert_allclose(stats.row_norms(layer), np.sqrt((product**2).sum(1)), rtol=1e-6)
        # no pass ran: nothing was assembled, and the product is streamed whatever its size
        assert stats._passes.cache.get(("matrix", layer.name)) is None
        assert stats.streamed(layer) is not None
        tensor = checkpoint.tensors[layer.weight]
        assert stats.nonfinite(tensor) == (0, 0, 0)


def test_non_finite_factors_fall_back_to_a_counted_pass(tmp_path: Path) -> None:
    # An entry the bound cannot rule out as ±Inf is counted by a pass over the product.
    rng = np.random.default_rng(2)
    folder = _adapter(tmp_path / "a", rng, {"model.layers.0.mlp.up_proj": (40, 32)})
    checkpoint = load_adapter(folder)
    (layer,) = checkpoint.layers
    huge = checkpoint.tensors[layer.weight]
    left, _right = huge.factors()  # type: ignore[misc]
    left[0, :] = 1e40  # the cached factors: row 0 of the product overflows float32
    stats = LayerStats(checkpoint)
    norms = stats.row_norms(layer)
    assert not np.isfinite(norms[0])
    assert sum(stats.nonfinite(huge)) > 0


@pytest.mark.parametrize("outlier", [False, True])
def test_the_essential_weight_bound_never_hides_a_weight(tmp_path: Path, outlier: bool) -> None:
    folder = _adapter(tmp_path / "a", np.random.default_rng(3), SHAPES, outlier=outlier)
    checkpoint = load_adapter(folder)
    stats = LayerStats(checkpoint)
    reference = _products(folder)
    for layer in checkpoint.layers:
        factors = stats.factors(layer)
        assert factors is not None
        squares = np.square(stats.row_norms(layer))
        for sigma in (3.0, 20.0):
            settled = none_can_stand_out(*factors, squares, sigma)
            found = measure(reference[layer.name], sigma, squares)
            if settled:
                assert found.units.size == 0  # the proof is sound
            if not outlier and sigma == 20.0:
                assert settled  # and it settles the usual adapter without a pass
    # with an outlier input column the bound cannot settle every layer: the pass still runs
    if outlier:
        assert not all(
            none_can_stand_out(*stats.factors(layer), np.square(stats.row_norms(layer)), 3.0)  # type: ignore[misc]
            for layer in checkpoint.layers
        )


def test_audit_with_and_without_the_factors_agrees(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Reference: the same audit with every shortcut off (the product streamed by row blocks
    # as before); the same findings, and numbers that agree to float32 rounding.
    folder = _adapter(tmp_path / "a", np.random.default_rng(4), SHAPES, outlier=True, spike=True)
    fast = audit(folder, jobs=2)
    monkeypatch.setattr(passes, "low_rank_run", lambda checkpoint, layer: None)
    import steelyard.stats as stats_module

    monkeypatch.setattr(stats_module, "low_rank_run", lambda checkpoint, layer: None)
    slow = audit(folder, jobs=1)
    key = [(f.rule, f.layer) for f in fast.findings]
    assert key == [(f.rule, f.layer) for f in slow.findings]
    # a spike is found through the factors' path too (the bound cannot settle its layer)
    assert any(rule == "essential-weight" for rule, _ in key)
    for a, b in zip(fast.findings, slow.findings, strict=True):
        assert a.severity == b.severity
        assert a.score == pytest.approx(b.score, rel=1e-4, abs=1e-6)


@pytest.mark.parametrize("adapter", ["lora_mlp", "rslora_mlp", "lora_gpt2"])
def test_peft_written_adapters_take_the_factor_summary(adapter: str) -> None:
    checkpoint = load_adapter(FIXTURES / adapter)
    stats = LayerStats(checkpoint)
    for layer in checkpoint.layers:
        left, right = stats.factors(layer)  # type: ignore[misc]
        product = (left @ right).astype(np.float32).astype(np.float64)
        np.testing.assert_allclose(
            stats.row_norms(layer), np.sqrt((product**2).sum(1)), rtol=1e-6, atol=1e-30
        )


@pytest.mark.parametrize("dtype", ["float32", "bf16"])
def test_a_few_rows_of_a_streamed_table_are_read_alone(tmp_path: Path, dtype: str) -> None:
    # LayerStats.picked reads each of a few rows on its own instead of a pass over all: the
    # same values as the safetensors package's whole read.
    import ml_dtypes
    from safetensors.numpy import load_file

    rng = np.random.default_rng(5)
    table = rng.standard_normal((4000, 48)).astype(np.float32)
    stored = table.astype(ml_dtypes.bfloat16) if dtype == "bf16" else table
    path = tmp_path / "m.safetensors"
    save_file({"embed_tokens.weight": stored}, str(path))
    reference = load_file(str(path))["embed_tokens.weight"].astype(np.float32)
    checkpoint = load(path)
    (layer,) = checkpoint.layers
    stats = LayerStats(checkpoint, stream_bytes=0)
    index = np.array([0, 7, 1999, 3999])
    np.testing.assert_array_equal(stats.picked(layer, index), reference[index])
    many = np.arange(0, 4000, 3)  # one row in three: gathered from a pass
    np.testing.assert_array_equal(stats.picked(layer, many), reference[many])


@pytest.mark.parametrize("seed", range(6))
def test_the_bound_is_sound_on_varied_updates(seed: int) -> None:
    # Random factors with the structures that make essential weights or defeat the bound:
    # outlier input columns in A, a few strong rows of B, single spikes in both, zero rows.
    # Wherever none_can_stand_out says "none", essential-weight's measure on the product (as
    # stored: float64 product rounded to float32) must find none; and the bound must not be
    # vacuous (it settles the plain draws).
    rng = np.random.default_rng(100 + seed)
    settled_plain = found_some = 0
    for trial in range(25):
        units, fan_in, rank = int(rng.integers(8, 200)), int(rng.integers(8, 200)), int(rng.integers(1, 8))
        rank = min(rank, units - 1, fan_in - 1)
        left = rng.standard_normal((units, rank)) * 0.01
        right = rng.uniform(-1, 1, (rank, fan_in)) / np.sqrt(fan_in)
        kind = trial % 5
        if kind == 1:
            right[:, rng.integers(0, fan_in)] *= float(rng.choice([10.0, 400.0]))
        elif kind == 2:
            left[rng.integers(0, units)] *= 50.0
        elif kind == 3:
            left[rng.integers(0, units), 0] = 5.0
            right[0, rng.integers(0, fan_in)] = 8.0
        elif kind == 4:
            left[: units // 3] = 0.0
        product = (left @ right).astype(np.float32)
        squares = (product.astype(np.float64) ** 2).sum(axis=1)
        for sigma in (2.0, 5.0, 20.0):
            settled = none_can_stand_out(left, right, squares, sigma)
            found = measure(product, sigma, squares).units.size
            if settled:
                assert found == 0, (trial, sigma)
            found_some += found > 0
            if kind == 0 and sigma == 20.0:
                settled_plain += settled
    assert settled_plain >= 4
    assert found_some >= 3  # the draws do hold essential weights the bound must not hide
