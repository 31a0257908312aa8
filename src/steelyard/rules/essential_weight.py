"""``essential-weight``: single weights far beyond their row and column, which clipping,
pruning and low-bit quantization must keep.

**What it checks.** In each dense or convolution layer's canonical matrix ``W[units, fan_in]``
a weight ``w = W[j, k]`` is an *outlier weight* when it is at least ``sigma`` (20) root mean
squares of the *rest* of its row and of the rest of its column away from zero:

    w² ≥ sigma² · (R_j − w²) / (n − 1)   and   w² ≥ sigma² · (C_k − w²) / (m − 1)

with ``R_j = Σ_k W[j,k]²`` over the row's ``n = fan_in`` weights and ``C_k = Σ_j W[j,k]²``
over the column's ``m = units`` (a convolution's column is one input channel at one kernel
position). Leaving the weight out of its own scale matters: with it, no weight can exceed
``√n`` RMS of its row (128 inputs: 11.3), however large it is. Rearranged,
``w² · (n − 1 + sigma²) ≥ sigma² · R_j``, the test is one comparison per weight against a
per-row and a per-column limit, so it costs at most two vectorised passes over the matrix
(a block of rows whose largest weight stays within the smallest of their row limits holds no
candidate and is passed over after two flat reductions, as every block of an untrained layer
is; the column sums are taken only for the candidates' columns). The RMS
(not the standard deviation) is the scale because weights are centred near zero and the RMS is
the larger of the two, so the test is conservative. Layers with fewer than 8 units or inputs
are skipped (too few weights for a scale).

**Why it matters.** Yu et al. 2024 ("The Super Weight in Large Language Models", arXiv
2411.07191; cited from memory) found that a handful of scalar weights, typically in the
feed-forward down-projection of an early block, are essential: zeroing a single one destroys
the model's ability to generate text, while they survive only if clipping and quantization
keep them (e.g. by storing them apart). They sit where the massive activations of the
residual stream are produced, the outlier features of Dettmers et al. 2022 ("LLM.int8():
8-bit Matrix Multiplication for Transformers at Scale", NeurIPS), whose removal likewise
collapses performance. A weight this far outside both its row and its column is exactly what
magnitude clipping removes first, what an absmax scale is stretched by, and what a pruning
criterion based on the row's statistics misjudges, so its position must be known.

**How other rules respect it.** The measurement (:func:`essential_weights`) does not depend
on whether this rule is enabled. ``unsupported-weight`` never lists a weight this test marks
(its evidence counts them as ``essential_kept``), and ``dead-unit``'s pruning hint leaves out
units whose row holds one.

**Evidence.** ``count`` (outlier weights in the layer), ``weights`` (up to ``max-listed``
(20) of them, most extreme first: ``unit``, ``input`` (flat fan-in index), ``value``,
``row_rms`` and ``column_rms`` (of the rest of the row and column), ``row_sigmas`` and
``column_sigmas``), ``sigma``.

**Severity and score.** Info: this is information to preserve, not a defect. Score
``scoring.score(units with one / units, min(row, column sigmas) / sigma)``.

**What to do.** Keep these weights exactly when compressing: exclude them from clipping and
pruning, store them in higher precision (or their rows), and check a quantized model's
outputs against the float one.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np

from steelyard.findings import Finding, Severity
from steelyard.graph import Layer, LayerKind
from steelyard.numbers import count as counted
from steelyard.numbers import measured
from steelyard.rules.base import (
    AuditContext,
    RuleSettings,
    RuleSpec,
    layer_finding,
    threshold,
)
from steelyard.rules.scoring import score
from steelyard.stats.low_rank import column_squares, factor_squares
from steelyard.stats.numerics import sums_of_squares
from steelyard.stats.passes import Blocks
from steelyard.streaming import row_blocks

_MIN_SIDE = 8
#: Float64 slices summed per block (the grouping fixes the float64 rounding of the scales).
_BLOCK_BYTES = 2**18
#: Row blocks of the hit scan, about 1 MiB (one core's L2 here): |W| and the comparison stay
#: in cache, in few enough calls that two workers rarely wait for each other (256 KiB blocks:
#: 1.9-2.5 ms a 2816 x 1024 layer on one thread, 1.4-1.6 ms each on two; 1 MiB: 1.6-1.7 and
#: 1.0-1.25 ms).
_SCAN_BYTES = 2**20
_KINDS = (LayerKind.DENSE, LayerKind.CONV, LayerKind.CONV_TRANSPOSE)


@dataclass(frozen=True)
class EssentialWeightSettings:
    """Thresholds of ``essential-weight``."""

    sigma: float = threshold(20.0)
    max_listed: int = threshold(20)


@dataclass(frozen=True)
class EssentialWeights:
    """One layer's outlier weights, most extreme first."""

    units: np.ndarray
    inputs: np.ndarray
    values: np.ndarray
    row_rms: np.ndarray
    column_rms: np.ndarray

    @property
    def positions(self) -> frozenset[tuple[int, int]]:
        """Every (unit, input) marked essential."""
        return frozenset(zip(self.units.tolist(), self.inputs.tolist(), strict=True))

    @property
    def rows(self) -> frozenset[int]:
        """The units whose row holds at least one essential weight."""
        return frozenset(self.units.tolist())


