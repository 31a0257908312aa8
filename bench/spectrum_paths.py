"""The spectrum test's two searches on matrices of 2^13 to 2^16 entries: cost and agreement.

Run from the repository root::

    python bench/spectrum_paths.py [--draws 4000] [--min-steps 16]

Seeded draws of several whole-matrix shapes (96 × 128 to 1024 × 64) in four families, all
invented here: i.i.d. normal and uniform entries (never trained), the same plus one learned
direction of strength c × σ(mn)^{1/4} with c uniform in [0.8, 3.5] (the detection threshold
of a rank-one perturbation, Baik, Ben Arous & Péché 2005), and a rank-8 power-law part
(trained-like). For each draw the ``untrained-layer`` spectrum search (Golub–Kahan–Lanczos,
``steelyard.rules._spectrum.top_singular_value``, with the given least number of steps) is
compared with ``numpy.linalg.svd`` of the same matrix: how often the verdict (beyond the
Marchenko–Pastur edge by more than 4 fluctuations) differs, how far below the exact value
the search stops, in fluctuations, and the time of each, one BLAS thread, in this run. (A
search that passes the limit stops there, the question being answered, so on draws beyond it
the shortfall is large by design; it matters only on the others.)
"""

from __future__ import annotations

import argparse
import time
from collections import defaultdict

import numpy as np
from threadpoolctl import threadpool_limits

from steelyard.rules._spectrum import edge_fluctuation, mp_edge, top_singular_value

SHAPES = ((96, 128), (128, 128), (128, 256), (200, 300), (256, 256), (64, 1024), (512, 128),
          (1024, 64), (100, 600), (160, 400))
FAMILIES = ("iid", "uniform", "planted", "planted", "lowrank")
ALLOWED = 4.0


def draw(rng: np.random.Generator, family: str, m: int, n: int) -> np.ndarray:
    """One seeded m × n float32 matrix of ``family`` (element deviation 1/√n)."""
    sigma = 1.0 / np.sqrt(n)
    if family == "uniform":
        a = rng.uniform(-1.0, 1.0, (m, n)) * sigma * np.sqrt(3.0)
    else:
        a = rng.standard_normal((m, n)) * sigma
    if family == "planted":
        theta = rng.uniform(0.8, 3.5) * sigma * (m * n) ** 0.25
        u, v = rng.standard_normal(m), rng.standard_normal(n)
        a += theta * np.outer(u / np.linalg.norm(u), v / np.linalg.norm(v))
    if family == "lowrank":
        rank = 8
        strengths = rng.uniform(0.2, 2.0) * sigma * (m * n) ** 0.25 / np.arange(1, rank + 1)
        left = np.linalg.qr(rng.standard_normal((m, rank)))[0]
        right = np.linalg.qr(rng.standard_normal((n, rank)))[0]
        a += (left * strengths) @ right.T
    return a.astype(np.float32)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--draws", type=int, default=4000)
    parser.add_argument("--min-steps", type=int, default=16)
    args = parser.parse_args()
    rng = np.random.default_rng(123)
    short: dict[str, list[float]] = defaultdict(list)
    beyond: dict[str, list[bool]] = defaultdict(list)
    differ: dict[str, int] = defaultdict(int)
    spent = {"search": 0.0, "svd": 0.0}
    with threadpool_limits(1):
        for trial in range(args.draws):
            m, n = SHAPES[trial % len(SHAPES)]
            family = FAMILIES[trial % len(FAMILIES)]
            a = draw(rng, family, m, n)
            sigma = 1.0 / np.sqrt(n)
            edge, fluctuation = mp_edge(sigma, m, n), edge_fluctuation(sigma, m, n)
            limit = edge + ALLOWED * fluctuation
            start = time.perf_counter()
            exact = float(np.linalg.svd(a.astype(np.float64), compute_uv=False)[0])
            spent["svd"] += time.perf_counter() - start
            start = time.perf_counter()
            found, _ = top_singular_value(
                a, trial, tolerance=0.05 * fluctuation, stop_above=limit, share_of_gap=0.1,
                min_steps=args.min_steps,
            )
            spent["search"] += time.perf_counter() - start
            short[family].append((exact - found) / fluctuation)
            beyond[family].append(exact > limit)
            differ[family] += (exact > limit) != (found > limit)
    print(f"{args.draws} draws, least steps {args.min_steps}; shapes {SHAPES}")
    for family, gaps in short.items():
        q = np.quantile(gaps, [0.5, 0.99])
        print(
            f"  {family:8s} {len(gaps):5d} draws, exact value beyond the limit in "
            f"{np.mean(beyond[family]):.0%}; verdict differs from the SVD's in {differ[family]}; "
            f"search short of the exact value by median {q[0]:.2f}, p99 {q[1]:.2f}, "
            f"worst {max(gaps):.2f} fluctuations"
        )
    print(
        f"  time per matrix: search {spent['search'] / args.draws * 1e3:.3f} ms, full SVD "
        f"{spent['svd'] / args.draws * 1e3:.3f} ms"
    )


if __name__ == "__main__":
    main()
