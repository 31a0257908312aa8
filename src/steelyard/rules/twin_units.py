"""``twin-units``: two units that compute the same thing while their consumers weight them lopsidedly.

**What it checks.** Each unit j of a layer is the row r_j = [w_j; b_j] of its incoming weights
and bias, with an inference-form batch norm that follows folded in (w' = w·γ/sqrt(var+ε),
b' = (b−μ)·γ/sqrt(var+ε) + β), because that is what the deployed unit computes. Units i and k
are *twins* when cos(r_i, r_k) >= ``cosine`` (default 0.995) and

* for a positively homogeneous activation (ReLU, leaky ReLU, identity: f(a·z) = a·f(z) for
  a > 0) r_k ≈ s·r_i with any scale s > 0, so unit k outputs s times unit i;
* otherwise the norms also agree, |‖r_i‖ − ‖r_k‖| <= ``norm-tolerance`` (5 %) of the larger,
  and s = 1;
* with a negative cosine <= −``cosine``: for the identity, s < 0 is allowed (unit k outputs s
  times unit i, consumer columns u_i and s·u_k); for tanh, which is odd, the norms must agree
  and s = −1. ReLU-family and other activations are not odd, so a negative cosine is never a
  twin there.

Let u_j be everything the consumers do with unit j (``consumer_block`` of every consumer,
concatenated). Unit k then contributes s·u_k in units of unit i's output. A twin pair is
reported when it is

* *lopsided*: max(‖u_i‖, ‖s·u_k‖) >= ``lopsided-ratio`` (4) × the smaller, or
* *cancelling*: cos(u_i, s·u_k) <= −0.9 and ‖u_i + s·u_k‖ <= 0.25 (‖u_i‖ + ‖s·u_k‖): the two
  units mostly undo each other.

When several units are mutually twins, the pairs are grouped into twin groups (union-find) and
reported once per group; the group is lopsided when its largest contribution is ``lopsided-ratio``
times its smallest, cancelling when any two of its members cancel.

**Why it matters.** Two units that compute one function are one unit paid for twice. If the
training objective carried an L2 penalty the pair would hold the consumer weight evenly:
minimising ‖a‖² + ‖b‖² subject to a + b = c gives a = b = c/2. Without one, gradient descent
gives both twins the same gradient (their outputs are equal), so u_i − u_k never changes and a
lopsided start stays lopsided (the test suite shows both by training). A lopsided or cancelling
pair therefore means an unregularised layer carrying dead weight, a large norm that buys
nothing (cancelling pairs inflate norms and amplify noise), and a free compression.

**The merge.** Drop unit k and add s·u_k to unit i's consumer columns: unit i then carries
u_i + s·u_k, exactly what the pair contributed (function-preserving for exact twins). The
evidence gives the parameter saving (the dropped row, fan_in + 1 with a bias, its normalisation
parameters and its consumer columns) and the squared-norm saving
‖r_k‖² + ‖u_k‖² − (‖u_i + s·u_k‖² − ‖u_i‖²), computed on the folded rows.

**Search.** Rows are normalised in float32 (their norms come from the shared one-pass
statistics, in float64); a float32 cosine more than 1e-4 from the threshold decides a pair, a
closer one is recomputed in float64. Layers of up to ``exact-limit`` (512) units compare blocks
of rows with every later row by Gram products (BLAS), n²·d/2 multiply-adds; when the rows are
wide (d >= 512 and n·128·(d + n) well below n²·d: a 512 × 4608 convolution, say) the rows are
first projected onto 128 seeded Gaussian directions and only the pairs whose projected cosine
passes a screen are confirmed from the rows. The screen's limit comes from the chi-square tail
bounds of Laurent & Massart (2000, Ann. Statist. 28, Lemma 1), so that a pair at the threshold
is dropped with chance at most 1e-9 whatever the weights (0.938 at the default cosine); the
evidence then says ``screened`` (a 512 × 4608 layer: 18 against 7 ms). Wider layers use a
sub-quadratic candidate search: random-hyperplane sign hashing (SimHash, Charikar 2002) over
several tables sized so that a pair exactly at the threshold collides in some table with
probability >= 0.9999 (16 bits × 11 tables at cosine 0.995: 176 projections per row, one BLAS
product, n·d·176). Candidates are compared in blocks, never one pair at a time across the
layer: the pairs of buckets of up to 4 rows are deduplicated across tables and confirmed once;
a larger bucket gets one Gram product per table. *Bucket cap:* a bucket of more than 128 rows
(rows that share directions, as trained rows do, or near copies) gets a longer key for its
rows only, 4 more bits at a time up to 24 more; a bucket still larger (its rows agree on 40
random hyperplanes: a cluster of near copies) compares each run of 128 members with the 512
members from its start (all pairs up to 512 members, a band beyond). Buckets are compared on
the rows' hashing projections (176 numbers, normalised), against the same chi-square screen
limit (0.967 at the default cosine for 176 directions): rows that share a direction (a
common bias, outlier input columns) crowd the buckets with pairs far from twins, and only the
pairs that pass are confirmed from the rows themselves; a pair at the threshold is missed by
the screen with chance at most 1e-9 on top of the hashing's 1e-4 (union bound). When most
colliding pairs pass (a cluster of near copies, judged on the first table) the buckets' rows
are compared directly instead. Confirmation thus costs at most 4 · 128 dot products per row
and table whatever the weights; when the planned dot
products, times 3 (their measured cost against the exact search's large blocks), exceed the
exact search's, the layer is searched exactly (or screened) instead (the evidence says which).
Seeded, so deterministic. Each row keeps its first 64 later partners and its first earlier
one, which bounds the work on a layer of copies (a constant initialisation) while keeping
every twin in its group; groups of more than 512 members are checked for cancellation against
their kept unit only. A layer whose twins could not be reported (no known consumer and
``report-unlinked`` false) is not searched at all. Measured against the exact search with
planted twins on layers 1024–8192 wide, fan-in 1024–4096, on independent, correlated
(low-rank power-law plus heavy-tailed noise), near-duplicate (30 % near copies), outlier-column
and clustered backgrounds (``bench/twin_recall.py``, figures in docs/performance.md): recall
1.0 on every layer within the partner cap; the rule documents recall >= 0.99 per layer. In a
bucket the longer keys cannot split and larger than 512 rows, twins further apart than the band
may be missed (2 of 1,036 members of a planted cluster, measured).

**Scope.** Embeddings are skipped unless ``include-embeddings`` is true. Recurrent gate layers are
skipped (a hidden unit is the product of several gates and its own recurrence, so a twin row in
one gate is not a redundant unit), as are softmax layers and layers followed by a layer, group,
instance or RMS normalisation (dropping a unit changes the statistics the others are normalised
by). Grouped convolutions compare units within a group only. A layer with no known consumer (or
whose consumer mixes it with another producer in shared columns) has no merge; its twins are
reported as info, kind *redundant*, only when ``report-unlinked`` is true (default false). The
merge assumes what lies between the layer and its consumers is linear or a channel-wise
positively homogeneous op (max or average pooling); with a negative s, a max-pool in between
breaks it. Rows that are zero, not finite, or below 1e-6 of the layer's largest row norm are
left to ``dead-unit`` and ``nonfinite``.

**Severity and score.** Warning (info for *redundant*). Score =
``scoring.score(group/units, excess)`` with excess = ratio / ``lopsided-ratio`` for a lopsided
group and 0.25 / (‖u_i + s·u_k‖ / (‖u_i‖ + ‖s·u_k‖)) for a cancelling one (the larger when
both apply; 1 for *redundant*).

**What to do.** Apply the merge given in the evidence (or prune both units of a cancelling pair
when their sum is negligible), and retrain with weight decay if the layer is still training.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

import numpy as np

from steelyard.findings import Finding, Severity
from steelyard.graph import Activation, Layer, LayerKind, NormKind
from steelyard.rules._rows import Rows
from steelyard.rules._twin_search import similar_pairs
from steelyard.rules.base import (
    AuditContext,
    HealthColumn,
    RuleSettings,
    RuleSpec,
    distinct_units,
    fraction,
    layer_finding,
    threshold,
)
from steelyard.rules.scoring import score
from steelyard.stats.numerics import distinct

#: Rows below this fraction of the layer's largest row norm have no reliable direction.
_TINY = 1e-6
#: Most entries listed per evidence mapping (huge groups would bloat reports).
_LIST = 10
#: Dropped units (with their scales) spelled out in the merge: enough for any real group;
#: beyond it the evidence gives the count and the finding's units still list every member.
_MERGE_LIST = 64
_CANCEL_COSINE = -0.9
_CANCEL_SHARE = 0.25
#: Groups up to this size compare every pair of members for cancellation.
_ALL_PAIRS = 512


@dataclass(frozen=True)
class _Group:
    """One twin group with its merge."""

    units: tuple[int, ...]
    keep: int
    scales: dict[int, float]
    """s_k for every dropped unit k: r_k ≈ s_k·r_keep."""
    cosines: dict[int, float]
    """cos(r_keep, r_k) for every dropped unit k."""


@dataclass(frozen=True)
class TwinUnitsSettings:
    """Thresholds of ``twin-units``."""

    cosine: float = fraction(0.995)
    norm_tolerance: float = threshold(0.05)
    lopsided_ratio: float = threshold(4.0)
    exact_limit: int = threshold(512)
    seed: int = threshold(0)
    include_embeddings: bool = threshold(False)
    report_unlinked: bool = threshold(False)


def _eligible(layer: Layer, limits: TwinUnitsSettings) -> bool:
    if layer.units < 2 or layer.kind is LayerKind.RECURRENT:
        return False
    if layer.kind is LayerKind.EMBEDDING and not limits.include_embeddings:
        return False
    if layer.activation is Activation.SOFTMAX:
        return False
    return layer.norm is None or layer.norm.kind is NormKind.BATCH


def _rows(ctx: AuditContext, layer: Layer) -> Rows | None:
    scale, bias, folded = ctx.stats.fold_parts(layer)
    if layer.norm is not None and not folded:
        return None  # a batch norm we could not fold: the deployed rows are unknown
    bias = np.asarray(bias, dtype=np.float32).reshape(-1)
    # The weight part of each norm comes from the shared one-pass statistics (float64 sums).
    weights = ctx.stats.folded_row_norms(layer)
    norms = np.sqrt(weights**2 + bias.astype(np.float64) ** 2)
    # The folded rows are the stored ones times a_j, applied where rows are used.
    return Rows(ctx.stats.matrix(layer), norms, bias, scale)


def _consumers_known(ctx: AuditContext, layer: Layer) -> bool:
    """Whether every consumer's block for this layer's units can be built (nothing is read)."""
    consumers = ctx.stats.consumers(layer)
    if not consumers:
        return False
    for consumer in consumers:
        producers = ctx.stats.producers(consumer)
        if len(producers) != len(consumer.inputs_from):
            return False  # an unknown producer: the column offsets are not reliable
        channels = consumer.in_per_group * consumer.groups
        if len(producers) > 1 and sum(p.units for p in producers) != channels:
            return False  # residual sum or gated product: the columns are shared
        if ctx.stats.consumer_block_width(layer, consumer) is None:
            return False
    return True


def _consumer_blocks(ctx: AuditContext, layer: Layer) -> list[np.ndarray] | None:
    """Every consumer's block for this layer's units; None when any mapping is unknown."""
    if not _consumers_known(ctx, layer):
        return None
    blocks: list[np.ndarray] = []
    for consumer in ctx.stats.consumers(layer):
        block = ctx.stats.consumer_block(layer, consumer)
        if block is None or block.shape[0] != layer.units:
            return None
        blocks.append(block)
    return blocks


def _columns(blocks: list[np.ndarray], units: np.ndarray) -> np.ndarray:
    """u_j for the given units: all consumers' blocks side by side, float64."""
    return np.hstack([np.asarray(b[units], dtype=np.float64) for b in blocks])


