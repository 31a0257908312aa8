"""AWQ unpacking against a scalar packer written from AutoAWQ's published GEMM ``pack()``
(recalled from memory: eight 4-bit codes per int32 along the output axis, slot k holding
column ORDER[k] with ORDER = 0,2,4,6,1,3,5,7; zero points packed alike, not offset)."""

from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from steelyard.errors import LoadError
from steelyard.loaders.packed.awq import AwqWeight

PATH = Path("model.safetensors")
AWQ_ORDER = [0, 2, 4, 6, 1, 3, 5, 7]  # AutoAWQ's order map, from memory


def _pack_cols(codes: np.ndarray) -> np.ndarray:
    rows, cols = codes.shape
    words = np.zeros((rows, cols // 8), dtype=np.uint64)
    for c in range(cols // 8):
        for slot in range(8):
            words[:, c] |= codes[:, c * 8 + AWQ_ORDER[slot]].astype(np.uint64) << (4 * slot)
    return words.astype(np.uint32).view(np.int32)


def _make(seed: int, n_out: int, n_in: int, group: int):
    rng = np.random.default_rng(seed)
    q = rng.integers(0, 16, size=(n_in, n_out))
    z = rng.integers(0, 16, size=(n_in // group, n_out))
    s = rng.uniform(0.01, 0.1, size=(n_in // group, n_out)).astype(np.float16)
    g = np.arange(n_in) // group
    parts = {"qweight": _pack_cols(q), "qzeros": _pack_cols(z), "scales": s}
    return parts, q.T, (s.astype(np.float32)[g] * (q - z[g])).T


@settings(max_examples=30, deadline=None)
@given(out_words=st.integers(1, 3), groups=st.integers(1, 3), group=st.sampled_from([4, 8]),
       seed=st.integers(0, 2**16), cut=st.integers(0, 24))
def test_rows_match_reference(out_words, groups, group, seed, cut):
    n_out, n_in = out_words * 8, groups * group
    parts, codes, expected = _make(seed, n_out, n_in, group)
    w = AwqWeight.build(PATH, "l", parts, 4, group)
    assert w.shape == (n_out, n_in)
    assert np.array_equal(w.codes(), codes)
    cut = min(cut, n_out)  # a row block that starts or ends inside a packed word
    both = np.vstack([w.rows(0, cut), w.rows(cut, n_out)])
    np.testing.assert_allclose(both, expected, rtol=1e-6, atol=1e-7)


@pytest.mark.parametrize("change, bits, group", [
    ({}, 8, 4),                                         # AWQ GEMM is 4-bit only
    ({}, 4, 5),                                         # group size does not divide in
    ({"scales": np.ones((1, 16), np.float16)}, 4, 4),    # scales lie about out
    ({"qzeros": np.zeros((3, 1), np.int32)}, 4, 4),      # zeros lie about groups
])
def test_lying_parts_are_load_errors(change, bits, group):
    parts, _, _ = _make(0, 8, 8, 4)
    parts.update(change)
    with pytest.raises(LoadError):
        AwqWeight.build(PATH, "l", parts, bits, group)
