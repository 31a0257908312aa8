"""A low-rank update ΔW = L·R in canonical orientation, and what can be learned from the
small factors alone.

For a LoRA module, L = scale·B (``[units, r]``) and R = A flattened to ``[r, fan_in]``; for
an embedding, whose canonical rows are the vocabulary, L = Aᵀ and R = scale·Bᵀ. Nothing here
ever forms the ``[units, fan_in]`` product except :func:`rows`, for the rows asked.

Norms and spectrum come from the factors: the singular values of L·R are those of the small
``r×r`` matrix G_R^{1/2} G_L G_R^{1/2} (G_L = LᵀL, G_R = R Rᵀ; :mod:`steelyard.gram_spectrum`),
‖ΔW‖_F² is the sum of their squares, and the row norms are ‖L_j R‖² = L_j (R Rᵀ) L_jᵀ.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import cast

import numpy as np

from steelyard.gram_spectrum import singular_values_from_grams


@dataclass(frozen=True, slots=True)
class Factors:
    """ΔW = ``left @ right`` in canonical ``[units, fan_in]`` orientation, float64 (so a row
    block's product rounds to the same float32 values however the rows are blocked)."""

    left: np.ndarray
    """``[units, r]``."""
    right: np.ndarray
    """``[r, fan_in]``."""

    @property
    def nbytes(self) -> int:
        """Bytes both factors hold."""
        return int(self.left.nbytes + self.right.nbytes)


#: float64 bytes of one tile of the product at rank 16 (more at higher ranks, where fewer rows
#: a call cost BLAS more than the cache saves): the tile is rounded to float32 while it is in
#: the cache. Rows of 4,096 (11,008) inputs at rank 16: 1.0-1.2 (1.4-1.6) ns an entry
#: against 7.2 (8.5) for the whole block in one product (one thread, docs/performance.md,
#: "Fourteenth session").
_TILE_BYTES = 2**19


def rows(factors: Factors, start: int, stop: int) -> np.ndarray:
    """Rows ``[start, stop)`` of ΔW as float32 ``[stop-start, fan_in]``, the float64 product
    taken in cache-sized tiles of rows. Entries beyond the float32 range become ±Inf, as they
    would in the merged float32 weight (``nonfinite`` then reports them), without numpy's
    overflow warning on the terminal."""
    left, right = factors.left[start:stop], factors.right
    rank, fan_in = right.shape
    out = np.empty((left.shape[0], fan_in), dtype=np.float32)
    tile = max(8, _TILE_BYTES * max(1, rank // 16) // max(1, 8 * fan_in))
    scratch = np.empty((min(tile, left.shape[0]), fan_in))
    with np.errstate(over="ignore"):
        for a in range(0, left.shape[0], tile):
            b = min(left.shape[0], a + tile)
            np.matmul(left[a:b], right, out=scratch[: b - a])
            out[a:b] = scratch[: b - a]
    return out


def singular_values(factors: Factors) -> np.ndarray:
    """Singular values of ΔW, descending, float64 (``min(units, fan_in, r)`` of them): from
    the factors' ``r × r`` Gram matrices (:mod:`steelyard.gram_spectrum`) when r is below
    both sides, 0.33 against 2.0 ms for the QR route below on a rank-16 update of 11,008 ×
    4,096 (the same values to 4e-14 of σ₁; a value near zero shows as about 1.5e-8 σ₁)."""
    left, right = factors.left, factors.right
    if left.size == 0 or right.size == 0:
        return np.zeros(0)
    units, rank = left.shape
    fan_in = right.shape[1]
    if rank < min(units, fan_in):
        values = singular_values_from_grams(left.T @ left, right @ right.T)
        return np.asarray(values, np.float64)
    # A rank at least one side of the update (valid, if wasteful, up to MAX_RANK): the
    # r × r Grams could be gigabytes, so the reduced QR factorisations L = Q₁R₁ and
    # Rᵀ = Q₂R₂ leave the small core R₁R₂ᵀ, whose singular values are ΔW's (Golub & Van
    # Loan, *Matrix Computations*, §5.2 and §8.6). mode="r" returns R alone.
    r1 = cast(np.ndarray, np.linalg.qr(left, mode="r"))
    r2 = cast(np.ndarray, np.linalg.qr(right.T, mode="r"))
    return np.asarray(np.linalg.svd(r1 @ r2.T, compute_uv=False), dtype=np.float64)


def row_squares(factors: Factors) -> np.ndarray:
    """Σ_k ΔW[j, k]² per unit (float64), from the ``r×r`` Gram matrix R·Rᵀ."""
    left = factors.left
    gram = factors.right @ factors.right.T
    return np.maximum(np.einsum("jr,rs,js->j", left, gram, left), 0.0)


def frobenius(factors: Factors) -> float:
    """‖ΔW‖_F from the factors."""
    return float(np.sqrt(row_squares(factors).sum()))