def _twin_pairs(
    rows: Rows, layer: Layer, limits: TwinUnitsSettings
) -> tuple[np.ndarray, np.ndarray, np.ndarray, str]:
    """Twin pairs (i, k, cos) by the activation's rules; searches within conv groups."""
    cosine, tolerance = limits.cosine, limits.norm_tolerance
    activation = layer.activation
    negative = activation in (Activation.IDENTITY, Activation.TANH)
    norms = rows.norms
    finite = np.isfinite(norms)  # a NaN or infinity anywhere in a row makes its norm so
    largest = float(norms[finite].max(initial=0.0))
    valid = finite & (norms > _TINY * largest) if largest > 0 else np.zeros_like(finite)
    per_group = layer.units // max(1, layer.groups)
    firsts, seconds, cosines = [], [], []
    method = "exact"
    for group in range(max(1, layer.groups)):
        lo, hi = group * per_group, (group + 1) * per_group
        if np.count_nonzero(valid[lo:hi]) < 2:
            continue
        extra = None if rows.extra is None else rows.extra[lo:hi]
        scale = None if rows.scale is None else rows.scale[lo:hi]
        a, b, cos, method = similar_pairs(
            Rows(rows.matrix[lo:hi], norms[lo:hi], extra, scale),  # a view of the group's rows
            cosine,
            negative,
            limits.exact_limit,
            limits.seed,
            usable=valid[lo:hi],
        )
        firsts.append(a + lo)
        seconds.append(b + lo)
        cosines.append(cos)
    if not firsts:
        empty = np.zeros(0, np.int64)
        return empty, empty, np.zeros(0), method
    first, second, cos = np.concatenate(firsts), np.concatenate(seconds), np.concatenate(cosines)
    if not activation.positive_homogeneous:
        big = np.maximum(norms[first], norms[second])
        keep = np.abs(norms[first] - norms[second]) <= tolerance * big
        first, second, cos = first[keep], second[keep], cos[keep]
    if activation is not Activation.IDENTITY and activation is not Activation.TANH:
        keep = cos > 0
        first, second, cos = first[keep], second[keep], cos[keep]
    return first, second, cos, method


