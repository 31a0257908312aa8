"""GPTQ unpacking against a scalar packer written from AutoGPTQ's published ``pack()``
(recalled from memory: codes packed along the input axis, lowest bits first, 32 // bits per
int32 word; zero points packed along the output axis and stored minus one). The packer is
a plain Python loop, independent of the vectorised reader under test."""

from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from steelyard.errors import LoadError
from steelyard.loaders.packed import GptqWeight, Layout, detect_layout

PATH = Path("model.safetensors")


def _pack_rows(codes: np.ndarray, bits: int) -> np.ndarray:
    """Pack ``codes[k, m]`` along axis 0 into uint32 words, one Python step per code."""
    per = 32 // bits
    words = np.zeros((codes.shape[0] // per, codes.shape[1]), dtype=np.uint64)
    for i in range(codes.shape[0]):
        for j in range(codes.shape[1]):
            words[i // per, j] |= int(codes[i, j]) << (bits * (i % per))
    return words.astype(np.uint32).view(np.int32)


def _make(rng: np.random.Generator, bits: int, n_out: int, n_in: int, group: int, act: bool):
    groups = n_in // group
    q = rng.integers(0, 2**bits, size=(n_in, n_out))
    z = rng.integers(1, 2**bits, size=(groups, n_out))  # effective zeros; stored z - 1
    s = rng.uniform(0.01, 0.1, size=(groups, n_out)).astype(np.float16)
    g_idx = np.arange(n_in) // group
    if act:
        g_idx = rng.permutation(g_idx)
    parts = {
        "qweight": _pack_rows(q, bits),
        "qzeros": _pack_rows((z - 1).T, bits).T.copy(),
        "scales": s,
        "g_idx": g_idx.astype(np.int32),
    }
    expected = (s.astype(np.float32)[g_idx] * (q - z[g_idx])).T
    return parts, q.T, expected


@settings(max_examples=40, deadline=None)
@given(
    bits=st.sampled_from([2, 4, 8]),
    out_words=st.integers(1, 3),
    in_words=st.integers(1, 3),
    n_groups=st.sampled_from([1, 2]),
    act=st.booleans(),
    seed=st.integers(0, 2**16),
)
def test_dequantized_rows_match_packed_codes(bits, out_words, in_words, n_groups, act, seed):
    per = 32 // bits
    n_out, n_in = out_words * per, in_words * per * n_groups
    parts, codes, expected = _make(np.random.default_rng(seed), bits, n_out, n_in,
                                   n_in // n_groups, act)
    w = GptqWeight.build(PATH, "l", parts, bits, n_in // n_groups)
    assert w.shape == (n_out, n_in)
    assert np.array_equal(w.codes(), codes)
    whole = w.rows(0, n_out)
    np.testing.assert_allclose(whole, expected, rtol=1e-6, atol=1e-6)
    # Row blocks tile the whole matrix.
    half = n_out // 2
    np.testing.assert_array_equal(np.vstack([w.rows(0, half), w.rows(half, n_out)]), whole)


def test_group_size_without_g_idx_matches_explicit():
    parts, _, expected = _make(np.random.default_rng(1), 4, 8, 32, 16, act=False)
    del parts["g_idx"]
    w = GptqWeight.build(PATH, "l", parts, 4, 16)
    np.testing.assert_allclose(w.rows(0, 8), expected, rtol=1e-6)


@pytest.mark.parametrize(
    "change, bits, group",
    [
        ({}, 5, 16),                                          # unsupported bit width
        ({}, 3, 16),                                          # 4 rows: not whole 3-bit runs
        ({"scales": np.ones((2, 7), np.float16)}, 4, 16),      # scales lie about out
        ({"qzeros": np.zeros((5, 1), np.int32)}, 4, 16),       # zeros lie about groups
        ({"g_idx": np.full(32, 9, np.int32)}, 4, 16),          # g_idx past the groups
        ({"qweight": np.zeros(4, np.int32)}, 4, 16),           # 1-D qweight
    ],
)
def test_lying_parts_are_load_errors(change, bits, group):
    parts, _, _ = _make(np.random.default_rng(2), 4, 8, 32, 16, act=False)
    parts.update(change)
    with pytest.raises(LoadError):
        GptqWeight.build(PATH, "l", parts, bits, group)


def test_layout_from_config_or_suffixes():
    names = ["m.q_proj.qweight", "m.q_proj.qzeros", "m.q_proj.scales"]
    assert detect_layout(names, None) is Layout.GPTQ
    assert detect_layout(names, {"quant_method": "awq"}) is Layout.AWQ
    assert detect_layout(["m.weight"], None) is Layout.PLAIN
    parts, _, _ = _make(np.random.default_rng(3), 4, 8, 32, 16, act=False)
    assert GptqWeight.build(PATH, "l", parts, 4, 16).stored_type == "gptq-int4"
    assert detect_layout(["m.weight", "m.weight_scale_inv"], None) is Layout.FP8
    assert detect_layout(["m.weight", "m.scales", "m.biases"], None) is Layout.MLX
