"""The significance step of ``untrained-layer``: an equivalence p-value per layer from its KS
distance, and Holm's step-down procedure over the tested layers (the rule's documentation,
step 4, gives the reasoning and sources)."""

from __future__ import annotations

import math


def equivalence_p(distance: float, n: int, margin: float) -> float:
    """p-value of "the sample's distribution is at least ``margin`` from the candidate's",
    given the observed KS distance ``distance`` of ``n`` values: min(1, 2·exp(−2n(δ − D)²)).

    If the truth lies δ or more from the candidate, D_n <= D can only happen when the
    empirical CDF strays t = δ − D from the truth, whose chance is at most 2·exp(−2nt²) for
    every n (Dvoretzky, Kiefer & Wolfowitz 1956, with Massart's 1990 constant 2); that bound
    is the first term of Kolmogorov's (1933) limit series, so it is also the asymptotic KS
    p-value wherever it is small.
    """
    gap = margin - distance
    if gap <= 0:
        return 1.0
    return min(1.0, 2.0 * math.exp(-2.0 * n * gap * gap))


def smallest_claimable(layers: int, candidates_per_layer: int, alpha: float, margin: float) -> int:
    """Fewest weights at which even a perfect match (D = 0) can be claimed for a layer tested
    among ``layers`` with that many candidates: n >= ln(2·K·L/α) / (2δ²)."""
    return math.ceil(math.log(2.0 * candidates_per_layer * layers / alpha) / (2.0 * margin * margin))


def holm(p_values: list[float], alpha: float) -> list[bool]:
    """Holm's (1979) step-down: reject the k-th smallest p while p_(k) <= α/(L − k + 1).

    Controls the chance of any false rejection among the L hypotheses at α, whatever their
    dependence. Ties keep their input order, so the answer never depends on the thread count.
    """
    order = sorted(range(len(p_values)), key=lambda i: (p_values[i], i))
    rejected = [False] * len(p_values)
    for rank, index in enumerate(order):
        if p_values[index] > alpha / (len(p_values) - rank):
            break
        rejected[index] = True
    return rejected