def _components(first: np.ndarray, second: np.ndarray, units: int) -> list[np.ndarray]:
    """Connected components of the twin graph (vectorised union-find by label propagation)."""
    label = np.arange(units)
    while True:
        low = np.minimum(label[first], label[second])
        before = label.copy()
        np.minimum.at(label, first, low)
        np.minimum.at(label, second, low)
        label = label[label]  # pointer jumping
        if np.array_equal(label, before):
            break
    involved = distinct(np.concatenate([first, second]))
    groups: dict[int, list[int]] = {}
    for unit in involved.tolist():
        groups.setdefault(int(label[unit]), []).append(unit)
    return [np.array(sorted(g)) for g in groups.values() if len(g) > 1]


def _relative_scales(rows: Rows, members: np.ndarray, homogeneous: bool) -> np.ndarray:
    """t_j with r_j ≈ t_j·r_anchor (anchor = first member)."""
    taken = rows.take(members)
    anchor = taken[0]
    dots = np.asarray(taken @ anchor, dtype=np.float64)
    if homogeneous:
        return np.asarray(dots / float(anchor @ anchor), dtype=np.float64)
    return np.asarray(np.sign(dots), dtype=np.float64)


#: Two-member groups screened together per batch (float64 rows and consumer columns of both).
_PAIR_BATCH = 256
#: Relative margin of the batch screen: a pair this close to a limit goes through the exact
#: per-group path, whose float64 values may differ from the batch's in the last digits.
_MARGIN = 1e-6


