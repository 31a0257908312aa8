"""Quantized checkpoints written by the quantization libraries themselves, decoded by steelyard
and compared with each library's own dequantization of the same tensors, stored beside them:
``fixtures/gen_packed.py`` (compressed-tensors 0.20.1's pack-quantized, int-quantized and
float-quantized FP8 compressors and their ``decompress``) and ``fixtures/gen_bnb.py``
(bitsandbytes 0.50.2's ``quantize_4bit`` NF4/FP4 with and without double quantization, and
LLM.int8 ``int8_vectorwise_quant``; its ``dequantize_4bit`` / ``int8_vectorwise_dequant``) and
``fixtures/gen_awq.py`` (AutoAWQ 0.2.9's ``WQLinear_GEMM.from_linear`` packing and its
``dequantize_gemm``), ``fixtures/gen_gptq.py`` (AutoGPTQ 0.7.1's ``QuantLinear.pack``, act-order
included, and its CPU ``forward`` on the identity matrix) and ``fixtures/gen_mlx.py`` (MLX
0.32.4's ``mx.quantize`` at 2-8 bits, ``mx.save_safetensors`` and ``mx.dequantize``)."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from safetensors.numpy import load_file

from steelyard.api import load

FIXTURES = Path(__file__).resolve().parents[3] / "fixtures" / "packed"
CASES = sorted(p.name for p in FIXTURES.iterdir() if p.is_dir()) if FIXTURES.is_dir() else []
STORED = {
    "ct-w4-g16-asym": "pack-quantized-int4",
    "ct-w4-g32-sym": "pack-quantized-int4",
    "ct-w8-channel-sym": "pack-quantized-int8",
    "ct-int8-g8-asym": "int-quantized-int8",
    "ct-fp8-channel": "fp8-e4m3-channel",
    "ct-fp8-block": "fp8-e4m3-block",
    "ct-nvfp4": "nvfp4",
    "ct-mxfp4": "mxfp4",
    "bnb-nf4-dq": "bnb-nf4-dq",
    "bnb-nf4": "bnb-nf4",
    "bnb-fp4": "bnb-fp4",
    "bnb-int8": "bnb-int8",
    "bnb-nf4-bf16-storage": "bnb-nf4-dq",
    "awq-g16": "awq-int4",
    "awq-g32": "awq-int4",
    "gptq-w4-g16": "gptq-int4",
    "gptq-w4-g32-act": "gptq-int4",
    "gptq-w8-g32": "gptq-int8",
    "gptq-w2-g16-act": "gptq-int2",
    "gptq-w3-g32": "gptq-int3",
    "mlx-w4-g64": "mlx-int4-g64",
    "mlx-w2-g32": "mlx-int2-g32",
    "mlx-w8-g32": "mlx-int8-g32",
    "mlx-w3-g32": "mlx-int3-g32",
    "mlx-w5-g64": "mlx-int5-g64",
    "mlx-w6-g32": "mlx-int6-g32",
    "mlx-moe-w4-g32": "mlx-int4-g32",
}


def test_fixtures_are_present() -> None:
    assert set(STORED) <= set(CASES)


@pytest.mark.parametrize("case", CASES)
def test_library_writer_and_reader_agree_with_steelyard(case: str) -> None:
    folder = FIXTURES / case
    checkpoint = load(folder / "model.safetensors")
    expected_file = load_file(str(folder / "expected.safetensors"))
    (name, expected), = expected_file.items()
    tensor = checkpoint.tensors[name]
    assert tensor.stored_type == STORED[case]
    bias = checkpoint.tensors.get(name.removesuffix("weight") + "bias")
    assert tensor.shape == expected.shape
    assert checkpoint.parameters == expected.size + (bias.size if bias is not None else 0)
    got = tensor.read()
    if case in ("ct-nvfp4", "ct-mxfp4"):
        # The library dequantizes FP4 in bfloat16: rounded to it, steelyard's values are its.
        import ml_dtypes

        rounded = got.astype(ml_dtypes.bfloat16).astype(np.float32)
        np.testing.assert_array_equal(rounded, expected)
    elif case.startswith(("ct-", "awq-", "gptq-")):
        # These libraries dequantize in the scales' float16; steelyard keeps float32.
        # Rounded to float16, every value must be the library's exactly.
        np.testing.assert_array_equal(got.astype(np.float16).astype(np.float32), expected)
    elif case.startswith("mlx-"):
        # MLX computes float16(float16(scale * q) + bias): two float16 roundings, each at most
        # half a float16 step of its result; steelyard's float32 differs by no more. A wrong
        # code would be off by a whole scale (about 1e-2 here), far beyond this bound.
        group = json.loads((folder / "config.json").read_text())["quantization"]["group_size"]
        bias = load_file(str(folder / "model.safetensors"))[name.removesuffix("weight") + "biases"]
        bias = np.repeat(bias.astype(np.float32), group, axis=-1)

        def half_step(x: np.ndarray) -> np.ndarray:
            return 0.5 * np.spacing(np.abs(x).astype(np.float16)).astype(np.float32)

        bound = half_step(got - bias) + half_step(expected)
        assert np.all(np.abs(got - expected) <= bound * 1.01)
    elif case == "bnb-int8":
        # The library multiplies by a float32 1/127, steelyard divides by 127: one rounding.
        np.testing.assert_allclose(got, expected, rtol=2e-7, atol=0)
    else:
        np.testing.assert_array_equal(got, expected)  # bitsandbytes 4-bit: float32, exact
    assert [layer.name for layer in checkpoint.layers] == [name.removesuffix(".weight")]
    # A span starting and ending inside rows (and inside packed words) is the same values.
    a, b = 3, got.size - 5
    np.testing.assert_array_equal(tensor.read_part(a, b), got.reshape(-1)[a:b])