def _squares_f64(block: np.ndarray, rows: np.ndarray | None, columns: np.ndarray | None) -> np.ndarray:
    """Σ w² in float64 of the chosen ``rows`` (per row) or ``columns`` (per column) of
    ``block``, a row block at a time: a float64 copy of a whole slice would double the
    working set when the found weights touch most rows (outlier channels)."""
    units, fan_in = block.shape
    if rows is not None:
        out = np.empty(rows.size)
        for a, b in row_blocks(rows.size, fan_in, _BLOCK_BYTES):
            wide = block[rows[a:b]].astype(np.float64)
            out[a:b] = np.einsum("ij,ij->i", wide, wide)
        return out
    assert columns is not None
    out = np.zeros(columns.size)
    for a, b in row_blocks(units, max(1, columns.size), _BLOCK_BYTES):
        # take, not block[a:b, columns]: the same values, 2.6 × faster (41 columns of a
        # 2184 × 1024 block: 0.27 against 0.70 ms)
        wide = np.take(block[a:b], columns, axis=1).astype(np.float64)
        out += np.einsum("ij,ij->j", wide, wide)
    return out


def _row_limits(rows: np.ndarray, fan_in: int, s2: float) -> np.ndarray:
    """Per row the float32 limit of the row test |w| >= sqrt(sigma²·R_j/(n−1+sigma²)). A limit
    beyond the float32 range (rows of weights near its top) becomes +Inf, which no weight
    exceeds, without numpy's overflow warning."""
    with np.errstate(over="ignore"):
        return np.sqrt(s2 * rows / (fan_in - 1 + s2)).astype(np.float32)


_NONE = EssentialWeights(*(np.zeros(0, dtype) for dtype in (np.int64, np.int64, float, float, float)))