def _quiet_pairs(
    rows: Rows,
    groups: list[np.ndarray],
    blocks: list[np.ndarray],
    homogeneous: bool,
    ratio_limit: float,
) -> set[int]:
    """Positions in ``groups`` of the two-member groups that can be neither lopsided nor
    cancelling (nor read by any consumer), screened in batches: a layer with many twins (units
    duplicated to widen it, say) has thousands of such pairs, and the per-group path takes
    about 0.15 ms of small numpy calls for each. Only pairs clear of every limit by
    ``_MARGIN`` are screened out, so the findings are those of the per-group path."""
    pairs = [number for number, members in enumerate(groups) if members.size == 2]
    quiet: set[int] = set()
    for start in range(0, len(pairs), _PAIR_BATCH):
        chosen = pairs[start : start + _PAIR_BATCH]
        a = np.array([groups[k][0] for k in chosen])
        b = np.array([groups[k][1] for k in chosen])
        ra, rb = rows.take(a), rows.take(b)
        dots = np.einsum("ij,ij->i", rb, ra)
        if homogeneous:
            with np.errstate(divide="ignore", invalid="ignore"):
                t = dots / np.einsum("ij,ij->i", ra, ra)
        else:
            t = np.sign(dots)
        ca, cb = _columns(blocks, a), t[:, None] * _columns(blocks, b)
        sa, sb = np.linalg.norm(ca, axis=1), np.linalg.norm(cb, axis=1)
        big, small = np.maximum(sa, sb), np.minimum(sa, sb)
        unread = big == 0  # the per-group path skips these: a dead-unit matter
        lopsided = big >= ratio_limit * small * (1 - _MARGIN)
        with np.errstate(divide="ignore", invalid="ignore"):
            gram = np.einsum("ij,ij->i", ca, cb)
            cos = gram / (sa * sb)
            share = np.sqrt(np.maximum(sa**2 + sb**2 + 2 * gram, 0.0)) / (sa + sb)
        cancelling = (cos <= _CANCEL_COSINE + _MARGIN) & (share <= _CANCEL_SHARE * (1 + _MARGIN))
        clear = unread | (np.isfinite(t) & ~lopsided & ~cancelling & np.isfinite(cos))
        quiet.update(k for k, is_clear in zip(chosen, clear.tolist(), strict=True) if is_clear)
    return quiet


