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
    """Summarise the units' norms (non-finite ones are left out, zeros are kept)."""
    finite_mask = np.isfinite(norms)
    finite = norms[finite_mask]
    if not finite.size:
        nan = float("nan")
        return NormSpread(nan, nan, nan, (), (), ())
    low, high = float(finite.min()), float(finite.max())
    percentiles = tuple(float(v) for v in np.percentile(finite, PERCENTILES))
    histogram: tuple[int, ...] = ()
    if high > 0:
        floor = max(low, high * 1e-6)
        edges = np.geomspace(floor, high * (1 + 1e-9), BINS + 1)
        histogram = tuple(int(c) for c in np.histogram(np.clip(finite, floor, None), bins=edges)[0])
    return NormSpread(low, percentiles[2], high, percentiles, _outliers(norms, finite_mask), histogram)


def _outliers(norms: np.ndarray, finite_mask: np.ndarray) -> tuple[tuple[int, float], ...]:
    """Units whose log norm lies beyond Q1 - 3·IQR or Q3 + 3·IQR; zero norms are dead units,
    which the dead-unit rule reports, so only positive norms take part."""
    units = np.flatnonzero(finite_mask & (norms > 0))
    if units.size < 4:
        return ()
    logs = np.log(norms[units].astype(np.float64))
    q1, q3 = np.percentile(logs, (25.0, 75.0))
    spread = q3 - q1
    if spread <= 0:
        return ()
    distance = np.maximum(q1 - FAR_OUT * spread - logs, logs - q3 - FAR_OUT * spread)
    beyond = np.flatnonzero(distance > 0)
    worst = beyond[np.argsort(-distance[beyond], kind="stable")][:MAX_OUTLIERS]
    return tuple((int(units[i]), float(norms[units[i]])) for i in worst)
