"""``tiled_copy.contiguous`` against ``numpy.ascontiguousarray`` (the reference: numpy's own
contiguous copy) on strided views of the kinds loaders make: transposes, axis permutations
of convolution kernels, column windows, negative steps, size-one and empty axes, with and
without a dtype change. The slab budget is lowered so that small arrays take every branch."""

from __future__ import annotations

import numpy as np
import pytest

from steelyard import tiled_copy
from steelyard.tiled_copy import contiguous


def _views(rng: np.random.Generator) -> list[tuple[str, np.ndarray]]:
    matrix = rng.standard_normal((96, 200)).astype(np.float32)
    kernel = rng.standard_normal((3, 5, 24, 40)).astype(np.float32)
    half = rng.standard_normal((64, 130)).astype(np.float16)
    cube = rng.standard_normal((40, 6, 32)).astype(np.float32)
    return [
        ("transpose", matrix.T),
        ("transpose of a column window", matrix[:, 37:151].T),
        ("negative steps", matrix[::-1, ::-2].T),
        ("every third row", matrix[1::3]),
        ("keras kernel to [out, in, kh, kw]", kernel.transpose(3, 2, 0, 1)),
        ("keras kernel, one tap", kernel[1:2, :, :, 7:8].transpose(3, 2, 0, 1)),
        ("heads last to heads first", cube.transpose(1, 2, 0)),
        ("float16 transposed", half.T),
        ("empty axis", matrix[:0].T),
        ("one column", matrix[:, 5:6].T),
        ("contiguous", matrix),
    ]


@pytest.mark.parametrize("budget", [64, 1000, 4096, 2**20])
@pytest.mark.parametrize("dtype", [None, np.float32, np.float64])
def test_equals_numpy_contiguous_copy(
    monkeypatch: pytest.MonkeyPatch, budget: int, dtype: type | None
) -> None:
    monkeypatch.setattr(tiled_copy, "SLAB_BYTES", budget)
    for name, view in _views(np.random.default_rng(budget)):
        got = contiguous(view, dtype)
        expected = np.ascontiguousarray(view, dtype=dtype)
        assert got.flags.c_contiguous, name
        assert got.dtype == expected.dtype, name
        assert got.shape == expected.shape, name
        # bit for bit: a copy (and numpy's own cast) must not change one value
        assert got.tobytes() == expected.tobytes(), name


def test_slabs_are_cut_and_the_source_is_untouched(monkeypatch: pytest.MonkeyPatch) -> None:
    """With a small budget the copy really goes slab by slab (counted), and the view's base
    is not written."""
    monkeypatch.setattr(tiled_copy, "SLAB_BYTES", 512)
    source = np.arange(64 * 48, dtype=np.float32).reshape(64, 48)
    before = source.copy()
    calls = 0
    original = tiled_copy._copy_into

    def counting(out: np.ndarray, view: np.ndarray) -> None:
        nonlocal calls
        calls += 1
        original(out, view)

    monkeypatch.setattr(tiled_copy, "_copy_into", counting)
    got = contiguous(source.T)
    assert np.array_equal(got, source.T)
    assert np.array_equal(source, before)
    assert calls > 4  # 64 rows of 192 bytes: several slabs of at most 512 source bytes


def test_contiguous_input_is_returned_without_copy() -> None:
    matrix = np.ones((300, 400), dtype=np.float32)
    assert contiguous(matrix) is matrix
    assert contiguous(matrix, np.float32) is matrix