def _merge(
    rows: Rows, members: np.ndarray, contributions: np.ndarray, t: np.ndarray
) -> _Group:
    strength = np.linalg.norm(contributions, axis=1) if contributions.size else np.abs(t)
    pick = int(np.argmax(strength))
    keep = int(members[pick])
    taken = rows.take(members)
    lengths = np.linalg.norm(taken, axis=1)
    cos = (taken @ taken[pick]) / (lengths * lengths[pick])
    scales: dict[int, float] = {}
    cosines: dict[int, float] = {}
    for index, unit in enumerate(members.tolist()):
        if unit == keep:
            continue
        scales[unit] = float(t[index] / t[pick])
        cosines[unit] = float(cos[index])
    return _Group(tuple(int(u) for u in members), keep, scales, cosines)


def _cancelling(contributions: np.ndarray, keep: int) -> tuple[float, tuple[int, int]] | None:
    """The most cancelling member pair as (‖v_a + v_b‖ / (‖v_a‖ + ‖v_b‖), (a, b)), if any.

    Every pair is compared in groups of up to ``_ALL_PAIRS`` members; in larger ones (a layer
    full of copies) only pairs with the kept member ``keep``, to stay linear in the group.
    """
    norms = np.linalg.norm(contributions, axis=1)
    if contributions.shape[0] > _ALL_PAIRS:
        dots = contributions @ contributions[keep]
        total = norms + norms[keep]
        sums = np.sqrt(np.maximum(norms**2 + norms[keep] ** 2 + 2 * dots, 0.0))
        share = np.divide(sums, total, out=np.ones_like(sums), where=total > 0)
        outer = norms * norms[keep]
        cos = np.divide(dots, outer, out=np.zeros_like(dots), where=outer > 0)
        hit = (cos <= _CANCEL_COSINE) & (share <= _CANCEL_SHARE)
        hit[keep] = False
        if not hit.any():
            return None
        other = int(np.flatnonzero(hit)[np.argmin(share[hit])])
        return float(share[other]), (keep, other)
    gram = contributions @ contributions.T
    outer = np.outer(norms, norms)
    cos = np.divide(gram, outer, out=np.zeros_like(gram), where=outer > 0)
    sums = np.sqrt(np.maximum(norms[:, None] ** 2 + norms[None, :] ** 2 + 2 * gram, 0.0))
    total = norms[:, None] + norms[None, :]
    share = np.divide(sums, total, out=np.ones_like(sums), where=total > 0)
    hit = (cos <= _CANCEL_COSINE) & (share <= _CANCEL_SHARE)
    np.fill_diagonal(hit, False)
    if not hit.any():
        return None
    candidates = np.argwhere(hit)
    best = candidates[np.argmin(share[hit])]
    return float(share[best[0], best[1]]), (int(best[0]), int(best[1]))


