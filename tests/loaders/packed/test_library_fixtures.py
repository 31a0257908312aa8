"""Quantized checkpoints written by the quantization library itself (``fixtures/gen_packed.py``:
compressed-tensors 0.20.1's own pack-quantized, int-quantized and float-quantized (FP8)
compressors), decoded by steelyard and compared with the library's own ``decompress`` of the
same tensors, stored beside them."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from safetensors.numpy import load_file

from steelyard.api import load

FIXTURES = Path(__file__).resolve().parents[3] / "fixtures" / "packed"
CASES = sorted(p.name for p in FIXTURES.iterdir() if p.is_dir()) if FIXTURES.is_dir() else []
M = "model.layers.0.mlp.up_proj"
STORED = {
    "ct-w4-g16-asym": "pack-quantized-int4",
    "ct-w4-g32-sym": "pack-quantized-int4",
    "ct-w8-channel-sym": "pack-quantized-int8",
    "ct-int8-g8-asym": "int-quantized-int8",
    "ct-fp8-channel": "fp8-e4m3-channel",
}


def test_fixtures_are_present() -> None:
    assert set(STORED) <= set(CASES)


@pytest.mark.parametrize("case", CASES)
def test_compressed_tensors_writer_and_reader_agree_with_steelyard(case: str) -> None:
    folder = FIXTURES / case
    checkpoint = load(folder / "model.safetensors")
    tensor = checkpoint.tensors[f"{M}.weight"]
    expected = load_file(str(folder / "expected.safetensors"))[f"{M}.weight"]
    assert tensor.stored_type == STORED[case]
    assert tensor.shape == expected.shape and checkpoint.parameters == expected.size
    got = tensor.read()
    # The library dequantizes in the scales' float16; steelyard keeps float32. Rounded to
    # float16, every value must be the library's exactly.
    np.testing.assert_array_equal(got.astype(np.float16).astype(np.float32), expected)
    assert [layer.name for layer in checkpoint.layers] == [M]
