"""``untrained-layer``: a layer whose weights are still what an initializer draws.

**What it checks.** Three tests per layer, all of which must pass, and a significance test
across the checkpoint that decides which of the layers that passed are reported.

1. *Distribution.* A seeded sample of the weights (all of them up to ``sample`` = 20,000,
   else that many drawn uniformly with replacement: i.i.d. draws from the layer's weights,
   the case the Dvoretzky–Kiefer–Wolfowitz bound of step 4 is stated for) is compared with
   each standard initializer for the layer's fan-in and fan-out by the Kolmogorov–Smirnov
   distance D = supₓ |F_n(x) − F(x)|. The candidates, with fan_in =
   (in/groups)·prod(kernel) and fan_out = out·prod(kernel) as PyTorch and Keras compute them:

   * ``pytorch-default``: U(±1/√fan_in). PyTorch's Linear and Conv layers use
     kaiming_uniform with a = √5, whose bound gain·√(3/fan_in) with gain = √(2/(1+a²)) is
     exactly 1/√fan_in;
   * ``glorot-uniform`` U(±√(6/(fan_in+fan_out))), Keras's default kernel initializer;
     ``glorot-normal`` N(0, 2/(fan_in+fan_out)) as PyTorch's xavier_normal draws it, and
     ``glorot-truncated-normal``, the same standard deviation as Keras draws it: a normal
     truncated at ±2 of its own standard deviation, widened by 1/0.8796 (the standard
     deviation of a unit normal truncated to (−2, 2)) so that the result has the target
     standard deviation (Glorot & Bengio 2010, "Understanding the difficulty of training deep
     feedforward neural networks", AISTATS);
   * ``he-normal`` N(0, 2/fan_in) (PyTorch kaiming_normal), ``he-truncated-normal`` (Keras
     he_normal), ``he-uniform`` U(±√(6/fan_in)) (He et al. 2015, "Delving deep into
     rectifiers", ICCV);
   * ``lecun-uniform`` U(±√(3/fan_in)), ``lecun-normal`` N(0, 1/fan_in) and
     ``lecun-truncated-normal`` (Keras and JAX lecun_normal) (LeCun et al. 1998, "Efficient
     BackProp");
   * ``normal-0.02`` N(0, 0.02²), the N(0, 0.02) initialisation of Radford et al. 2018
     ("Improving language understanding by generative pre-training"), common since in
     transformer codebases, and ``truncated-normal-0.02``, a normal of standard deviation 0.02
     truncated at ±0.04 as the BERT reference implementation draws it (common practice, no
     published source);
   * grouped convolutions also get the Keras depthwise fans (fan_in = channels·prod(kernel),
     fan_out = multiplier·prod(kernel)); transposed convolutions swap the roles as both
     frameworks do (fan_in = out/groups·prod(kernel)); recurrent gate layers get PyTorch's
     U(±1/√hidden) (``pytorch-recurrent``) and Glorot fans over all gates of the tensor;
   * embeddings are included: an untouched table is as suspicious as an untouched layer. Their
     candidates are ``normal-1`` N(0, 1) (PyTorch nn.Embedding), ``keras-embedding-uniform``
     U(±0.05) (Keras Embedding's default ``uniform``), ``normal-0.02`` and
     ``truncated-normal-0.02``.

   The limit ``ks`` defaults to max(1.95/√n, ``ks-floor`` 0.02) for a sample of n values:
   1.95/√n is the asymptotic Kolmogorov critical value at α = 0.001 (c(α) = √(−ln(α/2)/2)),
   so a sample that truly comes from the candidate stays below it 999 times in 1000; the floor
   keeps large samples from failing on what storage does to a drawn value (bf16 or fp16
   rounding shifts the empirical CDF by up to a few thousandths) and on the tiny drift of a
   few optimizer steps. The best candidate is the one with the smallest D. Normal CDFs use the
   erf of Abramowitz & Stegun (1964) formula 7.1.26 (absolute error <= 1.5e-7, vectorised).
   The sample is read by the shared statistics (``LayerStats.sample``): from the layer's matrix
   when it is in memory, else picked from the row blocks as they stream past, so an embedding
   table is never assembled (the spectrum's row subsample is picked the same way).

   The KS distance barely notices a wrong *scale* in a small sample (a normal 20 % too wide
   is only D ≈ 0.07 away), and a trained layer often looks Gaussian; with a dozen candidate
   scales one of them is usually close. So the best candidate must also match the sample's
   mean square: the mean of n i.i.d. squares has mean σ² and variance σ⁴(κ − 1)/n (κ the
   element kurtosis, below), so z = (mean(x²)/σ² − 1)/√((κ − 1)/n) is about standard normal
   for a true draw, and the candidate is rejected when |z| > ``scale-z`` (3.29, the two-sided
   α = 0.001 normal quantile) and the relative difference exceeds ``scale-floor`` (0.05, the
   same allowance for storage rounding and a few optimizer steps as ``ks-floor``).

2. *Row spread* (layers of at least 64 units). Under an i.i.d. draw the units' sums of squares
   S_j = ‖w_j‖² are i.i.d. with mean n·μ₂ and variance n·(μ₄ − μ₂²), so their squared
   coefficient of variation is (κ − 1)/n, κ = μ₄/μ₂² being the kurtosis of one element: 3 for
   a normal, 9/5 for a uniform, about 2.366 for a normal truncated at ±2 (E[z⁴ | |z| < a] =
   3 − (a³ + 3a)·2φ(a)/(2Φ(a) − 1), the moments of the truncated normal). The spread is
   measured robustly, σ̂ = IQR(S)/1.349, so that a padding row or a few edited rows do not
   count, and the layer is taken as trained when R = (σ̂ / median S)² / ((κ − 1)/n) exceeds
   1 + ``row-spread`` (10) × 2.33/√m. 2.33/√m is R's large-sample standard error (twice the
   relative standard error 1.166/√m of the IQR estimate of a normal's σ, whose efficiency is
   37 %; from memory, and confirmed by the test suite's fresh draws of every family from
   64 × 8 to 1024 × 1024, none of which comes near the limit). Training makes units differ in
   norm: row scales spread lognormally by only 5 % already give R ≈ 12 on a 2048 × 2048 layer.
   The row norms come from the shared one-pass statistics, so this test costs nothing; it
   runs first, with the largest kurtosis among the layer's candidates (R falls as κ grows, so
   a layer beyond the limit then is beyond it for whichever candidate fits best). Most
   trained layers end here, before any sample is drawn, and the answer is the one testing it
   after the distribution would give.

3. *Spectrum.* No singular value of W[units, fan_in] may lie beyond the Marchenko–Pastur edge
   σ(√m + √n) (Marchenko & Pastur 1967) by more than ``edge-fluctuations`` (4) Tracy–Widom
   fluctuations (σ/2)(1/√m + 1/√n)^{1/3} (Johnstone 2001, carried from the eigenvalue to the
   singular value; see :mod:`steelyard.rules._spectrum`), σ being the element standard
   deviation of the best candidate. Training grows a few strong directions, which leave the
   bulk; a layer that matches an initializer's histogram but has such an outlier was trained
   and is not reported. Matrices of more than 2^17 entries (256 × 512) are searched on every
   k-th row (k up to ``spectrum-stride``, 4; at least 2^17 entries and 64 rows kept, from a
   seeded offset; and never more than ``spectrum-entries`` entries, 2^22 or 16 MiB of
   float32, which takes a longer stride only on matrices of more than 2^24 entries), against
   the edge and fluctuation of that m' × n subsample: the rows of an i.i.d. matrix are an
   i.i.d. matrix, so a fresh draw passes as often as before, and a
   submatrix's top singular value never exceeds the whole one's (Thompson 1972), so what it
   shows beyond its edge the whole matrix has too. This bounds the search to a few passes over
   the matrix (it took 40–80 on the whole one); the price is power against *weak* learned
   directions: a direction θ·u·vᵀ is seen from about 2 σ(mn)^{1/4} instead of 1.5 σ(mn)^{1/4},
   σ(mn)^{1/4} being the threshold below which no method can see it (Baik, Ben Arous & Péché
   2005). Measured on fresh N(0, 1/n) draws with one planted direction, 4 fluctuations
   allowed: at 1024 × 1024, directions of 1.5, 2 and 2.5 × the threshold were found in 0, 19
   and 20 of 20 draws (one row in 8: 0, 0 and 20; the whole matrix: 20 of 20 each), at
   2816 × 1024 in 0, 10 and 10 of 10. So a layer whose only learned part is one such weak
   direction (it moved the weights by a few per cent) can now be reported as untrained;
   ``spectrum-stride`` 1 (or 0) searches every row, as before this bound, at 40–80 passes
   (``bench/untrained_rates.py --planted`` measures both). The entry cap bounds the search on
   the largest matrices (a token table, the feed-forward layers of a 7B model) to the same
   few passes over 16 MiB whatever their size (a 50,257 × 768 table keeps one row in 10, a
   128,256 × 4,096 one in 126), at the price of power there: a direction is seen from about
   (mn/2^22)^{1/4} times the threshold σ(mn)^{1/4} (times f^{-1/4} for the kept share f),
   1.8 × at 50,257 × 768 (about half the bulk edge σ(√m + √n)), 3.3 × at 128,256 × 4,096
   (1.2 × the edge). Such a layer is reported only if its weights also fit an initializer's
   histogram and scale; the planted-direction rates are in ``docs/performance.md``
   ("Eighteenth session"), and ``spectrum-entries`` 0 lifts the cap. The top singular value
   comes from ``numpy.linalg.svd`` for up to 2^13 entries (and for matrices of at most 8 rows or
   columns) and from seeded Golub–Kahan–Lanczos bidiagonalisation beyond (up to 40 steps, each
   one product with the rows and one with their transpose, stopping once the value passes the
   limit or, after 16 steps on matrices of up to 2^16 entries and 8 on larger ones, when a
   step adds less than 5 % of a fluctuation or less than a tenth of the distance still left to
   the limit: a bulk without outliers creeps towards its edge, an outlier is approached in
   geometrically shrinking steps; see :func:`steelyard.rules._spectrum.top_singular_value`).
   A full SVD costs about m·n·min(m, n), 1.5–5 ms at 2^16 entries against 0.4–0.6 ms for the
   search; on 4,000 seeded draws of 2^13–2^16 entries, never trained or with planted and
   low-rank learned directions, the search's verdict was the full SVD's in every draw
   (``bench/spectrum_paths.py``; with 8 steps, 3 borderline draws differed).
   The estimate never overestimates, and Lanczos converges fastest for the values that stand
   out from the bulk, which are the ones it looks for; on a bulk without outliers it may stop
   a fluctuation or two low, which does not change the answer. The measurement ``untrained-layer.spectrum``
   (the HTML report's spectrum chart) gives the top value, edge and limit of the rows searched
   and, for a subsample, their count (``rows_searched``).

4. *Significance across candidates and layers.* The three tests above can only fail to
   reject "this is an initializer's draw", and failing to reject is not evidence: with a
   dozen candidates, a small trained layer very often fits one of them within the KS limit
   (see the measurements below). Correcting those tests for multiplicity (Holm, Šidák) would
   only widen their limits and report *more* layers. A finding is therefore a rejection of
   the opposite hypothesis, an equivalence test: "the layer's distribution lies at least
   ``ks-margin`` δ (0.1) in KS distance from the candidate". Its p-value is
   p = min(1, 2·exp(−2n(δ − D)²)): if the truth were δ or more away, seeing D would need the
   empirical CDF to stray δ − D from the truth, whose chance is bounded so for every n by the
   Dvoretzky–Kiefer–Wolfowitz inequality with Massart's constant (Dvoretzky, Kiefer &
   Wolfowitz 1956, Ann. Math. Statist. 27; Massart 1990, Ann. Probab. 18); it is the first
   term of Kolmogorov's limit series (Kolmogorov 1933, "Sulla determinazione empirica di una
   legge di distribuzione", G. Ist. Ital. Attuari 4; Smirnov 1948), so also the asymptotic
   KS p-value wherever it is small. A layer's claim is "some candidate is within δ", so its
   p-value is the best candidate's times the number of candidates K (Bonferroni). The
   layers' p-values then go through Holm's step-down procedure (Holm 1979, "A simple
   sequentially rejective multiple test procedure", Scand. J. Statist. 6) at family level
   ``alpha`` (0.001): the k-th smallest of the L tested layers' p-values must be
   <= α/(L − k + 1). The chance that any layer whose weights are δ or more from every
   candidate is reported is then at most α, whatever the other layers are. This sets a
   minimum size justified by power: even a perfect match (D = 0) needs
   n >= ln(2KL/α)/(2δ²) weights, about 570 for a 3-layer model and 750 for 300 layers with 14
   candidates each; a true draw, whose D is about 0.87/√n, is reported reliably from about
   2,000 weights. A layer that passed the three tests but not this one is named in a note of
   the report, never a finding. Measured on small CNNs and MLPs trained with SGD and Adam on
   synthetic tasks and on the same models as torch and Keras initialise them
   (``fixtures/gen_untrained_calibration.py``, ``bench/untrained_rates.py``): before these
   two additions 72 of 984 trained layers (7.3 %, all of 256–1,023 weights) were reported as
   untrained and every never-trained layer of 1,024 weights or more was found; after, 0 of
   984 trained layers are reported, and of the never-trained layers 58 of 76 (76 %) of
   1,024–2,047 weights and 114 of 114 of 2,048–5,000 are found (the smaller ones are named
   in notes). Three seeds per model, 547 checkpoints; re-run both scripts to reproduce.

   The per-layer tests run while the layer is in memory; the layers' results are kept and
   the Holm step runs once every layer is done, so findings never depend on ``--jobs``.
   Candidates are still ruled out early, by the probe bound on D against the KS limit (all
   candidates at once on 257 order statistics); a layer that fits is tested in full even when
   it is too small to be claimed, so that the note can say so.

Layers with fewer than ``min-weights`` (256) weights or min(units, fan_in) < ``min-dim`` (8)
are skipped (they could never reach significance), and below 8 rows the Marchenko–Pastur edge
is not yet a usable description of a random matrix. Constant matrices (all zeros, say) are
left to ``dead-unit``: they match no continuous candidate.

**Why it matters.** Weights that are still their initial random draw compute nothing learned.
The usual cause is not a lazy optimizer but a checkpoint that was never loaded into the layer
(renamed keys with non-strict loading, a head re-created after loading), a layer frozen by
mistake, or one left out of the optimizer's parameter groups.

**Severity and score.** Warning; error for an output layer, whose outputs are then random.
Score = ``scoring.score(1.0, limit / D)``: the whole layer is implicated, and the closer the
match the higher it ranks. The evidence gives the best candidate and its KS distance, the
equivalence p-value (``p_value``, already multiplied by the ``candidates`` count), the margin,
``scale_z``, the number of layers in the Holm family (``layers_tested``) and the spectrum.

**What to do.** Check that the checkpoint was really loaded into this layer (compare the state
dict keys, load strictly), that the layer is not frozen and that the optimizer received its
parameters; then retrain it.
"""