def measure(
    matrix: np.ndarray, sigma: float, row_squares: np.ndarray | None = None
) -> EssentialWeights:
    """The outlier weights of ``W[units, fan_in]`` (this rule's page defines the test);
    ``row_squares`` (Σ_k W_jk² per row) when already known."""
    units, fan_in = matrix.shape
    if units < _MIN_SIDE or fan_in < _MIN_SIDE:
        return _NONE
    block = np.asarray(matrix, dtype=np.float32)
    rows = sums_of_squares(block, axis=1) if row_squares is None else row_squares
    s2 = sigma * sigma
    # The row test, in cache-sized row blocks, so |W| and the comparison never leave the
    # cache (the matrix is read once).
    row_limit = _row_limits(rows, fan_in, s2)
    # A row whose limit is 0 holds only zeros and one whose limit is NaN holds a NaN: neither
    # can have a weight strictly beyond it, so the smallest positive limit bounds the block.
    positive = np.where(row_limit > 0, row_limit, np.float32(np.inf))
    found_u: list[np.ndarray] = []
    found_k: list[np.ndarray] = []
    scratch = np.empty(0, np.float32)
    failed = 0
    for a, b in row_blocks(units, fan_in, _SCAN_BYTES):
        # No weight of the block beyond the smallest limit of its rows: nothing to find. Two
        # flat reductions cost about a third of the scan (a 1408 x 512 block: 71 against
        # 205 us), and every block of a layer without heavy tails ends here (a NaN fails the
        # test). Trained rows differ in scale, so a block's smallest limit is often below its
        # largest weight: after two blocks that fail, the layer is scanned without the test.
        if failed < 2:
            peak = max(float(block[a:b].max()), -float(block[a:b].min()))
            if peak <= float(positive[a:b].min()):
                continue
            failed += 1
        if scratch.size < (b - a) * fan_in:
            scratch = np.empty((b - a) * fan_in, np.float32)
        magnitude = np.abs(block[a:b], out=scratch[: (b - a) * fan_in].reshape(b - a, fan_in))
        # Strictly beyond the limit: in a row of zeros the limit is 0 and no weight stands out
        # (with >= every zero would be a candidate, one Python step each).
        hits = magnitude > row_limit[a:b, None]
        if hits.any():
            # Flat positions split by divmod: ``nonzero`` of a 2-D mask is several times slower.
            uu, kk = np.divmod(np.flatnonzero(hits), fan_in)
            found_u.append(uu + a)
            found_k.append(kk)
    if not found_u:
        return _NONE
    cand_u, cand_k = np.concatenate(found_u), np.concatenate(found_k)
    # Column sums only for the (rare) candidates' columns, exactly, in float64: subtracting
    # w² from a float32 sum it dominates would leave mostly rounding error. Each column is
    # summed once, however many candidates it holds (outlier channels put thousands in
    # one), and the found weights keep their candidates' sums: gathering a column touches a
    # cache line in every row, so a second gather took a third of the rule's time on a
    # heavy-tailed 4096 × 1024 layer.
    wanted, where = np.unique(cand_k, return_inverse=True)
    columns = _squares_f64(block, None, wanted)[where]
    w2 = np.square(block[cand_u, cand_k].astype(np.float64))
    keep = (w2 * (fan_in - 1 + s2) >= s2 * rows[cand_u]) & (
        w2 * (units - 1 + s2) >= s2 * columns
    )
    keep &= np.isfinite(w2) & (w2 > 0)
    u, k, w2, column_sums = cand_u[keep], cand_k[keep], w2[keep], columns[keep]
    if u.size == 0:
        return _NONE
    # The found weights' rows, exactly too (a row is contiguous: cheap to gather).
    found_rows, row_of = np.unique(u, return_inverse=True)
    row_sums = _squares_f64(block, found_rows, None)[row_of]
    return _ranked(u, k, block[u, k], w2, row_sums, column_sums, (units, fan_in))


def _ranked(
    u: np.ndarray,
    k: np.ndarray,
    values: np.ndarray,
    w2: np.ndarray,
    row_sums: np.ndarray,
    column_sums: np.ndarray,
    shape: tuple[int, int],
) -> EssentialWeights:
    """The found weights (unit, input, value, w², the float64 sums of squares of each one's
    row and column) with their rows' and columns' RMS without them, most extreme first."""
    units, fan_in = shape
    row_rms = np.sqrt(np.maximum(row_sums - w2, 0.0) / (fan_in - 1))
    col_rms = np.sqrt(np.maximum(column_sums - w2, 0.0) / (units - 1))
    with np.errstate(divide="ignore", invalid="ignore"):
        extremity = np.sqrt(w2) / np.maximum(row_rms, col_rms)
    order = np.lexsort((k, u, -extremity))
    return EssentialWeights(
        u[order].astype(np.int64),
        k[order].astype(np.int64),
        values[order].astype(np.float64),
        row_rms[order],
        col_rms[order],
    )


