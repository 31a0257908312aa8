"""The Gaussian screen of the twin searches: rows projected onto a few seeded directions, and
the projected cosine below which a pair at the threshold is dropped only with a designed,
tiny chance.

Both the screened Gram search (:mod:`steelyard.rules._twin_search`) and the hashed search's
crowded buckets (:mod:`steelyard.rules._similarity`) compare the short projected rows first
and confirm from the rows themselves only the pairs that pass.
"""

from __future__ import annotations

import math

import numpy as np

from steelyard.rules._planes import gaussian_planes
from steelyard.rules._rows import Rows, normalise, off_scale

#: Gaussian directions the screen projects the rows onto (see :func:`screen_limit`).
SCREEN_DIMENSIONS = 128
#: Chance, per pair at the threshold, that the screen drops it (designed; see screen_limit).
SCREEN_MISS = 1e-9


def screen_limit(
    threshold: float, dimensions: int = SCREEN_DIMENSIONS, miss: float = SCREEN_MISS
) -> float:
    """The projected cosine that every pair at cosine >= ``threshold`` keeps but with chance
    ``miss``, after projecting both rows onto ``dimensions`` i.i.d. N(0, 1) directions.

    For unit rows u, v at cosine c and a Gaussian G [d, k], X = Gᵀu and Y = Gᵀv are standard
    normal in k dimensions, so A = ‖X − Y‖²/(2(1 − c)), B = ‖X‖² and C = ‖Y‖² are χ²_k, and
    since (B + C)/(2√(BC)) >= 1 the projected cosine is at least 1 − (1 − c)·A/√(BC).
    Laurent & Massart (2000, Ann. Statist. 28, Lemma 1) bound P(A >= k + 2√(kx) + 2x) and
    P(B <= k − 2√(kx)) by e^(−x) each; with x = ln(3/miss) all three hold together but with
    chance ``miss``, and then 1 − cos' <= (1 − c)·a/b. The rows' own distribution does not
    enter: the bound holds for every pair. −1 when k is too small for any bound."""
    x = math.log(3.0 / miss)
    upper = dimensions + 2.0 * math.sqrt(dimensions * x) + 2.0 * x
    lower = dimensions - 2.0 * math.sqrt(dimensions * x)
    if lower <= 0:
        return -1.0
    return max(-1.0, 1.0 - (1.0 - threshold) * upper / lower)


def projected_units(rows: Rows, members: np.ndarray, seed: int) -> np.ndarray:
    """The rows at ``members`` projected onto ``SCREEN_DIMENSIONS`` seeded N(0, 1) directions
    and normalised, float32 ``[members, SCREEN_DIMENSIONS]`` (zero rows stay zero)."""
    width = rows.matrix.shape[1] + (0 if rows.extra is None else 1)
    planes = gaussian_planes((seed, SCREEN_DIMENSIONS), width, SCREEN_DIMENSIONS)
    everyone = members.size == rows.count
    projected = rows.project(planes) if everyone else rows.project_rows(members, planes)
    return units_of(rows, members, projected, planes)


def units_of(
    rows: Rows, members: np.ndarray, projected: np.ndarray, planes: np.ndarray
) -> np.ndarray:
    """``projected`` (the rows at ``members`` times ``planes``) normalised row by row, zero
    rows staying zero."""
    # Rows far from unit scale are projected normalised: float32 products of rows of
    # subnormals would lose the digits the screen needs.
    odd = np.flatnonzero(off_scale(rows.norms[members]))
    if odd.size:
        projected[odd] = rows.unit(members[odd]) @ planes
    return normalise(projected)[0]