from __future__ import annotations

import functools
import math
import zlib
from collections.abc import Callable, Iterator
from dataclasses import dataclass, replace

import numpy as np

from steelyard.findings import Finding, Severity
from steelyard.graph import Layer, LayerKind
from steelyard.numbers import count, measured
from steelyard.rules._initializers import Candidate, candidates, cdf_table
from steelyard.rules._layer_results import LayerResults
from steelyard.rules._significance import equivalence_p, holm
from steelyard.rules._spectrum import SPECTRUM_ENTRIES, SUBSAMPLE, edge_check, row_stride
from steelyard.rules.base import AuditContext, RuleSettings, RuleSpec, layer_finding, threshold
from steelyard.rules.scoring import score
from steelyard.stats.numerics import distinct

#: Fewest units for the row-spread test (its limit relies on a large-sample standard error).
SPREAD_ROWS = 64


@functools.lru_cache(maxsize=8)
def _steps(n: int) -> np.ndarray:
    """``[0, 1/n, …, 1]``, read-only: every layer's sample has one of a few sizes."""
    steps = np.arange(n + 1) / n
    steps.flags.writeable = False
    return steps


@functools.lru_cache(maxsize=8)
def _probe(n: int) -> np.ndarray:
    """The order statistics of :func:`best_fits`' lower bound, read-only."""
    probe = distinct(np.linspace(0, n - 1, _PROBES).astype(np.int64))
    probe.flags.writeable = False
    return probe