def _savings(
    layer: Layer, rows: Rows, members: np.ndarray, columns: np.ndarray | None, group: _Group
) -> tuple[int, float]:
    """(parameters, squared norm) saved by the merge; ``columns`` row p is unit members[p]."""
    norm_params = 0
    if layer.norm is not None:
        norm = layer.norm
        norm_params = sum(1 for n in (norm.scale, norm.shift, norm.mean, norm.var) if n)
    width = 0 if columns is None else columns.shape[1]
    per_unit = layer.fan_in + (1 if layer.bias else 0) + norm_params + width
    dropped = list(group.scales)
    squared = float(np.sum(rows.take(dropped) ** 2)) if dropped else 0.0
    if columns is not None:
        where = {int(unit): p for p, unit in enumerate(members.tolist())}
        u_keep = columns[where[group.keep]]
        merged = u_keep + sum(group.scales[k] * columns[where[k]] for k in dropped)
        squared += sum(float(columns[where[k]] @ columns[where[k]]) for k in dropped)
        squared -= float(merged @ merged - u_keep @ u_keep)
    return per_unit * len(dropped), squared


def _limited(mapping: dict[int, float], size: int) -> dict[str, float]:
    return {str(k): v for k, v in list(mapping.items())[:size]}


def _layer(ctx: AuditContext, limits: TwinUnitsSettings, layer: Layer) -> Iterator[Finding]:
    linked = _consumers_known(ctx, layer)
    if not linked and not limits.report_unlinked:
        return  # nothing could be reported, so the search is not run at all
    rows = _rows(ctx, layer)
    if rows is None:
        return
    first, second, _, method = _twin_pairs(rows, layer, limits)
    if first.size == 0:
        return
    blocks = _consumer_blocks(ctx, layer) if linked else None
    ratio_limit = limits.lopsided_ratio
    homogeneous = layer.activation.positive_homogeneous
    groups = _components(first, second, layer.units)
    quiet = _quiet_pairs(rows, groups, blocks, homogeneous, ratio_limit) if blocks else set()
    for number, members in enumerate(groups):
        if number in quiet:
            continue
        t = _relative_scales(rows, members, homogeneous)
        columns = _columns(blocks, members) if blocks is not None else None
        contributions = t[:, None] * columns if columns is not None else np.zeros((0, 0))
        group = _merge(rows, members, contributions, t)
        evidence: dict[str, Any] = {
            "keep": group.keep,
            "cosine": _limited(group.cosines, _LIST),
            "scale": _limited(group.scales, _MERGE_LIST),
            "search": method,
            "folded": bool(layer.norm is not None),
        }
        if columns is None:
            kind, excess, severity = "redundant", 1.0, Severity.INFO
            ratio = None
        else:
            strength = np.linalg.norm(contributions, axis=1)
            if float(strength.max()) <= 0:
                continue  # no consumer reads either unit: a dead-unit matter
            smallest = float(strength.min())
            ratio = float(strength.max()) / smallest if smallest > 0 else float("inf")
            cancel = _cancelling(contributions, group.units.index(group.keep))
            kinds = []
            excess = 1.0
            if ratio >= ratio_limit:
                kinds.append("lopsided")
                excess = max(excess, ratio / ratio_limit)
            if cancel is not None:
                kinds.append("cancelling")
                excess = max(excess, _CANCEL_SHARE / max(cancel[0], 1e-12))
                a, b = cancel[1]
                evidence["cancelling_pair"] = [int(members[a]), int(members[b])]
                evidence["residual_share"] = round(cancel[0], 6)
            if not kinds:
                continue
            kind = "cancelling" if "cancelling" in kinds else "lopsided"
            severity = Severity.WARNING
            evidence["ratio"] = ratio if np.isfinite(ratio) else "inf"
        params, squared = _savings(layer, rows, members, columns, group)
        evidence["kind"] = kind
        evidence["merge"] = {
            "keep": group.keep,
            "drop": sorted(group.scales)[:_MERGE_LIST],
            "dropped": len(group.scales),
            "columns": "u_keep += sum(s_k * u_k)"
            if columns is not None
            else "none (no known consumer)",
        }
        evidence["parameter_saving"] = params
        evidence["squared_norm_saving"] = squared
        yield _finding(
            layer, group, kind, severity, score(len(members) / layer.units, excess), ratio, evidence
        )


