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
#: Most Lanczos steps (each one product with A and one with Aᵀ).
STEPS = 40
#: Steps taken before the stopping rule on small gains applies.
MIN_STEPS = 8


def mp_edge(sigma: float, m: int, n: int) -> float:
    """Upper edge σ(√m + √n) of the Marchenko–Pastur bulk of singular values."""
    return sigma * (math.sqrt(m) + math.sqrt(n))


def edge_fluctuation(sigma: float, m: int, n: int) -> float:
    """Tracy–Widom scale of the top singular value, (σ/2)(1/√m + 1/√n)^{1/3}."""
    return 0.5 * sigma * (1.0 / math.sqrt(m) + 1.0 / math.sqrt(n)) ** (1.0 / 3.0)


def _orthogonalise(vector: np.ndarray, basis: np.ndarray) -> np.ndarray:
    """``vector`` minus its projection on the rows of ``basis`` (twice: "twice is enough")."""
    for _ in range(2):
        vector = vector - basis.T @ (basis @ vector)
    return vector


def top_singular_value(
    matrix: np.ndarray, seed: int = 0, tolerance: float = 0.0, stop_above: float = math.inf
) -> tuple[float, str]:
    """The largest singular value and how it was obtained (``svd`` or ``lanczos``).

    Matrices of up to ``SVD_ENTRIES`` entries use ``numpy.linalg.svd``. Larger ones use
    Golub–Kahan–Lanczos bidiagonalisation (Golub & Kahan 1965, "Calculating the singular
    values and pseudo-inverse of a matrix", SIAM J. Numer. Anal. B 2) from a seeded random
    unit vector, with full reorthogonalisation: after k steps (one product with A and one
    with Aᵀ each, in float32; the Lanczos vectors in float64) the largest singular value of
    the k × k bidiagonal matrix is the estimate. It never exceeds the true value (the
    bidiagonal matrix is Uₖᵀ A Vₖ for orthonormal Uₖ, Vₖ), and it converges much faster than
    power or subspace iteration, above all for values that stand out from the rest. It stops
    after ``STEPS`` steps, when a step (after the first ``MIN_STEPS``) adds less than
    ``tolerance``, when the Krylov space is exhausted, or as soon as the value passes
    ``stop_above`` (the caller's question is then answered, since the value is a lower bound).
    """
    m, n = matrix.shape
    if m * n <= SVD_ENTRIES or min(m, n) <= MIN_STEPS:
        values = np.linalg.svd(np.asarray(matrix, dtype=np.float64), compute_uv=False)
        return float(values[0]) if values.size else 0.0, "svd"
    a = np.asarray(matrix, dtype=np.float32)
    steps = min(STEPS, min(m, n))
    rng = np.random.default_rng(seed)
    right = np.zeros((steps + 1, n))
    left = np.zeros((steps, m))
    start = rng.standard_normal(n)
    right[0] = start / np.linalg.norm(start)
    alphas: list[float] = []
    betas: list[float] = []
    estimate = 0.0
    for step in range(steps):
        u = np.asarray(a @ right[step].astype(np.float32), dtype=np.float64)
        u = _orthogonalise(u, left[:step])
        alpha = float(np.linalg.norm(u))
        alphas.append(alpha)
        if alpha <= 1e-12 * max(estimate, 1e-300):
            break  # the Krylov space is exhausted: the estimate is exact
        left[step] = u / alpha
        w = np.asarray(a.T @ left[step].astype(np.float32), dtype=np.float64)
        w = _orthogonalise(w, right[: step + 1])
        beta = float(np.linalg.norm(w))
        bidiagonal = np.diag(alphas) + np.diag(betas, 1)
        current = float(np.linalg.svd(bidiagonal, compute_uv=False)[0])
        gain = current - estimate
        estimate = max(estimate, current)
        if estimate > stop_above or (step + 1 >= MIN_STEPS and 0 <= gain <= tolerance):
            break
        if beta <= 1e-12 * estimate:
            break
        betas.append(beta)
        right[step + 1] = w / beta
    return estimate, "lanczos"
