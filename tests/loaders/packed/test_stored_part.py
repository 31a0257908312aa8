"""StoredPart: the lazily read stored tensor behind a packed weight's parts, against numpy's
own slicing of the same array (the reference), in runs small enough to cross rows; and parts
that lie about their size are refused before a byte of them is read."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from steelyard.errors import LoadError
from steelyard.loaders.packed import stored
from steelyard.loaders.packed.bnb import Bnb4Weight
from steelyard.loaders.packed.compressed import PackQuantizedWeight
from steelyard.loaders.packed.fp8 import Fp8Weight
from steelyard.loaders.packed.stored import StoredPart

PATH = Path("model.safetensors")


def _part(array: np.ndarray, reads: list[tuple[int, int]] | None = None) -> StoredPart:
    flat = array.reshape(-1)

    def read_span(start: int, stop: int) -> np.ndarray:
        if reads is not None:
            reads.append((start, stop))
        return flat[start:stop].copy()

    return StoredPart(PATH, "t", array.shape, array.dtype, read_span)


@settings(max_examples=80, deadline=None)
@given(rows=st.integers(1, 9), cols=st.integers(1, 9), r=st.tuples(st.integers(-10, 10),
       st.integers(-10, 10)), c=st.tuples(st.integers(-10, 10), st.integers(-10, 10)),
       run=st.integers(1, 64), seed=st.integers(0, 2**16))
def test_slices_equal_numpy(rows, cols, r, c, run, seed):
    array = np.random.default_rng(seed).integers(-2**31, 2**31, size=(rows, cols),
                                                 dtype=np.int64).astype(np.int32)
    original = stored.RUN_BYTES
    stored.RUN_BYTES = run  # runs of a few bytes: every column read crosses several runs
    try:
        part = _part(array)
        np.testing.assert_array_equal(part[r[0]:r[1]], array[r[0]:r[1]])
        np.testing.assert_array_equal(part[r[0]:r[1], c[0]:c[1]], array[r[0]:r[1], c[0]:c[1]])
        np.testing.assert_array_equal(np.asarray(part), array)
    finally:
        stored.RUN_BYTES = original


def test_column_reads_are_bounded_runs() -> None:
    array = np.arange(64 * 16, dtype=np.int32).reshape(64, 16)
    reads: list[tuple[int, int]] = []
    original = stored.RUN_BYTES
    stored.RUN_BYTES = 4 * 16 * 8  # eight whole rows per run
    try:
        np.testing.assert_array_equal(_part(array, reads)[:, 3:5], array[:, 3:5])
    finally:
        stored.RUN_BYTES = original
    assert len(reads) == 8 and all(stop - start <= 8 * 16 for start, stop in reads)


def _unreadable(shape: tuple[int, ...], dtype: type = np.float32) -> StoredPart:
    def read_span(start: int, stop: int) -> np.ndarray:
        raise AssertionError("a lying part was read before its size was checked")

    return StoredPart(PATH, "t", shape, np.dtype(dtype), read_span)


@pytest.mark.parametrize("build", [
    lambda: Fp8Weight.build(PATH, "l", np.zeros((4, 4), np.float32), _unreadable((10**6,))),
    lambda: Fp8Weight.build(PATH, "l", np.zeros((4, 4), np.float32), _unreadable((10, 10)),
                            (2, 2)),
    lambda: PackQuantizedWeight.build(PATH, "l", {
        "weight_packed": np.zeros((4, 1), np.int32), "weight_shape": np.array([4, 8]),
        "weight_scale": _unreadable((4, 10**6))}, {}),
])
def test_lying_sizes_refused_before_reading(build) -> None:
    with pytest.raises(LoadError):
        build()


def test_bnb_lying_code_map_refused_before_reading() -> None:
    import json

    state = np.frombuffer(json.dumps({"quant_type": "nf4", "blocksize": 64, "shape": [2, 4]})
                          .encode(), np.uint8)
    parts = {"weight": np.zeros((4, 1), np.uint8), "absmax": np.ones(1, np.float32),
             "quant_map": _unreadable((10**6,)), "quant_state.bitsandbytes__nf4": state}
    with pytest.raises(LoadError, match="16 codes"):
        Bnb4Weight.build(PATH, "l", parts)