class Ecdf:
    """The empirical CDF of a sorted sample, kept at its distinct values only.

    A sample of bf16 weights holds about 2,000 distinct values in 20,000 (bf16 has 256
    values per binade and sign), so a candidate's CDF is evaluated a tenth as often. Within
    a run of equal values F is constant, so F_n(x) − F(x) is largest at the run's last index
    and F(x) − F_n(x⁻) at its first: the statistic is the same float as over every order
    statistic (tested bit for bit)."""

    def __init__(self, sorted_sample: np.ndarray) -> None:
        n = sorted_sample.size
        # Runs of equal *bits*: −0.0 and +0.0 compare equal, but the approximate erf gives
        # them CDFs 1e-9 apart (and numpy's sort may interleave them).
        bits = np.ascontiguousarray(sorted_sample, dtype=np.float64).view(np.uint64)
        ends = np.flatnonzero(bits[1:] != bits[:-1])
        if 2 * ends.size > n:  # few ties (float32 weights): the sample as it is
            steps = _steps(n)
            self.values, self.upto, self.below = sorted_sample, steps[1:], steps[:-1]
            return
        last = np.append(ends, n - 1)
        self.values = sorted_sample[last]
        #: F_n at each distinct value, and just below it
        self.upto = (last + 1) / n
        self.below = np.concatenate(([0.0], self.upto[:-1]))

    def distance(self, cdf: Callable[[np.ndarray], np.ndarray]) -> float:
        """sup |F_n − F| against a continuous CDF."""
        values = cdf(self.values)
        return float(max((self.upto - values).max(), (values - self.below).max()))


