"""The spread of fan-in norms the reports draw: numpy's percentiles and Tukey's far-out
fences (Tukey 1977, Exploratory Data Analysis: beyond Q1 − 3·IQR or Q3 + 3·IQR), on the
logarithms of the positive norms' quartiles."""

from __future__ import annotations

import numpy as np
import pytest

from steelyard.stats.spread import FAR_OUT, MAX_OUTLIERS, PERCENTILES, norm_spread


@pytest.mark.parametrize("shape", ["lognormal", "uniform", "two-clusters"])
def test_percentiles_are_numpys(shape: str) -> None:
    rng = np.random.default_rng(3)
    norms = {
        "lognormal": rng.lognormal(0.0, 0.3, 501),
        "uniform": rng.uniform(0.5, 2.0, 64),
        "two-clusters": np.concatenate([rng.normal(1, 0.05, 40), rng.normal(3, 0.1, 40)]),
    }[shape].astype(np.float32)
    spread = norm_spread(norms)
    np.testing.assert_allclose(spread.percentiles, np.percentile(norms, PERCENTILES), rtol=1e-6)
    assert spread.low == pytest.approx(float(norms.min())) and spread.high == pytest.approx(float(norms.max()))
    assert sum(spread.histogram) == norms.size


def test_far_out_units_match_an_independent_fence_computation() -> None:
    rng = np.random.default_rng(9)
    norms = rng.lognormal(0.0, 0.2, 300)
    planted = {17: 40.0, 90: 0.002, 201: 12.0}
    for unit, value in planted.items():
        norms[unit] = value
    norms[5] = 0.0  # a dead unit: reported by its own rule, never as far out
    norms[6] = np.nan
    spread = norm_spread(norms)
    q1, q3 = np.log(np.percentile(norms[(norms > 0) & np.isfinite(norms)], [25, 75]))
    low, high = np.exp(q1 - FAR_OUT * (q3 - q1)), np.exp(q3 + FAR_OUT * (q3 - q1))
    expected = {i for i, v in enumerate(norms) if np.isfinite(v) and v > 0 and (v < low or v > high)}
    assert {u for u, _ in spread.outliers} == expected == set(planted)
    assert spread.outliers[0][0] == 90  # furthest first: log 0.002 = -6.2 lies further out than log 40 = 3.7


def test_outliers_are_capped_and_degenerate_layers_are_quiet() -> None:
    norms = np.ones(100)
    norms[:30] = np.geomspace(1e3, 1e6, 30)
    assert len(norm_spread(norms).outliers) <= MAX_OUTLIERS
    assert norm_spread(np.ones(50)).outliers == ()  # no spread, no fences
    empty = norm_spread(np.array([np.nan, np.inf]))
    assert empty.percentiles == () and empty.histogram == ()


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_histogram_is_numpys_of_the_clipped_norms(seed: int) -> None:
    """Log-spaced bins from max(min, 1e-6·max) to max, values below clipped into the first
    (numpy.histogram with those edges is the reference)."""
    rng = np.random.default_rng(seed)
    norms = np.concatenate([rng.lognormal(0, 1.5, 500), np.zeros(7), [1e-12, 3e-9]])
    spread = norm_spread(norms)
    floor = max(norms.min(), norms.max() * 1e-6)
    edges = np.geomspace(floor, norms.max() * (1 + 1e-9), 9)
    expected = np.histogram(np.clip(norms, floor, None), bins=edges)[0]
    assert spread.histogram == tuple(int(c) for c in expected)


def test_histogram_edges_are_numpys_geomspace_bit_for_bit() -> None:
    """The histogram's log-spaced edges equal ``numpy.geomspace`` (reference: numpy) exactly,
    over norms from 1e-30 to 1e30, narrow and wide ranges alike."""
    from steelyard.stats.spread import BINS, _log_edges

    rng = np.random.default_rng(5)
    for _ in range(20000):
        high = float(np.exp(rng.uniform(-69, 69)))
        floor = max(high * float(np.exp(-rng.uniform(0, 20))), high * 1e-6)
        top = high * (1 + 1e-9)
        assert np.array_equal(_log_edges(floor, top), np.geomspace(floor, top, BINS + 1))
