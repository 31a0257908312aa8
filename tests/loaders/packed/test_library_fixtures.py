"""Packed checkpoints written by the quantization library itself (``fixtures/gen_packed.py``:
compressed-tensors' own ``PackedQuantizationCompressor.compress``), decoded by steelyard and
compared with the library's own ``decompress`` of the same tensors, stored beside them."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from safetensors.numpy import load_file

from steelyard.api import load

FIXTURES = Path(__file__).resolve().parents[3] / "fixtures" / "packed"
CASES = sorted(p.name for p in FIXTURES.iterdir() if p.is_dir()) if FIXTURES.is_dir() else []
M = "model.layers.0.mlp.up_proj"


def test_fixtures_are_present() -> None:
    assert {"ct-w4-g16-asym", "ct-w4-g32-sym", "ct-w8-channel-sym"} <= set(CASES)


@pytest.mark.parametrize("case", CASES)
def test_compressed_tensors_writer_and_reader_agree_with_steelyard(case: str) -> None:
    folder = FIXTURES / case
    checkpoint = load(folder / "model.safetensors")
    tensor = checkpoint.tensors[f"{M}.weight"]
    expected = load_file(str(folder / "expected.safetensors"))[f"{M}.weight"]
    bits = 8 if "w8" in case else 4
    assert tensor.stored_type == f"pack-quantized-int{bits}"
    assert tensor.shape == expected.shape and checkpoint.parameters == expected.size
    got = tensor.read()
    # The library dequantizes in the scales' float16; steelyard keeps float32. Rounded to
    # float16, every value must be the library's exactly.
    np.testing.assert_array_equal(got.astype(np.float16).astype(np.float32), expected)
    assert [layer.name for layer in checkpoint.layers] == [M]
