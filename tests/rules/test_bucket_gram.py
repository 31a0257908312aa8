"""The bucket confirmation of the hashed twin search, buckets stacked by size into batched
Gram products, against numpy: every pair inside a bucket whose float64 cosine
(``numpy.dot`` of rows normalised by ``numpy.linalg.norm``) passes the threshold is found,
with its float32 cosine, and no pair across buckets. Cosines are drawn away from the
threshold so that float32 and float64 agree on every pair."""

from __future__ import annotations

import numpy as np
import pytest

from steelyard.rules import _bucket_gram
from steelyard.rules._bucket_gram import BUCKET_CAP, PAIRED, bucket_hits
from steelyard.rules._rows import Rows, Tally

THRESHOLD = 0.995


def _layer(rng: np.random.Generator, sizes: list[int], width: int) -> tuple[np.ndarray, np.ndarray]:
    """Rows in buckets of the given sizes (``bucket`` of every row); within each bucket some
    rows are near copies (cosine >= 0.999) of the bucket's first row, the others at most 0.9
    from every row, and rows scaled by factors from 1e-3 to 1e3."""
    rows, bucket = [], []
    for number, size in enumerate(sizes):
        base = rng.standard_normal(width)
        for member in range(size):
            if member % 3 == 0:
                row = base + 0.02 * rng.standard_normal(width) * np.linalg.norm(base) / np.sqrt(
                    width
                )
            else:
                row = rng.standard_normal(width)
            rows.append(row * 10.0 ** rng.uniform(-3, 3))
            bucket.append(number)
    order = rng.permutation(len(rows))  # buckets' rows spread over the layer
    matrix = np.asarray(rows)[order]
    return matrix.astype(np.float32), np.asarray(bucket)[order]


def _expected(matrix: np.ndarray, bucket: np.ndarray) -> set[tuple[int, int]]:
    unit = matrix.astype(np.float64)
    unit /= np.linalg.norm(unit, axis=1, keepdims=True)
    pairs = set()
    for number in np.unique(bucket):
        members = np.flatnonzero(bucket == number)
        if members.size <= PAIRED or members.size > BUCKET_CAP:
            continue
        cos = unit[members] @ unit[members].T
        assert not np.any(np.abs(cos - THRESHOLD) < 1e-3), "a pair too near the threshold"
        for i, k in zip(*np.nonzero(np.triu(cos >= THRESHOLD, 1)), strict=True):
            pairs.add((int(members[i]), int(members[k])))
    return pairs


@pytest.mark.parametrize("stack_bytes", [1, 2**14, 2**21])
def test_stacked_buckets_find_every_pair_numpy_finds(
    monkeypatch: pytest.MonkeyPatch, rng: np.random.Generator, stack_bytes: int
) -> None:
    """One bucket per stack, a few per stack, and many per stack give the same pairs."""
    monkeypatch.setattr(_bucket_gram, "STACK_BYTES", stack_bytes)
    sizes = [5, 6, 9, 17, 33, 64, 64, 100, 128, 3, 2, 12, 40]
    matrix, bucket = _layer(rng, sizes, 96)
    view = Rows.of(matrix)
    order = np.argsort(bucket, kind="stable")
    tally = Tally()
    first, second, cosines = (
        np.concatenate(part) for part in bucket_hits(view, (bucket, order), THRESHOLD, False, tally)
    )
    found = set(zip(first.tolist(), second.tolist(), strict=True))
    expected = _expected(matrix, bucket)
    assert len(expected) > 50 and found == expected
    assert len(found) == first.size  # each pair once
    unit = matrix.astype(np.float64) / np.linalg.norm(
        matrix.astype(np.float64), axis=1, keepdims=True
    )
    np.testing.assert_allclose(cosines, np.einsum("ij,ij->i", unit[first], unit[second]), atol=1e-5)
    confirmed = sum(s * s for s in sizes if PAIRED < s <= BUCKET_CAP)
    assert tally.dots == confirmed  # the padding of a stack is not counted as work
    assert tally.largest == max(s for s in sizes if s <= BUCKET_CAP)


def test_rows_of_extreme_scale_are_compared_normalised(rng: np.random.Generator) -> None:
    """A bucket holding rows whose raw products leave float32 (norms near 1e-25 and 1e25)
    still yields its pairs: that stack falls back to normalised rows."""
    matrix, bucket = _layer(rng, [8, 20, 7], 64)
    matrix = matrix.astype(np.float64)
    first_bucket = np.flatnonzero(bucket == 1)
    matrix[first_bucket[:4]] *= 1e-25
    matrix[first_bucket[4:8]] *= 1e25
    matrix = matrix.astype(np.float32)
    view = Rows.of(matrix)
    order = np.argsort(bucket, kind="stable")
    hits = bucket_hits(view, (bucket, order), THRESHOLD, False, Tally())
    first, second = (np.concatenate(part) for part in hits[:2])
    expected = _expected(matrix, bucket)
    assert any(a in first_bucket and b in first_bucket for a, b in expected)
    assert set(zip(first.tolist(), second.tolist(), strict=True)) == expected