def ks_distance(
    sorted_sample: np.ndarray,
    cdf: Callable[[np.ndarray], np.ndarray],
    at: np.ndarray | None = None,
) -> float:
    """Kolmogorov–Smirnov statistic of a sorted sample against a continuous CDF.

    With ``at`` (indices into the sample) the supremum is taken over those order statistics
    only: a lower bound of the statistic, which exceeds the bound by at most the largest gap
    between consecutive indices divided by n (F_n and F are both monotone in between).
    """
    n = sorted_sample.size
    if at is None:
        return Ecdf(sorted_sample).distance(cdf)
    index = np.asarray(at, dtype=np.int64)
    values = cdf(sorted_sample[index])
    upper = (index + 1) / n - values
    lower = values - index / n
    return float(max(upper.max(), lower.max()))


#: Order statistics the cheap KS lower bound looks at: 257 of them, gaps of n/256.
_PROBES = 257


def ks_bounds(sorted_sample: np.ndarray, found: list[Candidate], at: np.ndarray) -> np.ndarray:
    """:func:`ks_distance` over the order statistics ``at`` for every candidate at once."""
    n = sorted_sample.size
    values = cdf_table(found, sorted_sample[at])
    upper = ((at + 1) / n)[None, :] - values
    lower = values - (at / n)[None, :]
    return np.maximum(upper.max(axis=1), lower.max(axis=1))


