"""The top singular value of a weight matrix and where a random matrix's top one should sit.

For an m × n matrix of independent entries with mean 0 and standard deviation σ, the
singular values fill the Marchenko–Pastur bulk (Marchenko & Pastur 1967, "Distribution of
eigenvalues for some sets of random matrices", Math. USSR-Sbornik 1), whose upper edge is
σ(√m + √n). The largest one fluctuates around that edge on the Tracy–Widom scale (Johnstone
2001, "On the distribution of the largest eigenvalue in principal components analysis", Ann.
Statist. 29): Johnstone gives it for the largest *eigenvalue* of XᵀX with unit-variance
entries, (√m + √n)(1/√m + 1/√n)^{1/3}, around the centre (√m + √n)². Carried to the singular
value s = √λ (first-order delta method, ds = dλ / 2√λ) and scaled by σ this becomes

    fluctuation = (σ / 2)·(1/√m + 1/√n)^{1/3}.

The Tracy–Widom (β = 1) law has mean about −1.2 and a light right tail, so a freshly drawn
matrix's top singular value exceeds the edge by more than a few fluctuations only rarely;
training, which grows a few strong directions, pushes outliers beyond it.
"""

from __future__ import annotations

import math

import numpy as np

#: Matrices with at most this many entries get a full SVD; larger ones the iteration below.
SVD_ENTRIES = 2**16
#: Block width and iteration budget of the subspace iteration.
BLOCK = 16
ITERATIONS = 40


def mp_edge(sigma: float, m: int, n: int) -> float:
    """Upper edge σ(√m + √n) of the Marchenko–Pastur bulk of singular values."""
    return sigma * (math.sqrt(m) + math.sqrt(n))


def edge_fluctuation(sigma: float, m: int, n: int) -> float:
    """Tracy–Widom scale of the top singular value, (σ/2)(1/√m + 1/√n)^{1/3}."""
    return 0.5 * sigma * (1.0 / math.sqrt(m) + 1.0 / math.sqrt(n)) ** (1.0 / 3.0)


def _orthonormal(block: np.ndarray) -> np.ndarray:
    """Orthonormal basis of a tall block (Cholesky QR in float64, Householder QR as fallback)."""
    wide = block.astype(np.float64)
    try:
        factor = np.linalg.cholesky(wide.T @ wide)
        return np.asarray(np.linalg.solve(factor, wide.T).T, dtype=np.float32)
    except np.linalg.LinAlgError:
        basis, _ = np.linalg.qr(wide)
        return np.asarray(basis, dtype=np.float32)


def top_singular_value(
    matrix: np.ndarray, seed: int = 0, tolerance: float = 0.0, stop_above: float = math.inf
) -> tuple[float, str]:
    """The largest singular value and how it was obtained (``svd`` or ``subspace``).

    Matrices of up to ``SVD_ENTRIES`` entries use ``numpy.linalg.svd``. Larger ones use
    subspace iteration with AᵀA: a seeded Gaussian block of ``BLOCK`` columns, made
    orthonormal after every multiplication, and the Rayleigh–Ritz value ‖A·Q‖₂ after each.
    That value never exceeds the true one and converges fastest for outliers far from the
    bulk. The iteration stops after ``ITERATIONS`` rounds, when a round adds less than
    ``tolerance``, or as soon as the value passes ``stop_above`` (the caller's question is then
    answered, since the value is a lower bound).
    """
    m, n = matrix.shape
    if m * n <= SVD_ENTRIES or min(m, n) <= BLOCK:
        values = np.linalg.svd(np.asarray(matrix, dtype=np.float64), compute_uv=False)
        return float(values[0]) if values.size else 0.0, "svd"
    a = np.asarray(matrix, dtype=np.float32)
    if m < n:
        a = a.T
    rng = np.random.default_rng(seed)
    basis = _orthonormal(rng.standard_normal((a.shape[1], BLOCK)))
    estimate = 0.0
    for _ in range(ITERATIONS):
        image = a @ basis
        small = image.astype(np.float64)
        current = math.sqrt(max(float(np.linalg.eigvalsh(small.T @ small)[-1]), 0.0))
        gain = current - estimate
        estimate = max(current, estimate)
        if estimate > stop_above or (0 <= gain <= tolerance):
            break
        basis = _orthonormal(a.T @ image)
    return estimate, "subspace"
