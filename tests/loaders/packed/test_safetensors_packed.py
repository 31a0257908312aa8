"""Packed safetensors files, written with the safetensors package, read through the loader:
one logical float weight per packed layer whose values equal an independent dequantization
from each layout's published formula (see ``_reference.py`` for the source of each)."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from steelyard.api import load
from steelyard.graph import TensorRole
from steelyard.loaders.packed import assemble
from steelyard.streaming import row_blocks

from . import _reference as ref


@pytest.fixture(autouse=True)
def _small_row_blocks(monkeypatch: pytest.MonkeyPatch) -> None:
    """Decode three rows per block so that every test crosses row-block boundaries."""
    monkeypatch.setattr(
        assemble, "row_blocks",
        lambda rows, n, _bytes=None: row_blocks(rows, n, block_bytes=12 * max(n, 1)),
    )


def _check(path: Path, module: str, expected: np.ndarray, stored_type: str,
           rtol: float = 1e-6) -> None:
    checkpoint = load(path)
    name = f"{module}.weight"
    tensor = checkpoint.tensors[name]
    assert tensor.stored_type == stored_type
    assert tensor.shape == expected.shape and tensor.role is TensorRole.PARAMETER
    np.testing.assert_allclose(tensor.read(), expected, rtol=rtol, atol=1e-7)
    # An unaligned span (starts and ends inside rows) equals the same slice of the whole.
    flat = expected.reshape(-1)
    a, b = min(5, flat.size), max(min(5, flat.size), flat.size - 3)
    np.testing.assert_allclose(tensor.read_part(a, b), flat[a:b], rtol=rtol, atol=1e-7)
    layer = checkpoint.layer(module)
    assert layer is not None and layer.weight == name
    assert (layer.units, layer.in_per_group) == expected.shape
    # Parameters are the logical elements; no stored part is a layer or counted.
    assert [t.name for t in checkpoint.counted] == [name]
    assert checkpoint.parameters == expected.size
    assert [lay.name for lay in checkpoint.layers] == [module]
    assert any("packed weights decoded" in note for note in checkpoint.notes)


M = "model.layers.0.mlp.up_proj"


@pytest.mark.parametrize(
    "bits, n_out, n_in, group, act",
    [(4, 12, 64, 16, False), (4, 7, 32, 32, True), (2, 5, 48, 16, True),
     (8, 9, 24, 8, False), (8, 3, 8, 8, True), (3, 32, 64, 32, True), (3, 7, 32, 16, False)],
)
def test_gptq_matches_published_formula(tmp_path: Path, bits: int, n_out: int, n_in: int,
                                        group: int, act: bool) -> None:
    parts, expected = ref.gptq(np.random.default_rng(bits * n_out), bits, n_out, n_in, group, act)
    config = {"quantization_config": {"quant_method": "gptq", "bits": bits,
                                      "group_size": group, "desc_act": act}}
    path = ref.save(tmp_path / "model.safetensors", ref.prefixed(M, parts), config)
    _check(path, M, expected, f"gptq-int{bits}")


def test_gptq_v2_zero_points_are_not_offset(tmp_path: Path) -> None:
    parts, expected = ref.gptq(np.random.default_rng(12), 4, 8, 32, 16, act=True, v2=True)
    config = {"quantization_config": {"quant_method": "gptq", "bits": 4, "group_size": 16,
                                      "checkpoint_format": "gptq_v2"}}
    path = ref.save(tmp_path / "model.safetensors", ref.prefixed(M, parts), config)
    _check(path, M, expected, "gptq-int4")


def test_gptq_dynamic_overrides_let_shapes_decide(tmp_path: Path) -> None:
    # GPTQModel's "dynamic" section may give a module 8 bits under a 4-bit default.
    parts, expected = ref.gptq(np.random.default_rng(13), 8, 8, 32, 32, act=False)
    config = {"quantization_config": {"quant_method": "gptq", "bits": 4, "group_size": 128,
                                      "dynamic": {r"+:.*mlp.*": {"bits": 8, "group_size": 32}}}}
    path = ref.save(tmp_path / "model.safetensors", ref.prefixed(M, parts), config)
    _check(path, M, expected, "gptq-int8")


def test_gptq_without_config_or_g_idx_infers_bits_and_groups(tmp_path: Path) -> None:
    parts, expected = ref.gptq(np.random.default_rng(3), 8, 6, 32, 8, act=False)
    del parts["g_idx"]
    path = ref.save(tmp_path / "model.safetensors", ref.prefixed(M, parts))
    _check(path, M, expected, "gptq-int8")


def test_gptq_quantize_config_json_is_read(tmp_path: Path) -> None:
    parts, expected = ref.gptq(np.random.default_rng(4), 4, 8, 32, 16, act=False)
    del parts["g_idx"]
    path = ref.save(tmp_path / "model.safetensors", ref.prefixed(M, parts))
    (tmp_path / "quantize_config.json").write_text(json.dumps({"bits": 4, "group_size": 16}))
    _check(path, M, expected, "gptq-int4")
    assert any("quantize_config.json" in n for n in load(path).notes)


@pytest.mark.parametrize("n_out, n_in, group", [(16, 32, 16), (8, 24, 8), (24, 64, 64)])
def test_awq_matches_published_formula(tmp_path: Path, n_out: int, n_in: int, group: int) -> None:
    parts, expected = ref.awq(np.random.default_rng(n_out + n_in), n_out, n_in, group)
    config = {"quantization_config": {"quant_method": "awq", "bits": 4, "group_size": group,
                                      "version": "gemm"}}
    path = ref.save(tmp_path / "model.safetensors", ref.prefixed(M, parts), config)
    _check(path, M, expected, "awq-int4")


@pytest.mark.parametrize("kind, n_out, n_in", [("tensor", 5, 7), ("channel", 9, 4),
                                               ("block", 130, 260), ("block", 3, 129)])
def test_fp8_matches_ocp_decoding(tmp_path: Path, kind: str, n_out: int, n_in: int) -> None:
    parts, expected = ref.fp8(np.random.default_rng(n_out), n_out, n_in, kind)
    config = {"quantization_config": {"quant_method": "fp8", "weight_block_size": [128, 128]}}
    path = ref.save(tmp_path / "model.safetensors", ref.prefixed(M, parts),
                    config if kind == "block" else None)
    _check(path, M, expected, f"fp8-e4m3-{kind}")


@pytest.mark.parametrize("bits, n_out, n_in, group", [(4, 6, 128, 64), (8, 5, 32, 16),
                                                      (2, 3, 64, 32), (3, 4, 64, 32),
                                                      (5, 3, 64, 64), (6, 2, 32, 16)])
def test_mlx_matches_published_formula(tmp_path: Path, bits: int, n_out: int, n_in: int,
                                       group: int) -> None:
    parts, expected = ref.mlx(np.random.default_rng(bits + n_out), bits, n_out, n_in, group)
    config = {"quantization": {"bits": bits, "group_size": group}}
    path = ref.save(tmp_path / "model.safetensors", ref.prefixed(M, parts), config)
    _check(path, M, expected, f"mlx-int{bits}-g{group}", rtol=1e-5)


def test_mlx_per_module_override(tmp_path: Path) -> None:
    parts, expected = ref.mlx(np.random.default_rng(8), 8, 4, 32, 32)
    config = {"quantization": {"bits": 4, "group_size": 64, M: {"bits": 8, "group_size": 32}}}
    path = ref.save(tmp_path / "model.safetensors", ref.prefixed(M, parts), config)
    _check(path, M, expected, "mlx-int8-g32", rtol=1e-5)


@pytest.mark.parametrize(
    "quant_type, n_out, n_in, blocksize, nested",
    [("nf4", 8, 16, 64, False), ("nf4", 7, 9, 16, True), ("fp4", 5, 13, 32, False),
     ("fp4", 6, 11, 8, True)],
)
def test_bnb4_matches_qlora_tables(tmp_path: Path, quant_type: str, n_out: int, n_in: int,
                                   blocksize: int, nested: bool) -> None:
    parts, expected = ref.bnb4(np.random.default_rng(n_out * n_in), n_out, n_in, blocksize,
                               quant_type, nested)
    config = {"quantization_config": {"quant_method": "bitsandbytes", "load_in_4bit": True}}
    path = ref.save(tmp_path / "model.safetensors", ref.prefixed(M, parts), config)
    _check(path, M, expected, f"bnb-{quant_type}" + ("-dq" if nested else ""), rtol=1e-5)


def test_nf4_table_is_the_qlora_table() -> None:
    # QLoRA (Dettmers et al. 2023) Appendix E values, typed independently in _reference.
    from steelyard.loaders.packed.bnb import NF4

    np.testing.assert_array_equal(NF4, np.array(ref.NF4_PAPER, np.float32))
    assert NF4[7] == 0 and NF4[0] == -1 and NF4[15] == 1 and np.all(np.diff(NF4) > 0)


@pytest.mark.parametrize("n_out, n_in", [(4, 6), (11, 3)])
def test_llm_int8_matches_vectorwise_formula(tmp_path: Path, n_out: int, n_in: int) -> None:
    parts, expected = ref.bnb8(np.random.default_rng(n_out), n_out, n_in)
    path = ref.save(tmp_path / "model.safetensors", ref.prefixed(M, parts))
    _check(path, M, expected, "bnb-int8")


@pytest.mark.parametrize(
    "bits, n_out, n_in, group, symmetric",
    [(4, 6, 32, 16, True), (4, 9, 20, 8, False), (8, 5, 12, 12, False), (4, 3, 40, 40, True)],
)
def test_pack_quantized_matches_published_packing(tmp_path: Path, bits: int, n_out: int,
                                                  n_in: int, group: int, symmetric: bool) -> None:
    parts, expected = ref.pack_quantized(np.random.default_rng(n_in), bits, n_out, n_in, group,
                                         symmetric)
    config = {"quantization_config": {
        "quant_method": "compressed-tensors", "format": "pack-quantized",
        "config_groups": {"group_0": {"targets": ["Linear"], "weights": {
            "num_bits": bits, "group_size": group, "symmetric": symmetric,
            "strategy": "group"}}}}}
    path = ref.save(tmp_path / "model.safetensors", ref.prefixed(M, parts), config)
    _check(path, M, expected, f"pack-quantized-int{bits}")


def test_sharded_set_with_parts_in_different_shards(tmp_path: Path) -> None:
    rng = np.random.default_rng(11)
    up, up_expected = ref.gptq(rng, 4, 16, 32, 16, act=True)
    down, down_expected = ref.gptq(rng, 4, 32, 16, 8, act=False)
    d = "model.layers.0.mlp.down_proj"
    first = {f"{M}.qweight": up["qweight"], f"{M}.qzeros": up["qzeros"],
             f"{d}.qweight": down["qweight"]}
    second = {f"{M}.scales": up["scales"], f"{M}.g_idx": up["g_idx"],
              f"{d}.qzeros": down["qzeros"], f"{d}.scales": down["scales"],
              f"{d}.g_idx": down["g_idx"], f"{d}.bias": np.ones(32, np.float16)}
    ref.save(tmp_path / "model-00001-of-00002.safetensors", first)
    ref.save(tmp_path / "model-00002-of-00002.safetensors", second)
    weight_map = {**{k: "model-00001-of-00002.safetensors" for k in first},
                  **{k: "model-00002-of-00002.safetensors" for k in second}}
    index = tmp_path / "model.safetensors.index.json"
    index.write_text(json.dumps({"metadata": {}, "weight_map": weight_map}))
    checkpoint = load(index)
    np.testing.assert_allclose(checkpoint.tensors[f"{M}.weight"].read(), up_expected, rtol=1e-6)
    np.testing.assert_allclose(checkpoint.tensors[f"{d}.weight"].read(), down_expected,
                               rtol=1e-6)
    assert checkpoint.parameters == 16 * 32 + 32 * 16 + 32
    assert sorted(layer.name for layer in checkpoint.layers) == sorted([M, d])
    assert checkpoint.layer(d).bias == f"{d}.bias"  # type: ignore[union-attr]
    bookkeeping = {t.name for t in checkpoint.tensors.values() if t.role is TensorRole.BOOKKEEPING}
    assert f"{M}.qweight" in bookkeeping and f"{d}.scales" in bookkeeping


def test_mixed_checkpoint_keeps_float_layers(tmp_path: Path) -> None:
    parts, expected = ref.gptq(np.random.default_rng(5), 4, 8, 16, 16, act=False)
    head = np.random.default_rng(6).normal(size=(10, 8)).astype(np.float32)
    path = ref.save(tmp_path / "model.safetensors",
                    {**ref.prefixed(M, parts), "lm_head.weight": head})
    checkpoint = load(path)
    assert checkpoint.tensors["lm_head.weight"].stored_type is None
    np.testing.assert_array_equal(checkpoint.tensors["lm_head.weight"].read(), head)
    np.testing.assert_allclose(checkpoint.tensors[f"{M}.weight"].read(), expected, rtol=1e-6)
    assert checkpoint.parameters == head.size + expected.size


def test_whole_read_is_an_expansion_within_the_budget(tmp_path: Path) -> None:
    # A whole float32 copy of a packed layer is bytes the file does not store: refused past
    # the expansion budget (steelyard.budget), while row-block reads stay available.
    from steelyard.budget import Budget, using
    from steelyard.errors import LoadError

    parts, expected = ref.gptq(np.random.default_rng(9), 8, 1024, 512, 128, act=False)
    path = ref.save(tmp_path / "model.safetensors", ref.prefixed(M, parts))
    tensor = load(path).tensors[f"{M}.weight"]
    with using(Budget(expansion_bytes=2**20)):  # 2 MiB float32 from ~0.5 MiB stored
        with pytest.raises(LoadError, match="expansion budget"):
            tensor.read()
        np.testing.assert_allclose(tensor.read_part(0, 512 * 100),
                                   expected[:100].reshape(-1), rtol=1e-6)
    np.testing.assert_allclose(tensor.read(), expected, rtol=1e-6)


def test_fp4_worked_example(tmp_path: Path) -> None:
    # OCP Microscaling spec, FP4 E2M1: code 1 is 0.5, 7 is 6.0, 9 is -0.5, 15 is -6.0 (the
    # spec's value table, recalled). Byte 0x71 holds 1 (low nibble, first) then 7; byte 0xF9
    # holds 9 then 15. MXFP4 scale: E8M0 exponent 128 is 2**1 (bias 127).
    parts = {"weight_packed": np.array([[0x71, 0xF9]], np.uint8),
             "weight_scale": np.array([[128]], np.uint8)}
    path = ref.save(tmp_path / "model.safetensors", ref.prefixed(M, parts))
    _check(path, M, np.array([[1.0, 12.0, -1.0, -12.0]], np.float32), "mxfp4")


@pytest.mark.parametrize("kind", ["tensor", "channel", "block"])
def test_fp8_expert_stack_matches_per_expert_decoding(tmp_path: Path, kind: str) -> None:
    # A [experts, out, in] FP8 stack: each expert decoded on its own by the reference (OCP FP8
    # via ml_dtypes times that expert's scale) must equal the stack's view.
    import ml_dtypes

    rng = np.random.default_rng(14)
    experts, n_out, n_in, block = 3, 8, 12, (4, 8)
    w = rng.normal(size=(experts, n_out, n_in)).astype(ml_dtypes.float8_e4m3fn)
    shapes = {"tensor": (experts,), "channel": (experts, n_out, 1),
              "block": (experts, n_out // 4, -(-n_in // 8))}
    scale = rng.uniform(0.5, 2.0, size=shapes[kind]).astype(np.float32)
    expected = np.empty((experts, n_out, n_in), np.float32)
    for e in range(experts):
        for o in range(n_out):
            for i in range(n_in):
                if kind == "tensor":
                    s = scale[e]
                elif kind == "channel":
                    s = scale[e, o, 0]
                else:
                    s = scale[e, o // 4, i // 8]
                expected[e, o, i] = np.float32(w[e, o, i]) * s
    key = "weight_scale_inv" if kind == "block" else "weight_scale"
    config = {"quantization_config": {"quant_method": "fp8", "weight_block_size": list(block)}}
    name = "model.layers.0.mlp.experts.down_proj"
    path = ref.save(tmp_path / "model.safetensors", {f"{name}.weight": w, f"{name}.{key}": scale},
                    config)
    tensor = load(path).tensors[f"{name}.weight"]
    assert tensor.shape == (experts, n_out, n_in) and tensor.stored_type.startswith("fp8-e4m3")
    np.testing.assert_allclose(tensor.read(), expected, rtol=1e-6)