def best_fits(
    sorted_sample: np.ndarray, found: list[Candidate], limit: float
) -> list[tuple[float, Candidate]]:
    """The best and runner-up candidates by KS distance, (D, candidate) in order, exactly as
    over every candidate; empty when even the cheap lower bound rules every one out.

    A lower bound on every candidate's D from 257 order statistics rules most layers out at
    about 1 % of the cost. Each full D lies within [bound, bound + slack]; only a candidate
    whose bound is at most the second-smallest upper end can be the best or the runner-up, so
    only those are computed in full (ties keep the candidates' order)."""
    n = sorted_sample.size
    probe = _probe(n)
    bounds = ks_bounds(sorted_sample, found, probe)
    if bounds.min() > limit:
        return []
    slack = (int(np.diff(probe).max()) if probe.size > 1 else 0) / n
    uppers = np.sort(bounds + slack)
    cutoff = uppers[min(1, uppers.size - 1)]
    close = [c for c, bound in zip(found, bounds, strict=True) if bound <= cutoff]
    # Candidates of one law (Glorot and LeCun of a square layer) are measured once.
    distances: dict[tuple[str, float], float] = {}
    ecdf = Ecdf(sorted_sample)
    for c in close:
        if (c.family, c.scale) not in distances:
            distances[c.family, c.scale] = ecdf.distance(c.cdf)
    return sorted(((distances[c.family, c.scale], c) for c in close), key=lambda x: x[0])


