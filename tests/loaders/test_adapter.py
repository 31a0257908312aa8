"""LoRA/DoRA adapters against peft's own merge.

The fixtures under ``fixtures/adapters/`` were written by peft 0.21.2 (``save_pretrained``)
on tiny torch models, with ``merge_and_unload()``'s state dict saved beside each adapter as
the reference (``fixtures/gen_adapters.py``). Tensors are read back here with the
``safetensors`` package (numpy backend): the reference reader of the format.
"""

from __future__ import annotations

import json
import math
import shutil
import warnings
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from safetensors.numpy import load_file, save_file

from steelyard.cli import app
from steelyard.errors import LoadError
from steelyard.graph import LayerKind
from steelyard.loaders import load
from steelyard.loaders.adapter import adapter_file_in, adapter_of, load_adapter
from steelyard.loaders.adapter.factors import (
    Factors,
    frobenius,
    row_squares,
    rows,
    singular_values,
)

FIXTURES = Path(__file__).resolve().parents[2] / "fixtures" / "adapters"
PAIRS = [
    ("lora_mlp", "base_mlp"),
    ("rslora_mlp", "base_mlp"),
    ("dora_mlp", "base_mlp"),
    ("untrained_mlp", "base_mlp"),
    ("lora_gpt2", "base_gpt2"),
]
#: transformers' GPT-2 Conv1D stores its weight as [in, out] (``x @ weight``); canonical is
#: [out, in], so the reference is transposed for these modules.
CONV1D = ("c_attn", "c_fc", "c_proj")


def _reference_canonical(name: str, array: np.ndarray, gpt2: bool) -> np.ndarray:
    if gpt2 and name.rsplit(".", 2)[-2] in CONV1D:
        return array.T
    return array


@pytest.mark.parametrize(("adapter", "base"), PAIRS)
def test_merged_weight_equals_peft_merge_and_unload(adapter: str, base: str) -> None:
    merged = load_adapter(FIXTURES / adapter, base=FIXTURES / base)
    reference = load_file(str(FIXTURES / f"{adapter}.merged.safetensors"))
    info = adapter_of(merged)
    assert info is not None and info.modules
    gpt2 = "gpt2" in adapter
    checked = 0
    for layer in merged.layers:
        expected = _reference_canonical(
            layer.name + ".weight", reference[layer.name + ".weight"], gpt2
        )
        got = layer.weight_view().reshape(expected.shape)
        # float32 products summed in another order: a few ulps of the largest weight.
        np.testing.assert_allclose(got, expected, rtol=0, atol=1e-6)
        checked += layer.name in info.modules
    assert checked == len(info.modules)


@pytest.mark.parametrize(("adapter", "base"), PAIRS)
def test_row_block_reads_equal_the_whole_update(adapter: str, base: str) -> None:
    for checkpoint in (
        load_adapter(FIXTURES / adapter),
        load_adapter(FIXTURES / adapter, base=FIXTURES / base),
    ):
        info = adapter_of(checkpoint)
        assert info is not None
        for layer in checkpoint.layers:
            tensor = checkpoint.tensors[layer.weight]
            if layer.name not in info.modules or tensor.read_span is None:
                continue  # a base layer, or a merged one whose base does not stream
            whole = layer.matrix().reshape(-1)
            for step in (1, 5, 13, whole.size):
                pieces = [
                    tensor.read_span(i, min(i + step, whole.size))
                    for i in range(0, whole.size, step)
                ]
                assert np.array_equal(np.concatenate(pieces), whole)


@pytest.mark.parametrize(("adapter", "base"), PAIRS)
def test_update_alone_is_scale_times_b_times_a(adapter: str, base: str) -> None:
    config = json.loads((FIXTURES / adapter / "adapter_config.json").read_text())
    stored = load_file(str(FIXTURES / adapter / "adapter_model.safetensors"))
    checkpoint = load_adapter(FIXTURES / adapter)
    for layer in checkpoint.layers:
        key = f"base_model.model.{layer.name}"
        leaf = layer.name.rsplit(".", 1)[-1]
        r = config["rank_pattern"].get(leaf, config["r"])
        alpha = config["alpha_pattern"].get(leaf, config["lora_alpha"])
        # Hu et al. 2021 (alpha/r); Kalajdzievski 2023 (alpha/sqrt(r)) with use_rslora.
        scale = alpha / (math.sqrt(r) if config["use_rslora"] else r)
        if layer.kind is LayerKind.EMBEDDING:
            a, b = stored[key + ".lora_embedding_A"], stored[key + ".lora_embedding_B"]
            expected = (b @ a).T * scale  # peft Embedding.get_delta_weight
        else:
            a, b = stored[key + ".lora_A.weight"], stored[key + ".lora_B.weight"]
            expected = (b.reshape(b.shape[0], r) @ a.reshape(r, -1)) * scale
        np.testing.assert_allclose(
            layer.matrix(), expected.reshape(layer.units, -1), rtol=1e-6, atol=1e-7
        )


