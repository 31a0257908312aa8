"""What the factors of a low-rank product tell without a pass over the product.

A layer whose weight is ``ΔW = L·R`` (an adapter's update read on its own, see
:attr:`steelyard.graph.Tensor.factors`) has ``units·fan_in`` entries but only
``r·(units + fan_in)`` numbers behind them: at rank 16 on an 11,008 × 4,096 layer, 45M entries
from 240k. Its row and column sums of squares are exact quadratic forms of the factors, and
Cauchy–Schwarz bounds every entry, |ΔW_jk| <= ‖L_j‖·‖R_k‖.
"""

from __future__ import annotations

import math

import numpy as np

#: Entries of a low-rank product bounded below this cannot round to ±Inf in float32 (whose
#: largest finite value is about 3.4e38).
NO_OVERFLOW = 1e38


def factor_squares(left: np.ndarray, right: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(‖L_j‖² per row of ``left``, ‖R_k‖² per column of ``right``): every entry of the
    product obeys ΔW_jk² <= ‖L_j‖²·‖R_k‖² (Cauchy–Schwarz)."""
    return np.einsum("jr,jr->j", left, left), np.einsum("rk,rk->k", right, right)


def column_squares(left: np.ndarray, right: np.ndarray) -> np.ndarray:
    """Σ_j ΔW_jk² per column of ΔW = left·right, as R_kᵀ (Lᵀ L) R_k, float64."""
    return np.maximum(np.einsum("rk,rk->k", (left.T @ left) @ right, right), 0.0)


def factor_sums(
    left: np.ndarray, right: np.ndarray, with_columns: bool
) -> tuple[np.ndarray, np.ndarray | None] | None:
    """``(Σ_k ΔW_jk² per row, Σ_j ΔW_jk² per column or None)`` of ΔW = left·right, float64,
    without forming ΔW: Σ_k ΔW_jk² = L_j (R Rᵀ) L_jᵀ and Σ_j ΔW_jk² = R_kᵀ (Lᵀ L) R_k, exact
    but for float64 rounding at O((units + fan_in)·r²) (a pass sums the float32-rounded
    entries: the two differ by about 1e-7 relative). None when they cannot stand for a
    pass: a rank not below both sides (the product is no larger than its factors), non-finite
    factors, or an entry whose bound reaches ``NO_OVERFLOW`` (it may round to ±Inf, which
    the pass counts)."""
    rank = left.shape[1]
    if rank >= min(left.shape[0], right.shape[1]):
        return None
    if not (np.isfinite(left).all() and np.isfinite(right).all()):
        return None
    row_lengths, column_lengths = factor_squares(left, right)
    longest_row = float(row_lengths.max(initial=0.0))
    longest_column = float(column_lengths.max(initial=0.0))
    if not math.sqrt(longest_row * longest_column) < NO_OVERFLOW:
        return None
    rows = np.maximum(np.einsum("jr,jr->j", left @ (right @ right.T), left), 0.0)
    return rows, column_squares(left, right) if with_columns else None
