"""The screened Gram search of ``twin-units`` against the exact one, and its bound.

The screen projects rows onto Gaussian directions and confirms only pairs whose projected
cosine passes :func:`screen_limit`. The limit rests on the chi-square tail bounds of Laurent
& Massart (2000, "Adaptive estimation of a quadratic functional by model selection", Ann.
Statist. 28, Lemma 1), checked here against fresh Gaussian draws; the search itself against
the exact blocked search (``exact_pairs``, itself checked against numpy's full Gram matrix in
``test_twin_units.py``) on the invented backgrounds of ``test_twin_search.py``.
"""

from __future__ import annotations

import numpy as np
import pytest

from steelyard.rules import _similarity
from steelyard.rules._rows import Rows, Tally
from steelyard.rules._similarity import exact_pairs
from steelyard.rules._twin_search import SCREEN_DIMENSIONS, screen_limit, similar_pairs
from tests.rules.test_twin_search import KINDS, THRESHOLD, _at_cosine, _planted


def _projected_cosines(rng: np.random.Generator, cos: float, dimensions: int, pairs: int) -> np.ndarray:
    """Cosines after projecting ``pairs`` unit pairs at ``cos`` onto ``dimensions`` N(0, 1)
    directions. Rotation invariance makes any pair equivalent to (e1, c·e1 + s·e2), whose
    projections are g1 and c·g1 + s·g2 for independent standard normal g1, g2."""
    g1 = rng.standard_normal((pairs, dimensions))
    g2 = rng.standard_normal((pairs, dimensions))
    y = cos * g1 + np.sqrt(1.0 - cos**2) * g2
    return np.asarray(
        np.einsum("ij,ij->i", g1, y) / np.sqrt(np.einsum("ij,ij->i", g1, g1) * np.einsum("ij,ij->i", y, y))
    )


@pytest.mark.parametrize(("dimensions", "miss"), [(16, 0.2), (32, 0.01), (128, 1e-3), (128, 1e-9)])
@pytest.mark.parametrize("cos", [0.9, 0.995, 0.9999])
def test_the_screen_keeps_pairs_at_the_threshold_at_least_as_often_as_promised(
    dimensions: int, miss: float, cos: float
) -> None:
    limit = screen_limit(cos, dimensions, miss)
    projected = _projected_cosines(np.random.default_rng(7), cos, dimensions, 200_000)
    dropped = float(np.mean(projected < limit))
    # A union bound of three tail bounds: the observed rate sits far below it (with 200,000
    # draws, a rate of `miss` would show as at least miss/2 unless miss < 1e-5).
    assert dropped <= max(miss, 0.0) if miss >= 1e-5 else dropped == 0.0
    assert limit < cos  # the screen only loosens


def test_the_screen_limit_still_separates_unrelated_rows() -> None:
    # What makes the screen pay: at the rule's default, unrelated rows and rows at cosine 0.8
    # (trained rows sharing directions) almost never pass.
    limit = screen_limit(THRESHOLD)
    assert 0.9 < limit < THRESHOLD
    rng = np.random.default_rng(11)
    for cos in (0.0, 0.5, 0.8):
        passed = np.mean(_projected_cosines(rng, cos, SCREEN_DIMENSIONS, 100_000) >= limit)
        assert passed <= 1e-4, cos
    assert screen_limit(0.995, dimensions=8, miss=1e-9) == -1.0  # too few directions: no bound


def _searched(
    rows: Rows, negative: bool, usable: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray, np.ndarray, str]:
    tally = Tally()
    found = similar_pairs(rows, THRESHOLD, negative, 512, seed=3, usable=usable, tally=tally)
    assert found[3] == tally.method
    return found


@pytest.mark.parametrize("negative", [False, True])
@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize(("units", "width"), [(512, 576), (384, 2304), (200, 4608)])
def test_screened_search_equals_the_exact_search(kind: str, negative: bool, units: int, width: int) -> None:
    rng = np.random.default_rng(units + width)
    raw = _planted(rng, kind, units, width).astype(np.float32)
    rows = Rows.of(raw)
    first, second, cos, method = _searched(rows, negative)
    a, b, ref = exact_pairs(rows, THRESHOLD, negative)
    assert method == "screened"
    np.testing.assert_array_equal(first, a)
    np.testing.assert_array_equal(second, b)
    np.testing.assert_allclose(cos, ref, atol=1e-6)
    assert a.size >= units // 8  # the planted pairs (and background twins) were there to find


