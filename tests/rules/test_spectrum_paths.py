"""Which search finds a matrix's top singular value, and that the cheaper one answers the
spectrum test as the exact one does.

Reference: ``numpy.linalg.svd`` (LAPACK's divide-and-conquer SVD) of the same float32 matrix
in float64, the exact value the test compared with the Marchenko–Pastur edge before matrices
of 2^13 to 2^16 entries moved to the Lanczos search. Learned directions are planted at
c × σ(mn)^{1/4}, the detection threshold of a rank-one perturbation (Baik, Ben Arous & Péché
2005, Ann. Probab. 33; Benaych-Georges & Nadakuditi 2012, J. Multivariate Anal. 111), so the
draws straddle the test's limit; the low-rank family has a power-law spectrum (common
practice for trained-like weights, no source).
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest

from steelyard.rules._spectrum import (
    CLOSE_ENTRIES,
    SVD_ENTRIES,
    edge_check,
    edge_fluctuation,
    mp_edge,
)

sys.path.insert(0, str(Path(__file__).resolve().parents[2] / "bench"))
from spectrum_paths import draw

ALLOWED = 4.0
#: Whole-matrix shapes between SVD_ENTRIES and CLOSE_ENTRIES: square, wide, tall, thin.
SHAPES = ((96, 128), (128, 128), (128, 256), (200, 300), (256, 256), (64, 1024), (512, 128),
          (1024, 64), (100, 600), (24, 2048))


def test_shapes_cover_the_close_range() -> None:
    """The shapes below really are searched by the iteration, whole (the range under test)."""
    for m, n in SHAPES:
        assert SVD_ENTRIES < m * n <= CLOSE_ENTRIES


@pytest.mark.parametrize("family", ["iid", "uniform", "planted", "lowrank"])
def test_close_search_gives_the_exact_verdict(family: str) -> None:
    """On 160 seeded draws per family the Lanczos answer (beyond the limit or not) is the one
    the exact top singular value gives; its value never exceeds the exact one (up to float32
    rounding), and on matrices without learned directions it stays within 3 fluctuations of it
    (the worst seen is 2.0; at 8 steps, before, up to 5.9 were measured)."""
    rng = np.random.default_rng(sum(map(ord, family)))
    agreed = 0
    for trial in range(160):
        m, n = SHAPES[trial % len(SHAPES)]
        a = draw(rng, family, m, n)
        sigma = 1.0 / np.sqrt(n)
        check = edge_check(a, sigma, ALLOWED, seed=trial)
        assert check.method == "lanczos"
        exact = float(np.linalg.svd(a.astype(np.float64), compute_uv=False)[0])
        fluctuation = edge_fluctuation(sigma, m, n)
        exact_beyond = (exact - mp_edge(sigma, m, n)) / fluctuation
        assert check.top <= exact * (1 + 1e-5)
        if family in ("iid", "uniform"):
            assert exact - check.top <= 3.0 * fluctuation
        agreed += (check.beyond > ALLOWED) == (exact_beyond > ALLOWED)
    assert agreed == 160


def test_small_matrices_keep_the_full_svd() -> None:
    """Up to SVD_ENTRIES entries, and for any matrix with at most 8 rows or columns, the top
    value is numpy.linalg.svd's."""
    rng = np.random.default_rng(5)
    for m, n in ((64, 128), (90, 90), (8, 4000), (4000, 8)):
        a = rng.standard_normal((m, n)).astype(np.float32)
        check = edge_check(a, 1.0, ALLOWED)
        assert check.method == "svd"
        assert check.top == pytest.approx(np.linalg.svd(a.astype(np.float64), compute_uv=False)[0])


@pytest.mark.parametrize("shape", [(1024, 700), (2816, 256), (600, 2048), (333, 1000)])
@pytest.mark.parametrize("step", [2, 4])
def test_search_on_a_row_strided_view_is_the_copy_s_search(
    shape: tuple[int, int], step: int
) -> None:
    # LayerStats.rows hands the spectrum search a view of every step-th row instead of a
    # copy; numpy passes such a view to BLAS at its leading dimension. Reference: the same
    # search on numpy.ascontiguousarray of the view, which must agree bit for bit (the
    # report may not depend on whether the rows were copied).
    rng = np.random.default_rng(shape[0] + step)
    m, n = shape
    weights = (rng.standard_normal((m, n)) / np.sqrt(n)).astype(np.float32)
    weights[:, :3] += np.float32(4.0 / np.sqrt(n)) * rng.standard_normal((m, 1)).astype(np.float32)
    sigma = 1.0 / np.sqrt(n)
    for start in (0, step - 1):
        view = weights[start::step]
        assert not view.flags["C_CONTIGUOUS"]
        assert edge_check(view, sigma, ALLOWED, seed=start) == edge_check(
            np.ascontiguousarray(view), sigma, ALLOWED, seed=start
        )
