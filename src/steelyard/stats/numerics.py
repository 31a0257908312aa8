"""Float facts shared by the parts: the stored float names (widths in ``steelyard.dtypes``)
and exact sums of squares."""

from __future__ import annotations

import numpy as np

from steelyard.dtypes import FLOAT_ITEMSIZE

FLOAT_NAMES = frozenset(FLOAT_ITEMSIZE)


def sums_of_squares(block: np.ndarray, axis: int) -> np.ndarray:
    """Σ x² of a float32 block along ``axis`` (1: per row, 0: per column), as float64.

    Accumulated in float32; entries whose float32 sum lies outside [1e-30, 1e30] (or is not
    finite) are summed again in float64, where float32 may have overflowed, underflowed or
    met a NaN/Inf (see :mod:`steelyard.stats`).
    """
    spec = "ij,ij->i" if axis == 1 else "ij,ij->j"
    rough = np.einsum(spec, block, block)
    out = rough.astype(np.float64)
    risky = np.flatnonzero(~((rough >= 1e-30) & (rough <= 1e30)))
    if risky.size:
        part = block[risky] if axis == 1 else block[:, risky]
        out[risky] = np.einsum(spec, part, part, dtype=np.float64)
    return out


def row_norms(matrix: np.ndarray) -> np.ndarray:
    """Row L2 norms (see :func:`sums_of_squares`)."""
    return np.sqrt(sums_of_squares(np.asarray(matrix, dtype=np.float32), axis=1))
