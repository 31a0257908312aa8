"""The per-head factors of the attention circuits, and what is computed from them.

For a head with query rows ``W_Q`` and key rows ``W_K`` (``[d_h, d]`` each), value rows
``W_V`` (``[d_v, d]``) and output columns ``W_O`` (``[d, d_v]``), the circuits are the
``d × d`` matrices ``QK = W_Qᵀ·W_K`` and ``OV = W_O·W_V`` (Elhage et al. 2021). Neither is
formed. Their Frobenius norms come from the small Gram matrices:

    ‖W_Qᵀ W_K‖²_F = tr(W_Kᵀ W_Q W_Qᵀ W_K) = ⟨W_Q W_Qᵀ, W_K W_Kᵀ⟩_F
    ‖W_O W_V‖²_F  = ⟨W_Oᵀ W_O, W_V W_Vᵀ⟩_F

and their singular values are the square roots of the eigenvalues of ``G_V^{1/2} G_O G_V^{1/2}``
(``G_O = W_Oᵀ W_O``, ``G_V = W_V W_Vᵀ``; similar to ``G_O G_V``, whose non-zero eigenvalues
are those of ``(W_O W_V)ᵀ(W_O W_V)``), and alike for QK. Comparing two heads' circuits needs
their inner product, which would need cross-head Gram matrices (``d³`` per layer); instead each
circuit ``A`` is sketched as ``Ψ·A·Ω`` with seeded Gaussian ``Ψ [r, d]`` and ``Ω [d, r]``,
which factorises the same way (``(Ψ W_O)(W_V Ω)``, ``(W_Q Ψᵀ)ᵀ(W_K Ω)``), so each projection
contributes an ``[d_h, r]`` factor while its layer is in memory. ``E⟨ΨAΩ, ΨBΩ⟩_F =
r²⟨A, B⟩_F`` (independent Gaussian sketches on both sides; Johnson–Lindenstrauss), so the cosine
of two sketches estimates the cosine of the circuits; identical circuits give identical
sketches exactly.
"""

from __future__ import annotations

import numpy as np

from steelyard.gram_spectrum import singular_values_from_grams

SKETCH = 64
_SEED = 20191


def sketch_matrix(dim: int, left: bool) -> np.ndarray:
    """Seeded Gaussian ``Ψ [r, dim]`` (``left``) or ``Ω [dim, r]``, float32, the same for
    every layer of that width (so heads of any layer compare alike)."""
    rng = np.random.default_rng((_SEED, dim, int(left)))
    draw = rng.standard_normal((SKETCH, dim), dtype=np.float32)
    return draw if left else np.ascontiguousarray(draw.T)


def product(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """``a @ b`` in float32, or in float64 when float32 overflowed on finite factors (weights
    near the top of the float32 range): then the true products rather than Inf."""
    with np.errstate(over="ignore", invalid="ignore"):
        out = a @ b
    if not np.isfinite(out).all() and np.isfinite(a).all() and np.isfinite(b).all():
        out = a.astype(np.float64) @ b.astype(np.float64)
    return out


def row_factors(rows: np.ndarray, sketch: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Gram ``R Rᵀ`` and sketch ``R·S`` of heads' rows ``R [..., d_h, d]`` (``S`` is ``[d, r]``;
    a leading axis holds several heads). The Gram is a float32 product (relative error about
    1e-6 at these widths, far inside every threshold), returned as float64."""
    gram = product(rows, np.swapaxes(rows, -1, -2))
    return gram.astype(np.float64), product(rows, sketch)


def column_factors(columns: np.ndarray, sketch: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Gram ``Cᵀ C`` and sketch ``Ψ·C`` of heads' output columns ``C [..., d, d_v]``."""
    gram = product(np.swapaxes(columns, -1, -2), columns)
    return gram.astype(np.float64), product(sketch, columns)


def circuit_norm(gram_a: np.ndarray, gram_b: np.ndarray) -> float:
    """Frobenius norm of the circuit whose factors have these Gram matrices."""
    return float(np.sqrt(max(float(np.sum(gram_a * gram_b)), 0.0)))


def circuit_spectrum(gram_a: np.ndarray, gram_b: np.ndarray) -> np.ndarray:
    """Singular values of the circuit, largest first, from its factors' Gram matrices."""
    return singular_values_from_grams(gram_a, gram_b)


def sketch_cosine(a: np.ndarray, b: np.ndarray) -> float:
    """Cosine of two circuit sketches (0 when either is zero)."""
    na, nb = float(np.linalg.norm(a)), float(np.linalg.norm(b))
    if na == 0.0 or nb == 0.0:
        return 0.0
    return float(np.sum(a.astype(np.float64) * b) / (na * nb))


def spectrum_gap(a: np.ndarray, b: np.ndarray) -> float:
    """‖σ_a − σ_b‖ / max(‖σ_a‖, ‖σ_b‖): 0 for circuits with the same singular values."""
    size = max(len(a), len(b))
    pa, pb = np.zeros(size), np.zeros(size)
    pa[: len(a)], pb[: len(b)] = a, b
    scale = max(float(np.linalg.norm(pa)), float(np.linalg.norm(pb)))
    return float(np.linalg.norm(pa - pb) / scale) if scale > 0 else 0.0