def measure_blocks(
    blocks: Blocks,
    shape: tuple[int, int],
    sigma: float,
    row_squares: np.ndarray,
) -> EssentialWeights:
    """:func:`measure` of a layer too large to hold in float32, read in one pass of row
    blocks (:meth:`steelyard.stats.LayerStats.streamed`): each block is scanned for
    candidates against its rows' limits while every row's and column's float64 sum of squares
    accumulates, so nothing is read twice and nothing larger than a block is held. The
    float64 column sums are added in another order than :func:`measure`'s (to the last bits)."""
    units, fan_in = shape
    if units < _MIN_SIDE or fan_in < _MIN_SIDE:
        return _NONE
    rows = np.asarray(row_squares, np.float64)
    s2 = sigma * sigma
    row_limit = _row_limits(rows, fan_in, s2)
    row_sums = np.zeros(units)
    column_sums = np.zeros(fan_in)
    found: tuple[list[np.ndarray], list[np.ndarray], list[np.ndarray]] = ([], [], [])
    for first, end, block in blocks():
        for a, b in row_blocks(end - first, fan_in, _SCAN_BYTES):
            part = block[a:b]
            wide = part.astype(np.float64)
            row_sums[first + a : first + b] = np.einsum("ij,ij->i", wide, wide)
            column_sums += np.einsum("ij,ij->j", wide, wide)
            hits = np.abs(part) > row_limit[first + a : first + b, None]
            uu, kk = np.divmod(np.flatnonzero(hits), fan_in)
            if uu.size:
                found[0].append(uu + first + a)
                found[1].append(kk)
                found[2].append(part[uu, kk])
    if not found[0]:
        return _NONE
    u, k, values = (np.concatenate(part) for part in found)
    w2 = np.square(values.astype(np.float64))
    keep = (w2 * (fan_in - 1 + s2) >= s2 * rows[u]) & (w2 * (units - 1 + s2) >= s2 * column_sums[k])
    keep &= np.isfinite(w2) & (w2 > 0)
    u, k, w2, values = u[keep], k[keep], w2[keep], values[keep]
    if u.size == 0:
        return _NONE
    return _ranked(u, k, values, w2, row_sums[u], column_sums[k], shape)


#: Room for the rounding of a low-rank product's entry (its float64 dot product, then
#: float32: about 6e-8 relative) when an entry bound is compared with a row's limit.
_ROUNDING_ROOM = 1e-6


def none_can_stand_out(
    left: np.ndarray, right: np.ndarray, row_squares: np.ndarray, sigma: float
) -> bool:
    """Whether no weight of the low-rank product ``left @ right`` (float64 factors, rounded to
    float32 as stored) can pass both of :func:`measure`'s tests, so it would find none.

    By Cauchy–Schwarz |W_jk| <= ‖left_j‖·‖right_k‖. The row test needs |W_jk| above row j's
    limit, the column test W_jk²·(units − 1 + σ²) >= σ²·C_k, C_k = Σ_j W_jk² taken exactly
    from the factors (:func:`steelyard.stats.low_rank.column_squares`). A weight can pass
    both only where the bound reaches both thresholds; rows sorted by ‖left_j‖ answer that for
    every column at once. A row whose left factor is zero holds only zeros, which the strict
    row test never takes. An adapter's update of 11,008 × 4,096 from rank-16 factors is then
    settled at O((units + fan_in)·r²) instead of a pass over 45M products; an outlier input
    column (a column large in every row) fails the column test everywhere, and is settled
    too."""
    units, fan_in = left.shape[0], right.shape[1]
    if units < _MIN_SIDE or fan_in < _MIN_SIDE:
        return True
    s2 = sigma * sigma
    room = 1 + _ROUNDING_ROOM
    limit = _row_limits(np.asarray(row_squares, np.float64), fan_in, s2).astype(np.float64)
    row_length, column_length = (np.sqrt(squares) for squares in factor_squares(left, right))
    if np.all((row_length == 0) | (row_length * column_length.max(initial=0.0) * room < limit)):
        return True  # the row test alone rules every weight out
    columns = column_squares(left, right)
    # |W_jk| must reach this for the column test (C_k a little low: float32 rounding of W)
    needed = np.sqrt(s2 * columns * (1 - _ROUNDING_ROOM) / (units - 1 + s2))
    live = column_length > 0  # a zero column holds zeros only
    order = np.argsort(-row_length, kind="stable")
    longest_first = row_length[order]
    with np.errstate(divide="ignore", invalid="ignore"):
        reach = np.where(row_length > 0, row_length / limit, -np.inf)[order]
    best_reach = np.maximum.accumulate(np.nan_to_num(reach, nan=np.inf))
    # rows whose bound can reach column k's need: a prefix of the longest-first order
    enough = needed[live] / (column_length[live] * room)
    prefix = np.searchsorted(-longest_first, -enough, side="right")
    reached = prefix > 0
    # and among them a row whose bound passes its own limit in column k
    passes = best_reach[np.maximum(prefix - 1, 0)] * column_length[live] * room > 1.0
    return not bool(np.any(reached & passes))