@pytest.mark.parametrize("adapter", [a for a, _ in PAIRS])
def test_norms_and_spectrum_from_factors_equal_numpy_on_the_product(adapter: str) -> None:
    checkpoint = load_adapter(FIXTURES / adapter)
    info = adapter_of(checkpoint)
    assert info is not None
    for module in info.modules.values():
        factors = module.factors()
        product = factors.left @ factors.right
        full = np.linalg.svd(product, compute_uv=False)
        ours = singular_values(factors)
        # From the factors' Gram matrices: σ² carries an absolute error of about machine
        # epsilon times σ₁², so a value near zero comes out near sqrt(eps)·σ₁ (1.5e-8 σ₁);
        # values well above that agree to rounding (steelyard.gram_spectrum).
        top = max(1.0, full[0])
        np.testing.assert_allclose(ours, full[: ours.size], rtol=1e-9, atol=1e-7 * top)
        clear = full[: ours.size] > 1e-4 * top
        np.testing.assert_allclose(ours[clear], full[: ours.size][clear], rtol=1e-9)
        assert np.all(full[ours.size :] <= 1e-12 * top)
        np.testing.assert_allclose(
            row_squares(factors), np.sum(product**2, axis=1), rtol=1e-9, atol=1e-15
        )
        assert frobenius(factors) == pytest.approx(np.linalg.norm(product), rel=1e-9, abs=1e-15)


def test_parameter_counts_and_layer_kinds_are_exact() -> None:
    for adapter, base in PAIRS:
        stored = load_file(str(FIXTURES / adapter / "adapter_model.safetensors"))
        base_stored = load_file(str(FIXTURES / base / "model.safetensors"))
        alone = load_adapter(FIXTURES / adapter)
        assert alone.parameters == sum(v.size for v in stored.values())
        merged = load_adapter(FIXTURES / adapter, base=FIXTURES / base)
        assert merged.parameters == sum(v.size for v in stored.values()) + sum(
            v.size for v in base_stored.values()
        )
        assert [layer.name for layer in merged.layers] == [
            layer.name for layer in load(FIXTURES / base).layers
        ]
    kinds = {layer.name: layer.kind for layer in load_adapter(FIXTURES / "lora_mlp").layers}
    assert kinds == {
        "conv": LayerKind.CONV,
        "embed": LayerKind.EMBEDDING,
        "fc1": LayerKind.DENSE,
        "fc2": LayerKind.DENSE,
    }
    conv = load_adapter(FIXTURES / "lora_mlp").layer("conv")
    assert conv is not None and (conv.units, conv.in_per_group, conv.kernel) == (6, 3, (3, 3))
    ranks = {
        m.name: m.rank for m in adapter_of(load_adapter(FIXTURES / "lora_mlp")).modules.values()
    }  # type: ignore[union-attr]
    assert ranks == {"conv": 4, "embed": 4, "fc1": 4, "fc2": 2}  # rank_pattern fc2: 2


def test_an_adapter_folder_is_one_checkpoint_sniffed_before_safetensors() -> None:
    folder = FIXTURES / "lora_mlp"
    assert adapter_file_in(folder) == folder / "adapter_model.safetensors"
    assert adapter_file_in(FIXTURES / "base_mlp") is None
    assert adapter_of(load(folder)) is not None
    assert adapter_of(load(folder / "adapter_model.safetensors")) is not None
    assert adapter_of(load(FIXTURES / "base_mlp")) is None


