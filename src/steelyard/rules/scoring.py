"""The ranking score every rule uses, so scores are comparable across rules.

score = 100 · share · (1 + log₂(excess)), where ``share`` is the fraction of the layer's
parameters the finding implicates (0–1) and ``excess`` how far past its limit the measured
value is (measured / limit, ≥ 1). Log-scaling keeps one enormous outlier from outranking a
layer that is broadly wrong; the factor 100 only makes the numbers readable.
"""

from __future__ import annotations

import math


def score(share: float, excess: float) -> float:
    """Ranking score of a finding (see module docstring)."""
    share = min(max(share, 0.0), 1.0)
    excess = excess if math.isfinite(excess) else 1e6
    return round(100.0 * share * (1.0 + math.log2(max(excess, 1.0))), 6)


def layer_share(units: int, total_units: int) -> float:
    """Share of a layer implicated when ``units`` of its ``total_units`` rows are."""
    return units / total_units if total_units else 0.0
