"""A low-rank update ΔW = L·R in canonical orientation, and what can be learned from the
small factors alone.

For a LoRA module, L = scale·B (``[units, r]``) and R = A flattened to ``[r, fan_in]``; for
an embedding, whose canonical rows are the vocabulary, L = Aᵀ and R = scale·Bᵀ. Nothing here
ever forms the ``[units, fan_in]`` product except :func:`rows`, for the rows asked.

Norms and spectrum come from the factors (Golub & Van Loan, *Matrix Computations*, 4th ed.,
§5.2 QR and §8.6 SVD): with the reduced QR factorisations L = Q₁R₁ and Rᵀ = Q₂R₂, the
product is L·R = Q₁(R₁R₂ᵀ)Q₂ᵀ, and since Q₁, Q₂ have orthonormal columns the singular
values of L·R are those of the small ``k₁×k₂`` core R₁R₂ᵀ (k ≤ r). ‖ΔW‖_F² is the sum of
their squares; the row norms are ‖L_j R‖² = L_j (R Rᵀ) L_jᵀ.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import cast

import numpy as np


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


def rows(factors: Factors, start: int, stop: int) -> np.ndarray:
    """Rows ``[start, stop)`` of ΔW as float32 ``[stop-start, fan_in]``. Entries beyond the
    float32 range become ±Inf, as they would in the merged float32 weight (``nonfinite``
    then reports them), without numpy's overflow warning on the terminal."""
    product = np.asarray(factors.left[start:stop] @ factors.right)
    with np.errstate(over="ignore"):
        return product.astype(np.float32)


def singular_values(factors: Factors) -> np.ndarray:
    """Singular values of ΔW, descending, float64 (``min(units, fan_in, r)`` of them)."""
    left, right = factors.left, factors.right
    if left.size == 0 or right.size == 0:
        return np.zeros(0)
    # mode="r" returns R alone (numpy's stubs type it as the (Q, R) pair).
    r1 = cast(np.ndarray, np.linalg.qr(left, mode="r"))
    r2 = cast(np.ndarray, np.linalg.qr(right.T, mode="r"))
    core = r1 @ r2.T
    return np.asarray(np.linalg.svd(core, compute_uv=False), dtype=np.float64)


def row_squares(factors: Factors) -> np.ndarray:
    """Σ_k ΔW[j, k]² per unit (float64), from the ``r×r`` Gram matrix R·Rᵀ."""
    left = factors.left
    gram = factors.right @ factors.right.T
    return np.maximum(np.einsum("jr,rs,js->j", left, gram, left), 0.0)


def frobenius(factors: Factors) -> float:
    """‖ΔW‖_F from the factors."""
    return float(np.sqrt(row_squares(factors).sum()))