def ks_limit(n: int, floor: float) -> float:
    """max(1.95/√n, floor): the α = 0.001 Kolmogorov critical value, floored."""
    return max(1.95 / math.sqrt(n), floor)


def quartiles(values: np.ndarray) -> tuple[float, float, float]:
    """The 25th, 50th and 75th percentiles exactly as ``numpy.quantile``'s default (linear)
    method gives them, from one sort (a sixth of its time on a few thousand values)."""
    ordered = np.sort(values, axis=None)
    virtual = (ordered.size - 1) * np.array([0.25, 0.5, 0.75])
    below = np.floor(virtual).astype(np.int64)
    above = np.minimum(below + 1, ordered.size - 1)
    gamma = virtual - below
    a, b = ordered[below], ordered[above]
    # numpy's lerp: from the nearer end, so the result is exact at gamma = 0 and 1
    out = np.where(gamma >= 0.5, b - (b - a) * (1 - gamma), a + (b - a) * gamma)
    return float(out[0]), float(out[1]), float(out[2])


def relative_spread(row_squares: np.ndarray) -> float:
    """(IQR(S)/1.349 / median S)², the squared robust coefficient of variation of the units'
    sums of squares (infinite when the median is not positive)."""
    low, middle, high = quartiles(row_squares)
    if middle <= 0:
        return math.inf
    return float(((high - low) / 1.349 / middle) ** 2)


def row_spread(row_squares: np.ndarray, fan_in: int, kurtosis: float) -> float:
    """R = (IQR(S)/1.349 / median S)² / ((κ − 1)/n): about 1 for an i.i.d. draw, large once
    training has made the units' norms differ (see the module docstring)."""
    return relative_spread(row_squares) / ((kurtosis - 1.0) / fan_in)


def spread_limit(units: int, sigmas: float) -> float:
    """1 + sigmas × 2.33/√m: the row-spread limit for ``units`` rows."""
    return 1.0 + sigmas * 2.33 / math.sqrt(units)


def scale_z(sample: np.ndarray, candidate: Candidate) -> float:
    """z = (mean(x²)/σ² − 1) / sqrt((κ − 1)/n): how many standard errors the sample's mean
    square lies from the candidate's variance σ² (the mean of n i.i.d. squares has variance
    σ⁴(κ − 1)/n, κ the element kurtosis)."""
    n = sample.size
    ratio = float(np.dot(sample, sample)) / n / candidate.std**2
    return (ratio - 1.0) / math.sqrt((candidate.kurtosis - 1.0) / n)


def _gates(ctx: AuditContext, layer: Layer) -> int:
    """Gate layers sharing a recurrent layer's tensor (1 for other layers: only recurrent
    candidates use it, and counting means a walk over every layer)."""
    if layer.kind is not LayerKind.RECURRENT:
        return 1
    return sum(1 for other in ctx.checkpoint.layers if other.weight == layer.weight) or 1


