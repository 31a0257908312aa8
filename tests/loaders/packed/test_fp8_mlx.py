"""FP8-with-scales and MLX grouped weights.

FP8: the e4m3/e5m2 bytes are decoded by ml_dtypes (reference for OCP FP8) and the scale of
each element is looked up by a plain Python loop over (row, column) -> tile, independent of
the vectorised reader. MLX: a worked example from MLX's published quantize description
(w = scale * q + bias per group of consecutive inputs; codes packed lowest bits first along
the input axis), plus a scalar packer for random shapes."""

from pathlib import Path

import ml_dtypes
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from steelyard.errors import LoadError
from steelyard.loaders.packed.fp8 import Fp8Weight
from steelyard.loaders.packed.mlx import MlxWeight

PATH = Path("model.safetensors")


@settings(max_examples=30, deadline=None)
@given(n_out=st.integers(1, 20), n_in=st.integers(1, 20), kind=st.sampled_from(
    ["tensor", "channel", "block"]), fmt=st.sampled_from(["e4m3", "e5m2"]),
    seed=st.integers(0, 2**16))
def test_fp8_rows_match_elementwise_reference(n_out, n_in, kind, fmt, seed):
    rng = np.random.default_rng(seed)
    dtype = ml_dtypes.float8_e4m3fn if fmt == "e4m3" else ml_dtypes.float8_e5m2
    w = rng.normal(size=(n_out, n_in)).astype(dtype)
    block = (4, 8) if kind == "block" else None
    shape = {"tensor": (), "channel": (n_out, 1), "block": (-(-n_out // 4), -(-n_in // 8))}[kind]
    scale = rng.uniform(0.5, 2.0, size=shape).astype(np.float32)
    fw = Fp8Weight.build(PATH, "l", w, scale, block)
    # One output row: a per-channel scale is one scale; either reading gives the same values.
    assert fw.granularity == kind or (kind == "channel" and n_out == 1)
    expected = np.empty((n_out, n_in), np.float32)
    for r in range(n_out):
        for c in range(n_in):
            if kind == "tensor":
                s = scale
            elif kind == "channel":
                s = scale[r, 0]
            else:
                s = scale[r // 4, c // 8]
            expected[r, c] = float(w[r, c]) * float(s)
    cut = n_out // 2
    np.testing.assert_allclose(np.vstack([fw.rows(0, cut), fw.rows(cut, n_out)]), expected,
                               rtol=1e-6)


@pytest.mark.parametrize("scale, block", [
    (np.ones((3, 1), np.float32), None),        # neither one scale nor one per row (5 rows)
    (np.ones((1, 1), np.float32), (128, 128)),  # block scales that do not tile
    (np.ones((1, 1), np.float32), (0, 128)),    # zero block size
])
def test_fp8_lying_scales_refused(scale, block):
    w = np.zeros((5, 300), ml_dtypes.float8_e4m3fn)
    with pytest.raises(LoadError):
        Fp8Weight.build(PATH, "l", w, scale, block)


def test_mlx_worked_example():
    # One row, 8 inputs, 4-bit, groups of 4: codes 0..7; group 0 scale 0.5 bias -1,
    # group 1 scale 2 bias 3. Word = sum(code_k << 4k) = 0x76543210.
    parts = {"weight": np.array([[0x76543210]], np.uint32),
             "scales": np.array([[0.5, 2.0]], np.float16),
             "biases": np.array([[-1.0, 3.0]], np.float16)}
    w = MlxWeight.build(PATH, "l", parts, 4, 4)
    expected = [-1.0, -0.5, 0.0, 0.5, 11.0, 13.0, 15.0, 17.0]  # worked by hand
    np.testing.assert_array_equal(w.rows(0, 1)[0], expected)


@settings(max_examples=30, deadline=None)
@given(bits=st.sampled_from([2, 4, 8]), n_out=st.integers(1, 6), groups=st.integers(1, 3),
       seed=st.integers(0, 2**16))
def test_mlx_rows_match_scalar_packer(bits, n_out, groups, seed):
    rng = np.random.default_rng(seed)
    group = 32 // bits * 2
    n_in = groups * group
    q = rng.integers(0, 2**bits, size=(n_out, n_in))
    words = np.zeros((n_out, n_in * bits // 32), np.uint64)
    for r in range(n_out):
        for c in range(n_in):
            words[r, c * bits // 32] |= int(q[r, c]) << (bits * (c % (32 // bits)))
    s = rng.uniform(0.1, 1, size=(n_out, groups)).astype(np.float16)
    b = rng.uniform(-1, 1, size=(n_out, groups)).astype(np.float16)
    w = MlxWeight.build(PATH, "l", {"weight": words.astype(np.uint32), "scales": s,
                                    "biases": b}, bits, group)
    assert np.array_equal(w.codes(), q)
    g = np.arange(n_in) // group
    expected = s.astype(np.float32)[:, g] * q + b.astype(np.float32)[:, g]
    np.testing.assert_allclose(w.rows(0, n_out), expected, rtol=1e-6, atol=1e-6)


@pytest.mark.parametrize("bits, group, scales_shape", [(7, 4, (1, 2)), (3, 4, (1, 2)), (4, 3, (1, 2)),
                                                       (4, 4, (1, 3))])
def test_mlx_lying_parts_refused(bits, group, scales_shape):
    parts = {"weight": np.zeros((1, 1), np.uint32), "scales": np.ones(scales_shape, np.float16),
             "biases": np.ones(scales_shape, np.float16)}
    with pytest.raises(LoadError):
        MlxWeight.build(PATH, "l", parts, bits, group)


def test_stored_type_names_layout_and_width():
    import ml_dtypes as md  # reference for the FP8 encodings' names

    w = np.zeros((2, 2), md.float8_e5m2)
    assert Fp8Weight.build(PATH, "l", w, np.ones(2, np.float32)).stored_type == "fp8-e5m2-channel"
    parts = {"weight": np.zeros((1, 1), np.uint32), "scales": np.ones((1, 2), np.float16),
             "biases": np.ones((1, 2), np.float16)}
    assert MlxWeight.build(PATH, "l", parts, 4, 4).stored_type == "mlx-int4-g4"
