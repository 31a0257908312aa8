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

**Bounded cost: a row subsample.** Matrices of more than ``WHOLE_ENTRIES`` entries are
tested on every ``stride``-th row (``stride`` up to ``SUBSAMPLE`` = 4 unless the caller says
otherwise, keeping at least ``WHOLE_ENTRIES`` entries and ``MIN_ROWS`` rows), from a seeded
offset, so that the search costs a few passes over the whole matrix instead of the 40–80 of
a search on all of it; beyond ``4 × SPECTRUM_ENTRIES`` entries the stride grows further, so
that no subsample holds more than ``SPECTRUM_ENTRIES`` (2^22) entries and the search on a
token table or a 7B model's feed-forward layer costs what it costs on a 16 MiB matrix. Two
facts make this a test of the same hypothesis:

* *Null law.* The rows of a matrix of i.i.d. entries are a matrix of i.i.d. entries, so the
  subsample's top singular value has the edge and Tracy–Widom fluctuation of its own shape
  (m' × n); the rule compares it with those, and a fresh draw passes as often as before.
* *Lower bound.* Every singular value of a submatrix is at most the same-ranked one of the
  whole (Thompson 1972, "Principal submatrices IX: Interlacing inequalities for singular
  values of submatrices", Linear Algebra Appl. 5), so whatever the subsample shows beyond
  its edge, the whole matrix has too.

What it costs is power against *weak* learned directions. A direction θ·u·vᵀ leaves the
bulk of an i.i.d. m × n matrix only when θ exceeds σ(mn)^{1/4} (Baik, Ben Arous & Péché 2005,
Ann. Probab. 33; for rectangular matrices Benaych-Georges & Nadakuditi 2012, J. Multivariate
Anal. 111); a delocalised direction keeps θ√f of its strength in a fraction f of the rows,
whose own threshold is σ(f·mn)^{1/4}, so the subsample sees directions from f^{-1/4}
(4^{1/4} ≈ 1.4, 8^{1/4} ≈ 1.7) times that threshold, and reports them (4 fluctuations beyond
its edge) from about 2 times it with one row in 4, 2.5 times with one in 8; the whole matrix
from about 1.5 times. Training's directions are usually many times the bulk edge. The measured rates are in the documentation of ``untrained-layer``
and checked by ``tests/rules/test_untrained_layer.py``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

#: Matrices with at most this many entries get a full SVD; larger ones the iteration below.
#: (A full SVD costs about m·n·min(m, n): 0.2 ms at 2^13 entries here, but 1.5-5 ms at 2^16,
#: where the iteration takes 0.4-0.6 ms; docs/performance.md, "Tenth session".)
SVD_ENTRIES = 2**13
#: Matrices of up to this many entries (searched whole) take at least ``CLOSE_STEPS`` steps.
CLOSE_ENTRIES = 2**16
#: The iteration's least number of steps on those: close to the exact value on a bulk without
#: outliers, which is what the full SVD gave them before (see :func:`edge_check`).
CLOSE_STEPS = 16
#: Matrices up to this many entries are searched whole; larger ones on a row subsample.
WHOLE_ENTRIES = 2**17
#: At most one row in this many is kept in a subsample.
SUBSAMPLE = 4
#: Fewest rows a subsample keeps (below, the Marchenko–Pastur edge describes it poorly).
MIN_ROWS = 64
#: Most entries a subsample keeps (16 MiB of float32): on larger matrices (a token table, the
#: feed-forward layers of a 7B model) the stride grows past ``SUBSAMPLE`` to stay under it.
SPECTRUM_ENTRIES = 2**22
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


def row_stride(m: int, n: int, most: int = SUBSAMPLE, entries: int = SPECTRUM_ENTRIES) -> int:
    """Keep every ``row_stride``-th row: 1 up to ``WHOLE_ENTRIES`` entries, else up to
    ``most`` while at least ``WHOLE_ENTRIES`` entries and ``MIN_ROWS`` rows remain; and, when
    ``most`` > 1 and ``entries`` > 0, at least as many as keep at most ``entries`` entries (still
    ``MIN_ROWS`` rows or more)."""
    stride = max(1, min(most, (m * n) // WHOLE_ENTRIES, m // MIN_ROWS))
    if most > 1 and entries > 0 and m * n > entries:
        stride = max(stride, min(-(-m * n // entries), m // MIN_ROWS))
    return max(1, stride)


@dataclass(frozen=True)
class EdgeCheck:
    """The top singular value of the (subsampled) matrix against its random-matrix edge."""

    top: float
    edge: float
    """σ(√m' + √n) for the m' rows searched."""
    fluctuation: float
    rows: int
    """Rows searched (m' <= m)."""
    method: str
    """``svd`` or ``lanczos``."""

    @property
    def beyond(self) -> float:
        """How many fluctuations the top value lies beyond the edge."""
        return (self.top - self.edge) / self.fluctuation


def edge_check(rows: np.ndarray, sigma: float, allowed: float, seed: int = 0) -> EdgeCheck:
    """Search ``rows`` (a whole matrix, or the rows ``start::row_stride(m, n)`` of a larger
    one, see the module) for a singular value more than ``allowed`` fluctuations beyond the
    edge of an i.i.d. matrix of their shape and element deviation σ."""
    kept, n = rows.shape
    edge = mp_edge(sigma, kept, n)
    fluctuation = edge_fluctuation(sigma, kept, n)
    limit = edge + allowed * fluctuation
    # Up to CLOSE_ENTRIES the search takes CLOSE_STEPS steps before it may stop on small gains:
    # after 8, a bulk without outliers can still be several fluctuations short of its top
    # value (1,600 draws of 96 × 128 to 1024 × 64: p99 3.6, worst 5.9), after 16 about two at
    # worst (p99 0.8, worst 1.8; 2.0 in the tests' draws), and the verdict was the full SVD's
    # on all 4,000 draws with and without learned directions, against 3 borderline misses at
    # 8 (bench/spectrum_paths.py).
    top, method = top_singular_value(
        rows,
        seed,
        tolerance=0.05 * fluctuation,
        stop_above=limit,
        share_of_gap=0.1,
        min_steps=CLOSE_STEPS if kept * n <= CLOSE_ENTRIES else MIN_STEPS,
    )
    return EdgeCheck(top, edge, fluctuation, kept, method)


def _orthogonalise(vector: np.ndarray, basis: np.ndarray) -> np.ndarray:
    """``vector`` minus its projection on the rows of ``basis``, in place (twice: "twice is
    enough"); ``vector`` must be a fresh array."""
    if basis.shape[0]:
        for _ in range(2):
            vector -= (basis @ vector) @ basis
    return vector


def _norm(vector: np.ndarray) -> float:
    """Euclidean norm: the float ``numpy.linalg.norm`` gives (sqrt of the float32 dot),
    without its argument handling, which cost more than the product on these sizes."""
    return float(np.sqrt(vector @ vector))


def _ritz_wanted(step: int, min_steps: int) -> bool:
    """Whether to compute the estimate after ``step`` steps: every step from ``min_steps`` on,
    before that at 1, 2, 4 and 8 steps (enough to stop early on a strong outlier)."""
    return step >= min_steps or step in (1, 2, 4, 8)


def top_singular_value(
    matrix: np.ndarray,
    seed: int = 0,
    tolerance: float = 0.0,
    stop_above: float = math.inf,
    share_of_gap: float = 0.0,
    min_steps: int = MIN_STEPS,
) -> tuple[float, str]:
    """The largest singular value and how it was obtained (``svd`` or ``lanczos``).

    Matrices of up to ``SVD_ENTRIES`` entries use ``numpy.linalg.svd``. Larger ones use
    Golub–Kahan–Lanczos bidiagonalisation (Golub & Kahan 1965, "Calculating the singular
    values and pseudo-inverse of a matrix", SIAM J. Numer. Anal. B 2) from a seeded random
    unit vector, with full reorthogonalisation, in float32: after k steps (one product with A
    and one with Aᵀ each) the largest singular value of the k × k bidiagonal matrix is the
    estimate. It never exceeds the true value (the bidiagonal matrix is Uₖᵀ A Vₖ for
    orthonormal Uₖ, Vₖ, up to float32 rounding), and it converges much faster than power or
    subspace iteration, above all for values that stand out from the rest. It stops after
    ``STEPS`` steps, when a step (after the first ``min_steps``) adds less than
    ``tolerance`` or less than ``share_of_gap`` of the distance still left to ``stop_above``,
    when the Krylov space is exhausted, or as soon as the value passes ``stop_above`` (the
    caller's question is then answered, since the value is a lower bound).
    """
    m, n = matrix.shape
    if m * n <= SVD_ENTRIES or min(m, n) <= MIN_STEPS:
        values = np.linalg.svd(np.asarray(matrix, dtype=np.float64), compute_uv=False)
        return float(values[0]) if values.size else 0.0, "svd"
    a = np.asarray(matrix, dtype=np.float32)
    steps = min(STEPS, m, n)
    right = np.zeros((steps + 1, n), dtype=np.float32)
    left = np.zeros((steps, m), dtype=np.float32)
    bidiagonal = np.zeros((steps, steps))
    start = np.random.default_rng(seed).standard_normal(n)
    right[0] = start / np.linalg.norm(start)
    estimate = 0.0
    for step in range(steps):
        size = step + 1
        u = _orthogonalise(a @ right[step], left[:step])
        alpha = _norm(u)
        bidiagonal[step, step] = alpha
        if alpha <= 1e-12 * max(estimate, 1e-30):
            # the Krylov space is exhausted: the estimate is exact
            return max(estimate, _ritz(bidiagonal, size)), "lanczos"
        u /= alpha
        left[step] = u
        w = _orthogonalise(u @ a, right[:size])
        beta = _norm(w)
        exhausted = beta <= 1e-12 * max(alpha, estimate)
        if _ritz_wanted(size, min_steps) or exhausted:
            current = _ritz(bidiagonal, size)
            gain = current - estimate
            estimate = max(estimate, current)
            remaining = share_of_gap * (stop_above - estimate) if share_of_gap else 0.0
            enough = max(tolerance, remaining)
            if exhausted or estimate > stop_above or (size >= min_steps and 0 <= gain <= enough):
                break
        if size < steps:
            bidiagonal[step, size] = beta
            right[size] = w / beta
    return estimate, "lanczos"


def _ritz(bidiagonal: np.ndarray, size: int) -> float:
    """Largest singular value of the leading ``size`` × ``size`` block."""
    return float(np.linalg.svd(bidiagonal[:size, :size], compute_uv=False)[0])