def _finding(
    layer: Layer,
    group: _Group,
    kind: str,
    severity: Severity,
    value: float,
    ratio: float | None,
    evidence: dict[str, Any],
) -> Finding:
    others = sorted(group.scales)
    pair = (
        f"unit {group.keep} and unit{'s' if len(others) > 1 else ''} "
        + ", ".join(str(k) for k in others[:_LIST])
        + (" …" if len(others) > _LIST else "")
    )
    worst_cos = min(abs(c) for c in group.cosines.values())
    head = f"{pair} compute the same function (|cosine| >= {worst_cos:.4f} on the incoming rows)"
    if kind == "redundant":
        message = f"{head}; the layer has no known consumer, so only the redundancy is reported"
        hint = "drop the duplicates once the consumers are known, folding their weights into the kept unit"
    else:
        if kind == "lopsided":
            detail = (
                f"their consumers weight them {ratio:.3g}:1"
                if ratio is not None and np.isfinite(ratio)
                else "only one of them is read by the consumers"
            )
        else:
            detail = "their consumer columns nearly cancel each other"
        message = (
            f"{head} but {detail}; an L2 penalty would have split the weight evenly "
            "between the twins"
        )
        hint = (
            f"merge: drop unit{'s' if len(others) > 1 else ''} {', '.join(map(str, others[:_LIST]))} and "
            f"add each dropped unit's consumer weights, scaled by its ratio to unit {group.keep} "
            f"(the merge's scale in the evidence), to unit {group.keep}'s consumer weights "
            "(exact for exact twins); "
            "retrain with weight decay if the layer is still training"
        )
    return layer_finding(
        RULE.name,
        layer,
        severity=severity,
        units=group.units,
        score=value,
        message=message,
        hint=hint,
        evidence=evidence,
    )


def check_layer(
    ctx: AuditContext, settings: RuleSettings[TwinUnitsSettings], layer: Layer
) -> Iterator[Finding]:
    """Findings on one layer."""
    limits = settings.for_layer(layer)
    if _eligible(layer, limits):
        yield from _layer(ctx, limits, layer)


RULE = RuleSpec(
    name="twin-units",
    severity=Severity.WARNING,
    settings=TwinUnitsSettings,
    summary="two units computing the same function with lopsided or cancelling consumer weights "
    "are one unit paid for twice, a sign the layer was trained without weight decay",
    doc=__doc__ or "",
    per_layer=check_layer,
    health=(HealthColumn("twins", distinct_units),),
)