def essential_weights(
    ctx: AuditContext,
    layer: Layer,
    settings: RuleSettings[EssentialWeightSettings] | None = None,
) -> EssentialWeights:
    """The weights of ``layer`` this rule marks essential, with the policy's ``sigma``
    (whether or not the rule is enabled); measured once per audit and layer. Other rules call
    it to leave these weights alone (pruning advice, unsupported weights)."""
    if layer.kind not in _KINDS:
        return _NONE
    sigma = (settings or RuleSettings(RULE, ctx.policy)).for_layer(layer).sigma

    def measured() -> EssentialWeights:
        squares = np.square(ctx.stats.row_norms(layer))
        factors = ctx.stats.factors(layer)
        if factors is not None and none_can_stand_out(*factors, squares, sigma):
            return _NONE
        streamed = ctx.stats.streamed(layer)
        if streamed is not None:  # a table too large to cache: one pass, never assembled
            return measure_blocks(streamed, (layer.units, layer.fan_in), sigma, squares)
        return measure(ctx.stats.matrix(layer), sigma, squares)

    return ctx.stats.shared(f"{RULE.name}:{layer.name}:{sigma!r}", measured)


def check_layer(
    ctx: AuditContext, settings: RuleSettings[EssentialWeightSettings], layer: Layer
) -> Iterator[Finding]:
    """One informational finding per layer holding outlier weights."""
    found = essential_weights(ctx, layer, settings)
    if found.units.size == 0:
        return
    limits = settings.for_layer(layer)
    listed = []
    for i in range(min(max(1, limits.max_listed), found.units.size)):
        listed.append(
            {
                "unit": int(found.units[i]),
                "input": int(found.inputs[i]),
                "value": float(found.values[i]),
                "row_rms": float(found.row_rms[i]),
                "column_rms": float(found.column_rms[i]),
                "row_sigmas": float(abs(found.values[i]) / found.row_rms[i])
                if found.row_rms[i] > 0 else None,
                "column_sigmas": float(abs(found.values[i]) / found.column_rms[i])
                if found.column_rms[i] > 0 else None,
            }
        )
    first = listed[0]
    least = min(x for x in (first["row_sigmas"], first["column_sigmas"]) if x is not None) if (
        first["row_sigmas"] is not None or first["column_sigmas"] is not None
    ) else float("inf")
    count = int(found.units.size)
    where = ", ".join(
        f"unit {w['unit']} input {w['input']} = {measured(w['value'])}" for w in listed[:3]
    )
    more = f" and {counted(count - 3)} more" if count > 3 else ""
    yield layer_finding(
        RULE.name,
        layer,
        severity=Severity.INFO,
        units=sorted(found.rows),
        score=score(len(found.rows) / layer.units, least / limits.sigma),
        message=(
            f"{counted(count)} weight{'s' if count != 1 else ''} at least {limits.sigma:g} RMS beyond the "
            f"rest of their row and column: {where}{more}"
        ),
        hint="keep these weights exactly when clipping, pruning or quantizing (store them "
        "apart or in higher precision); the model may depend on them",
        evidence={"count": count, "weights": listed, "sigma": limits.sigma},
    )


RULE = RuleSpec(
    name="essential-weight",
    severity=Severity.INFO,
    settings=EssentialWeightSettings,
    summary="a single weight far beyond its row and column is one clipping, pruning or "
    "low-bit quantization must keep: models can depend on a handful of them",
    doc=__doc__ or "",
    per_layer=check_layer,
)