@dataclass(frozen=True)
class _Tested:
    """What the per-layer pass found on one layer; the checkpoint-wide step decides."""

    candidates: int
    """How many initializers the layer was compared with (the Bonferroni factor)."""
    p_value: float
    """Equivalence p-value of the best candidate that passed every per-layer test, times
    ``candidates``, capped at 1 (1 when none passed)."""
    finding: Finding | None
    """The finding to report if the layer's equivalence survives Holm's procedure."""


@dataclass(frozen=True)
class UntrainedLayerSettings:
    """Thresholds of ``untrained-layer``."""

    ks: float | None = threshold(None)
    ks_floor: float = threshold(0.02)
    ks_margin: float = threshold(0.1)
    alpha: float = threshold(0.001)
    scale_z: float = threshold(3.29)
    scale_floor: float = threshold(0.05)
    row_spread: float = threshold(10.0)
    edge_fluctuations: float = threshold(4.0)
    spectrum_stride: int = threshold(SUBSAMPLE)
    spectrum_entries: int = threshold(SPECTRUM_ENTRIES)
    sample: int = threshold(20000)
    min_weights: int = threshold(256)
    min_dim: int = threshold(8)
    seed: int = threshold(0)
    include_embeddings: bool = threshold(True)


def _results(ctx: AuditContext) -> LayerResults[_Tested]:
    return ctx.stats.shared(f"{RULE.name}:results", LayerResults[_Tested])


def _layer(ctx: AuditContext, limits: UntrainedLayerSettings, layer: Layer) -> _Tested | None:
    m, n = layer.units, layer.fan_in
    if m * n < limits.min_weights or min(m, n) < limits.min_dim:
        return None
    norms = ctx.stats.row_norms(layer)
    if not np.all(np.isfinite(norms)):
        return None  # nonfinite's business (a NaN or infinity makes its row norm so)
    found = candidates(layer, _gates(ctx, layer))
    nothing = _Tested(len(found), 1.0, None)
    spread_max = spread_limit(m, limits.row_spread)
    # The cheapest sufficient test first, from the shared pass's row norms: R falls as κ
    # grows, so a spread beyond the limit under the largest candidate kurtosis is beyond it
    # for every candidate, and the layer is trained whichever candidate fits best (the same
    # answer as testing it after the distribution).
    spread = relative_spread(norms**2) if m >= SPREAD_ROWS else None
    if spread is not None and spread / ((max(c.kurtosis for c in found) - 1.0) / n) > spread_max:
        return nothing
    seed = zlib.crc32(layer.name.encode("utf-8")) ^ limits.seed
    sample = ctx.stats.sample(layer, limits.sample, seed)
    if sample[0] == sample[-1]:
        return None
    limit = limits.ks if limits.ks is not None else ks_limit(sample.size, limits.ks_floor)
    margin = limits.ks_margin
    scored = best_fits(sample, found, limit)
    if not scored or scored[0][0] > limit:
        return nothing
    distance, best = scored[0]
    # The KS distance barely sees a wrong scale in small samples; the mean square does.
    z = scale_z(sample, best)
    relative = abs(z) * math.sqrt((best.kurtosis - 1.0) / sample.size)
    if abs(z) > limits.scale_z and relative > limits.scale_floor:
        return nothing
    if spread is not None:
        spread /= (best.kurtosis - 1.0) / n  # R for the best candidate
        if spread > spread_max:
            return nothing  # the units' norms differ as only training makes them
    allowed = limits.edge_fluctuations
    # Only a layer that matched an initializer is read for its spectrum: every stride-th row
    # (streamed when the layer is too large to cache).
    stride = row_stride(m, n, limits.spectrum_stride, limits.spectrum_entries)
    check = edge_check(ctx.stats.rows(layer, seed % stride, stride), best.std, allowed, seed)
    top, edge, fluctuation, beyond = check.top, check.edge, check.fluctuation, check.beyond
    spectrum: dict[str, object] = {
        "top_singular": float(f"{top:.6g}"), "mp_edge": float(f"{edge:.6g}"),
        "allowed": float(f"{edge + allowed * fluctuation:.6g}"), "initializer": best.name,
    }
    subsampled = check.rows < m
    if subsampled:
        spectrum["rows_searched"] = check.rows
    ctx.measurements.record(layer.name, "untrained-layer.spectrum", spectrum)
    if beyond > allowed:
        return nothing  # a direction grew out of the bulk: trained
    p_value = min(1.0, len(found) * equivalence_p(distance, sample.size, margin))
    severity = Severity.ERROR if layer.is_output else Severity.WARNING
    runner_up = scored[1] if len(scored) > 1 else None
    evidence: dict[str, object] = {
        "initializer": best.name,
        "ks": round(distance, 6),
        "ks_limit": round(limit, 6),
        "ks_margin": margin,
        "p_value": float(f"{p_value:.4g}"),
        "candidates": len(found),
        "scale_z": round(z, 4),
        "sample": int(sample.size),
        "top_singular": top,
        "mp_edge": edge,
        "fluctuation": fluctuation,
        "beyond_edge": round(beyond, 4),
        "edge_fluctuations": allowed,
        "sigma": best.std,
        "spectrum": check.method,
    }
    if subsampled:
        evidence["spectrum_rows"] = check.rows
    if spread is not None:
        evidence["row_spread"] = round(spread, 4)
        evidence["row_spread_limit"] = round(spread_max, 4)
    if runner_up is not None:
        evidence["runner_up"] = {"initializer": runner_up[1].name, "ks": round(runner_up[0], 6)}
    finding = layer_finding(
        RULE.name,
        layer,
        severity=severity,
        score=score(1.0, limit / max(distance, 1e-9)),
        message=(
            f"the weights look freshly initialised: their distribution matches {best.name} "
            f"(KS distance {measured(distance)} <= {measured(limit)}; within {margin:g} of it at "
            f"p = {measured(p_value)}) and the top singular value "
            + (
                f"of {count(check.rows)} of its {count(m)} rows, {measured(top)},"
                if subsampled
                else measured(top)
            )
            + f" stays within {allowed:g} fluctuations of the Marchenko–Pastur edge "
            f"{measured(edge)}"
            + (
                "; this is an output layer, so the model's outputs are random"
                if layer.is_output
                else ""
            )
        ),
        hint="check that the checkpoint was really loaded into this layer (matching keys, strict "
        "loading), that the layer is not frozen and that the optimizer received its parameters",
        evidence=evidence,
    )
    return _Tested(len(found), p_value, finding)