def test_screened_search_with_a_bias_column_a_subset_and_extreme_scales() -> None:
    rng = np.random.default_rng(5)
    units, width = 400, 1024
    raw = rng.normal(size=(units, width)).astype(np.float32)
    bias = rng.normal(size=units).astype(np.float32)
    for a, b, cos in ((0, 1, 0.9951), (2, 3, 0.9999), (4, 5, 0.996), (6, 7, 0.99)):
        joint = np.append(raw[a], bias[a])
        twin = _at_cosine(rng, joint, cos)
        raw[b], bias[b] = twin[:-1], twin[-1]
    # Rows far from unit scale are projected normalised: a pair of rows of 1e-30 (products
    # underflow in float32) and one of 1e25 (products overflow) are still found.
    raw[10], raw[11] = raw[0] * 1e-30, raw[1] * 1e-30
    bias[10], bias[11] = bias[0] * 1e-30, bias[1] * 1e-30
    raw[12], raw[13] = raw[2] * 1e25, raw[3] * 1e25
    bias[12], bias[13] = bias[2] * 1e25, bias[3] * 1e25
    joint = np.concatenate([raw, bias[:, None]], axis=1).astype(np.float64)
    rows = Rows(raw, np.sqrt(np.einsum("ij,ij->i", joint, joint)), bias)
    usable = np.ones(units, dtype=bool)
    usable[4] = False  # left out: its pair with 5 must not appear
    first, second, _cos, method = _searched(rows, negative=False, usable=usable)
    assert method == "screened"
    members = np.flatnonzero(usable)
    a, b, _ = _similarity.exact_among(rows, members, THRESHOLD, False, Tally())
    np.testing.assert_array_equal(first, a)
    np.testing.assert_array_equal(second, b)
    pairs = set(zip(first.tolist(), second.tolist(), strict=True))
    assert {(0, 1), (2, 3), (10, 11), (12, 13), (0, 10), (2, 12)} <= pairs
    assert (4, 5) not in pairs and (6, 7) not in pairs


def test_narrow_or_few_rows_keep_the_exact_search() -> None:
    rng = np.random.default_rng(9)
    for units, width in ((512, 256), (64, 4608)):
        tally = Tally()
        rows = Rows.of(rng.normal(size=(units, width)).astype(np.float32))
        similar_pairs(rows, THRESHOLD, False, 512, tally=tally)
        assert tally.method == "exact", (units, width)


def test_a_layer_of_near_copies_is_searched_exactly() -> None:
    # Every pair passes the screen: confirming them one by one would cost more than the Gram.
    rng = np.random.default_rng(13)
    base = rng.normal(size=(1, 1024))
    rows = Rows.of((base + 1e-3 * rng.normal(size=(512, 1024))).astype(np.float32))
    first, second, _cos, method = _searched(rows, negative=False)
    assert method == "exact"
    a, b, _ = exact_pairs(rows, THRESHOLD)
    np.testing.assert_array_equal(first, a)
    np.testing.assert_array_equal(second, b)


def test_the_hashed_search_finds_twins_among_rows_of_extreme_scale() -> None:
    # Rows of 1e-30 (float32 products underflow) and 1e25 (they overflow) are compared
    # normalised; before, their pairs vanished from the hashed search's confirmations.
    rng = np.random.default_rng(17)
    raw = rng.normal(size=(3000, 64)).astype(np.float32)
    for scale, (a, b) in ((1e-30, (10, 20)), (1e25, (30, 40)), (1.0, (50, 60))):
        raw[b] = _at_cosine(rng, raw[a], 0.9995)
        raw[a] *= scale
        raw[b] *= scale * 2.0
    rows = Rows.of(raw)
    tally = Tally()
    first, second, _ = _similarity.candidate_pairs(rows, THRESHOLD, tally=tally)
    assert tally.method == "hashed"
    found = set(zip(first.tolist(), second.tolist(), strict=True))
    assert {(10, 20), (30, 40), (50, 60)} <= found


@pytest.mark.parametrize(("units", "width"), [(304, 64), (400, 1024), (1504, 96)])
def test_rows_with_folding_factors_search_as_the_folded_rows(units: int, width: int) -> None:
    # twin-units hands the searches the stored rows and a batch norm's factors a_j instead
    # of a folded copy; every search (exact, screened, hashed) must see the folded rows:
    # the same float32 values (taken rows bit for bit) and the same pairs.
    rng = np.random.default_rng(units)
    # Twins planted among the deployed (folded) rows, stored divided by a_j.
    planted = _planted(rng, "correlated", units, width).astype(np.float32)
    scale = rng.uniform(0.2, 3.0, units).astype(np.float32) * rng.choice([-1, 1], units).astype(np.float32)
    raw = (planted / scale[:, None]).astype(np.float32)
    bias = 1e-4 * rng.normal(size=units).astype(np.float32)
    folded = np.multiply(raw, scale[:, None], dtype=np.float32)  # stats.folded's product
    joint = np.concatenate([folded, bias[:, None]], axis=1).astype(np.float64)
    norms = np.sqrt(np.einsum("ij,ij->i", joint, joint))
    plain, factored = Rows(folded, norms, bias), Rows(raw, norms, bias, scale)
    some = rng.choice(units, 50, replace=False)
    np.testing.assert_array_equal(factored.take(some, np.float32), plain.take(some, np.float32))
    np.testing.assert_array_equal(factored.take(some), plain.take(some))
    for negative in (False, True):
        a = similar_pairs(plain, THRESHOLD, negative, 512, seed=3)
        b = similar_pairs(factored, THRESHOLD, negative, 512, seed=3)
        assert a[3] == b[3]
        np.testing.assert_array_equal(a[0], b[0])
        np.testing.assert_array_equal(a[1], b[1])
        np.testing.assert_allclose(a[2], b[2], atol=1e-6)
        assert a[0].size >= units // 8