def test_dora_without_base_shows_the_update_and_says_the_magnitude_needs_the_base() -> None:
    checkpoint = load_adapter(FIXTURES / "dora_mlp")
    assert any("--base" in note for note in checkpoint.notes)
    magnitudes = [m.magnitude for m in adapter_of(checkpoint).modules.values()]  # type: ignore[union-attr]
    assert all(magnitudes)
    covered = {name for layer in checkpoint.layers for name in layer.tensor_names}
    assert set(magnitudes) <= covered


def test_cli_layers_and_audit_read_adapter_folders() -> None:
    runner = CliRunner()
    result = runner.invoke(app, ["layers", str(FIXTURES / "lora_mlp"), "--format", "json"])
    assert result.exit_code == 0, result.output
    document = json.loads(result.output)
    text = json.dumps(document)
    for name in ("conv", "embed", "fc1", "fc2"):
        assert f'"{name}"' in text
    untrained = runner.invoke(app, ["audit", str(FIXTURES / "untrained_mlp"), "--format", "json"])
    assert untrained.exit_code == 1
    assert "adapter-update" in untrained.output


def test_without_config_the_scale_is_one_and_said(tmp_path: Path) -> None:
    shutil.copy(FIXTURES / "lora_mlp" / "adapter_model.safetensors", tmp_path / "loose.safetensors")
    checkpoint = load(tmp_path / "loose.safetensors")
    info = adapter_of(checkpoint)
    assert info is not None and not info.config.present
    assert {m.scale for m in info.modules.values()} == {1.0}
    assert any("scale 1" in note for note in checkpoint.notes)


_NAMES = [
    "base_model.model.fc1.lora_A.weight",
    "base_model.model.fc1.lora_B.weight",
]


@settings(
    max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(
    rank_a=st.integers(1, 6),
    rank_b=st.integers(1, 6),
    units=st.integers(1, 7),
    fan_in=st.integers(1, 7),
    config_r=st.one_of(st.none(), st.integers(-2, 8), st.text(max_size=3), st.floats()),
    alpha=st.one_of(st.integers(-3, 40), st.floats(allow_nan=True), st.booleans(), st.none()),
)
def test_mutated_adapters_load_or_refuse_with_one_reason(
    tmp_path_factory: pytest.TempPathFactory,
    rank_a: int,
    rank_b: int,
    units: int,
    fan_in: int,
    config_r: object,
    alpha: object,
) -> None:
    folder = tmp_path_factory.mktemp("mutant")
    rng = np.random.default_rng(rank_a * 31 + units)
    save_file(
        {
            _NAMES[0]: rng.standard_normal((rank_a, fan_in)).astype(np.float32),
            _NAMES[1]: rng.standard_normal((units, rank_b)).astype(np.float32),
        },
        str(folder / "adapter_model.safetensors"),
    )
    config: dict[str, object] = {"peft_type": "LORA", "target_modules": ["fc1"]}
    if config_r is not None:
        config["r"] = config_r
    if alpha is not None:
        config["lora_alpha"] = alpha
    (folder / "adapter_config.json").write_text(json.dumps(config))
    valid_r = config_r is None or (type(config_r) is int and config_r >= 1)
    valid_alpha = alpha is None or (
        type(alpha) in (int, float) and math.isfinite(float(alpha))  # type: ignore[arg-type]
    )
    effective_r = 8 if config_r is None else config_r
    try:
        checkpoint = load_adapter(folder)
    except LoadError as exc:
        assert "\n" not in str(exc)
        assert not (valid_r and valid_alpha and rank_a == rank_b == effective_r)
        return
    assert valid_r and valid_alpha and rank_a == rank_b == effective_r
    layer = checkpoint.layers[0]
    assert layer.matrix().shape == (units, fan_in)


def test_product_rows_beyond_float32_become_infinite_without_a_warning() -> None:
    """Factors whose product leaves the float32 range (up to 3.4e38, IEEE 754 binary32) give
    ±Inf there, as the merged float32 weight would, and no numpy overflow warning."""
    left = np.array([[1e30], [1.0], [-1e30]])
    right = np.array([[1e30, 1.0]])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        got = rows(Factors(left, right), 0, 3)
    assert got.dtype == np.float32
    assert got[0, 0] == np.inf and got[2, 0] == -np.inf
    assert got[1].tolist() == [float(np.float32(1e30)), 1.0]