def check_layer(
    ctx: AuditContext, settings: RuleSettings[UntrainedLayerSettings], layer: Layer
) -> Iterator[Finding]:
    """Test one layer and keep the result for :func:`finish`; it yields nothing itself,
    because whether a match is significant depends on how many layers were tested."""
    limits = settings.for_layer(layer)
    if layer.kind is not LayerKind.EMBEDDING or limits.include_embeddings:
        tested = _layer(ctx, limits, layer)
        if tested is not None:
            _results(ctx).put(layer, tested)
    yield from ()


def finish(
    ctx: AuditContext, settings: RuleSettings[UntrainedLayerSettings]
) -> Iterator[Finding]:
    """Holm's procedure over every tested layer; findings for the layers it confirms."""
    tested = _results(ctx).in_order(ctx.checkpoint.layers)
    alpha = settings.rule_wide.alpha
    confirmed = holm([t.p_value for _, t in tested], alpha)
    for (layer, result), significant in zip(tested, confirmed, strict=True):
        if result.finding is None:
            continue
        if significant:
            evidence = dict(result.finding.evidence)
            evidence["layers_tested"] = len(tested)
            yield replace(result.finding, evidence=evidence)
        else:
            ctx.notes.add(
                RULE.name,
                "weights that fit an initializer's draw, but too few of them to tell a "
                f"never-trained layer from a trained one at α = {alpha:g} over "
                f"{count(len(tested))} tested layers",
                layer.name,
            )


RULE = RuleSpec(
    name="untrained-layer",
    severity=Severity.WARNING,
    settings=UntrainedLayerSettings,
    summary="a layer whose weights are still an initializer's random draw computes nothing learned, "
    "usually because the checkpoint was never loaded into it",
    doc=__doc__ or "",
    per_layer=check_layer,
    finish=finish,
)
