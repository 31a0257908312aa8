"""How a layer's unit fan-in norms spread: the summary the reports draw and tabulate.

Kept small on purpose (a handful of numbers per layer whatever its width), so a report of a
model with hundreds of layers and thousands of units per layer stays a few kilobytes per layer.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: Percentiles kept for the distribution drawing (a box from p25 to p75, whiskers p5 to p95).
PERCENTILES = (5.0, 25.0, 50.0, 75.0, 95.0)
#: Tukey's "far out" multiple of the interquartile range (Tukey 1977, Exploratory Data
#: Analysis), applied to log norms because norms spread multiplicatively.
FAR_OUT = 3.0
#: Outlying units listed per layer (the worst first); the count beyond is not kept.
MAX_OUTLIERS = 8
#: Log-spaced bins of the small histogram.
BINS = 8


@dataclass(frozen=True, slots=True)
class NormSpread:
    """Summary of one layer's finite fan-in norms."""

    low: float
    median: float
    high: float
    percentiles: tuple[float, ...]
    """The norms at :data:`PERCENTILES` (empty when no norm is finite)."""
    outliers: tuple[tuple[int, float], ...]
    """(unit, norm) of units beyond the far-out fences of the log norms, furthest first."""
    histogram: tuple[int, ...]
    """Units per log-spaced bin between the smallest and largest norm."""


def norm_spread(norms: np.ndarray) -> NormSpread:
    """Summarise the units' norms (non-finite ones are left out, zeros are kept). One sort
    serves the percentiles, the quartiles of the fences and the histogram."""
    finite_mask = np.isfinite(norms)
    ordered = np.sort(norms[finite_mask].astype(np.float64))
    if not ordered.size:
        nan = float("nan")
        return NormSpread(nan, nan, nan, (), (), ())
    low, high = float(ordered[0]), float(ordered[-1])
    percentiles = tuple(_percentile(ordered, q) for q in PERCENTILES)
    histogram: tuple[int, ...] = ()
    if high > 0:
        floor = max(low, high * 1e-6)
        edges = _log_edges(floor, high * (1 + 1e-9))
        # Values below the floor count in the first bin (np.histogram of the clipped values).
        cuts = np.searchsorted(ordered, edges[1:-1], side="left")
        histogram = tuple(int(c) for c in np.diff(np.concatenate(([0], cuts, [ordered.size]))))
    positive = ordered[np.searchsorted(ordered, 0.0, side="right") :]
    return NormSpread(low, percentiles[2], high, percentiles, _outliers(norms, positive), histogram)


#: Positions 0…BINS of the histogram's edges on the log scale.
_POSITIONS = np.arange(BINS + 1, dtype=np.float64)


def _log_edges(floor: float, top: float) -> np.ndarray:
    """``numpy.geomspace(floor, top, BINS + 1)`` bit for bit (its steps: a linspace of the
    base-10 logarithms, powers of 10, the ends set exactly), without its argument handling,
    which took ten times as long as the arithmetic (25 against 2 µs, once per layer)."""
    low, high = np.log10(floor), np.log10(top)
    logs = _POSITIONS * ((high - low) / BINS) + low
    logs[-1] = high
    edges = np.power(10.0, logs)
    edges[0], edges[-1] = floor, top
    return edges


def _percentile(ordered: np.ndarray, q: float) -> float:
    """numpy.percentile's default (linear interpolation between closest ranks) of sorted data."""
    position = q / 100.0 * (ordered.size - 1)
    below = int(np.floor(position))
    above = min(below + 1, ordered.size - 1)
    fraction = position - below
    return float(ordered[below] + (ordered[above] - ordered[below]) * fraction)


def _outliers(norms: np.ndarray, positive: np.ndarray) -> tuple[tuple[int, float], ...]:
    """Units whose norm lies beyond the far-out fences of the log norms, ``log Q1 − 3·IQR``
    and ``log Q3 + 3·IQR`` with ``IQR = log Q3 − log Q1`` (quartiles of the positive norms,
    ``positive`` sorted): in norm space ``Q1·(Q1/Q3)³`` and ``Q3·(Q3/Q1)³``, so only the few
    units outside are ever put through a logarithm. Zero norms are dead units, which the
    dead-unit rule reports, so only positive norms take part."""
    if positive.size < 4:
        return ()
    q1, q3 = _percentile(positive, 25.0), _percentile(positive, 75.0)
    if not q1 < q3:
        return ()
    ratio = (q3 / q1) ** FAR_OUT
    low, high = q1 / ratio, q3 * ratio
    with np.errstate(invalid="ignore"):
        outside = (norms > 0) & ((norms < low) | (norms > high)) & np.isfinite(norms)
    units = np.flatnonzero(outside)
    if not units.size:
        return ()
    found = norms[units].astype(np.float64)
    spread = np.log(q3) - np.log(q1)
    distance = np.maximum(np.log(low) - np.log(found), np.log(found) - np.log(high)) / spread
    order = np.argsort(-distance, kind="stable")[:MAX_OUTLIERS]
    return tuple((int(units[i]), float(norms[units[i]])) for i in order)
