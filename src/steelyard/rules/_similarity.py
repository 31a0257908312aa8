"""Finding pairs of nearly parallel rows: blocked exact search and a hashed candidate search.

Both return the same thing, every pair ``i < k`` whose cosine is ``>= threshold`` (and, when
``negative`` is set, also ``<= -threshold``). Cosines come from float32 products of normalised
rows; a pair within 1e-4 of the threshold (where float32 could decide wrongly) is recomputed in
float64 from the rows themselves, so the two searches decide every pair alike. Each row keeps
its first ``PARTNERS`` later partners and its first earlier one (a layer of copies would
otherwise give n²/2 pairs), in both searches, so neither cuts a row off from its twins.

The rows are a :class:`~steelyard.rules._rows.Rows` view: a float32 matrix, an optional extra last column (a bias)
and float64 norms. The hashed search projects the stored rows directly (a sign hash is
unchanged by scaling a row) and gathers only the rows of buckets with more than one row.

* :func:`exact_pairs` multiplies blocks of normalised rows with every later row (BLAS) and
  keeps the entries past the threshold (``np.argwhere``). Cost n²·d/2, memory one block.
  For wide rows :mod:`steelyard.rules._twin_search` screens the pairs through a short
  Gaussian projection first, and picks which search a layer gets.
* :func:`candidate_pairs` is sub-quadratic: random-hyperplane sign hashing (Charikar 2002,
  "Similarity estimation techniques from rounding algorithms", STOC) into ``tables`` tables of
  ``bits`` bits. Two rows at angle θ agree on one random hyperplane with probability 1 − θ/π,
  on a whole table key with (1 − θ/π)^bits, and share at least one of L tables with
  1 − (1 − (1 − θ/π)^bits)^L. ``bits`` and ``tables`` are chosen so that this is >= 0.9999 at
  the threshold angle itself; pairs above the threshold collide more often. Seeded, hence
  deterministic.

**Confirmation in blocks, with a bucket cap.** Rows that share directions (trained layers,
outlier input columns, near copies) agree on many hyperplanes, so they crowd a few buckets;
confirming every colliding pair one at a time (two gathered rows each) then grows with the
square of the bucket sizes. Instead:

1. The pairs of buckets of at most ``PAIRED`` (4) rows are listed, deduplicated across all
   tables (true twins collide in most of them) and confirmed once each.
2. A bucket of up to ``BUCKET_CAP`` (128) rows is gathered once per table and confirmed by one
   Gram product (its raw rows' products, scaled by the inverse norms afterwards).
3. A bucket of more than ``BUCKET_CAP`` rows gets a longer key for its rows only: sign bits of
   ``_SPLIT_STEP`` (4) more hyperplanes at a time (seeded per table), up to ``EXTRA_BITS`` (24)
   more, until every part is within the cap. Each added bit keeps a pair at the threshold
   together with probability 0.968, so this costs recall only where buckets were crowded.
4. A bucket still larger (its rows agree on 40 hyperplanes: a cluster of near copies) compares
   each run of ``BUCKET_CAP`` members, in index order, with the ``BAND``·``BUCKET_CAP`` (512)
   members from its start: every pair of a bucket up to 512 rows, a band of the Gram matrix
   beyond, which still gives each member its capped partners when the cluster is of copies.

Steps 2 and 4 are :mod:`steelyard.rules._bucket_gram`'s; its buckets of similar sizes (the
largest at most ``STACK_SPREAD`` × the smallest) share one gather and one batched product.
Hence at most ``BAND``·``BUCKET_CAP`` float32 dot products per row and table
(:func:`confirmation_bound`, counted in :class:`Tally`), whatever the weights.

**The screen.** Steps 1–4 compare the rows' *projections*, not the rows: the first
``SCREEN_MOST`` (256) of the hashing's own Gaussian projections (176 at the default cosine),
normalised, against :func:`steelyard.rules._screen.screen_limit` for that many directions
(0.967 at cosine 0.995). A pair at the threshold falls below it with chance at most 1e-9,
whatever the rows (a chi-square tail bound; see that module), and since the screen looks at
the same projections whichever table the pair collided in, the chance that a pair at the
threshold is missed is at most 1e-4 (no table) + 1e-9 (the screen), by the union bound; no
independence is needed. Only the distinct pairs that pass are confirmed from the rows (two
gathered rows each, :func:`pair_hits`, then float64 near the threshold as before). Rows that
share a direction (a common bias, outlier input columns) crowd the buckets with pairs that
are far from twins; comparing them 176 numbers wide instead of ``fan_in`` + 1 made such a
4096 × 1024 layer 87 → 29 ms on one thread (docs/performance.md, "Fifteenth session"). The plan is
counted before any product is computed; when it times ``BUCKET_DOT_COST`` (3; the measured
time of a bucket confirmation's dot against one in the exact search's large blocks: 2.2–9)
exceeds the exact search's dot products, the exact search runs instead, so the cost is the
smaller of the two. Measured recall and cost against the exact search: ``bench/twin_recall.py``
and docs/performance.md.
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np

from steelyard.blas import blas_threads
from steelyard.rules._bucket_gram import BAND, BUCKET_CAP, PAIRED, bucket_hits, keep
from steelyard.rules._planes import gaussian_planes
from steelyard.rules._rows import (
    EMPTY,
    SLACK,
    Rows,
    Tally,
    inverse_norms,
    off_scale,
    passing,
)
from steelyard.rules._screen import screen_limit, units_of
from steelyard.stats.numerics import distinct

#: Working-set bytes for one Gram block (rows of the block × all later rows, float32).
BLOCK_BYTES = 32 * 2**20
#: Bytes of the rows gathered for a batch of pairs: small enough to stay in the core's cache
#: (4096 pairs of 1024-wide rows: 0.48 µs a pair at 2^19, 1.23 µs at 2^25, one thread).
PAIR_BYTES = 2**19
#: A pair confirmed from its two gathered rows costs about this many dot products of a bucket's
#: Gram product (measured on clusters of near copies, one thread: 10 at fan-in 1024, 12 at
#: 4096); when more pairs pass the bucket screen than the plan's dot products over this, the
#: buckets are confirmed from the rows instead (most colliding pairs there are twins).
PAIR_BUCKET_DOT_COST = 12.0
#: Recall the candidate search is designed for at the threshold angle (see module docstring).
DESIGN_RECALL = 0.9999
#: The recall the rule documents per layer, which ``bench/twin_recall.py`` checks (exit 1 below
#: it): measured 2026-12-04 the worst layer's pair recall and group recall were both 1.0000 on
#: 90 planted layers, 1024–8192 rows, nine backgrounds (docs/performance.md).
MEASURED_RECALL = 0.99
#: Most later partners kept per row (plus each row's first earlier one). A layer of many
#: identical rows (a constant initialisation, say) would otherwise yield n²/2 pairs.
PARTNERS = 64
#: Most bits added to a table's key to split an oversized bucket, ``_SPLIT_STEP`` at a time.
EXTRA_BITS = 24
_SPLIT_STEP = 4
#: Time of one dot product of the bucket confirmation (gathers included) relative to one in the
#: exact search's large blocks: 2.2 to 9 measured on one thread (lower for wide rows and large
#: buckets; see docs/performance.md). The hashed search is used only when its planned dot
#: products times this are fewer than the exact search's; 3 errs towards the hashed search,
#: by at most 1.5 × on the measured 1024-row layers, never on wide ones where time matters.
BUCKET_DOT_COST = 3.0
#: A Gram search of the given members of the rows: (first, second, cosine) of every pair
#: past the threshold, as :func:`exact_pairs` gives them.
Pairs = tuple[np.ndarray, np.ndarray, np.ndarray]
#: Most of the hashing projections the bucket screen uses (its memory is n × this × 4 bytes).
SCREEN_MOST = 256
Searcher = Callable[["Rows", np.ndarray, float, bool, "Tally"], Pairs]


def _partner_mask(
    first: np.ndarray, second: np.ndarray, certain: np.ndarray, seen: np.ndarray
) -> np.ndarray:
    """Hits (in row-major order) kept under the partner cap: the first ``PARTNERS`` of every
    row, and for a row not ``seen`` as a later member before, its first ``certain`` hit as the
    later member (and any uncertain one before it), so that no row with a twin is cut off
    from its group by the cap."""
    starts = np.flatnonzero(np.r_[True, first[1:] != first[:-1]]) if first.size else EMPTY
    rank = np.arange(first.size) - np.repeat(starts, np.diff(np.r_[starts, first.size]))
    keep = rank < PARTNERS
    unseen = ~seen[second]
    keep |= unseen & ~certain  # near the threshold: the float64 check may still drop it
    fresh = np.flatnonzero(unseen & certain)
    values, where = np.unique(second[fresh], return_index=True)
    keep[fresh[where]] = True
    seen[values] = True
    return np.asarray(keep)


#: Hits per row of a Gram block beyond which the partner cap is applied on the block's mask
#: (:func:`_capped_mask`) rather than on the listed hits: a layer whose rows are all nearly
#: parallel (weights zero or constant beside a bias) has n²/2 of them.
_CROWDED_ROW = 4 * PARTNERS


def _capped_mask(
    mask: np.ndarray, gram: np.ndarray, start: int, threshold: float, negative: bool,
    seen: np.ndarray,
) -> np.ndarray:
    """The hits of ``mask`` that :func:`_partner_mask` keeps, found on the block's mask
    itself: each row's first ``PARTNERS`` (a running count along the row), every uncertain
    hit of a column not yet ``seen``, and the first certain hit, in row order, of each such
    column; ``seen`` is updated as :func:`_partner_mask` updates it. The same hits, without
    listing the millions a crowded block holds."""
    keep = mask & (np.cumsum(mask, axis=1, dtype=np.int32) <= PARTNERS)
    unseen = ~seen[start:]
    certain = mask & passing(gram, threshold + 2 * SLACK, negative)
    keep |= mask & ~certain & unseen[None, :]
    columns = np.flatnonzero(unseen & certain.any(axis=0))
    keep[np.argmax(certain[:, columns], axis=0), columns] = True
    seen[start + columns] = True
    return keep


def _gram_hits(
    unit: np.ndarray, threshold: float, negative: bool, tally: Tally
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Pairs ``i < k`` of normalised rows passing the float32 filter, by blocked Gram products,
    with their float32 cosines; each row keeps its first ``PARTNERS`` partners."""
    n = unit.shape[0]
    block = max(1, BLOCK_BYTES // max(1, 4 * n))
    seen = np.zeros(n, dtype=bool)
    firsts: list[np.ndarray] = []
    seconds: list[np.ndarray] = []
    values: list[np.ndarray] = []
    for start in range(0, n, block):
        stop = min(n, start + block)
        gram = unit[start:stop] @ unit[start:].T  # [block, n - start]
        tally.dots += int(gram.size)
        mask = passing(gram, threshold, negative)
        # column c is row start + c: keep k > i only
        mask &= np.arange(gram.shape[1])[None, :] > np.arange(gram.shape[0])[:, None]
        if np.count_nonzero(mask) > _CROWDED_ROW * mask.shape[0]:
            hits = np.argwhere(_capped_mask(mask, gram, start, threshold, negative, seen))
            rough = gram[hits[:, 0], hits[:, 1]]
            keep = np.ones(hits.shape[0], dtype=bool)
        else:
            hits = np.argwhere(mask)
            rough = gram[hits[:, 0], hits[:, 1]]
            certain = passing(rough, threshold + 2 * SLACK, negative)
            keep = _partner_mask(hits[:, 0], hits[:, 1] + start, certain, seen)
        firsts.append(hits[keep, 0] + start)
        seconds.append(hits[keep, 1] + start)
        values.append(rough[keep])
    if not firsts:
        return EMPTY, EMPTY, np.zeros(0, np.float32)
    return (
        np.concatenate(firsts).astype(np.int64),
        np.concatenate(seconds).astype(np.int64),
        np.concatenate(values),
    )


def _settle(
    rows: Rows,
    first: np.ndarray,
    second: np.ndarray,
    rough: np.ndarray,
    threshold: float,
    negative: bool,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Keep the pairs past the threshold: float32 cosines decide where they are more than
    the slack away from it, float64 cosines recomputed from the rows decide the rest."""
    cos = rough.astype(np.float64)
    near = np.flatnonzero(np.abs(np.abs(cos) - threshold) < SLACK)
    width = rows.matrix.shape[1] + 1
    step = max(1, PAIR_BYTES // (16 * width))
    with np.errstate(divide="ignore", invalid="ignore"):
        for start in range(0, near.size, step):
            pick = near[start : start + step]
            a, b = first[pick], second[pick]
            dots = np.einsum("ij,ij->i", rows.take(a), rows.take(b))
            cos[pick] = dots / (rows.norms[a] * rows.norms[b])
    keep = cos >= threshold
    if negative:
        keep |= cos <= -threshold
    return first[keep], second[keep], cos[keep]


def capped_settle(
    rows: Rows, first: np.ndarray, second: np.ndarray, rough: np.ndarray, threshold: float,
    negative: bool,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Candidate pairs in row-major order with their float32 cosines, under the exact
    search's partner cap, then :func:`_settle`d: how a candidate search ends."""
    certain = passing(rough, threshold + 2 * SLACK, negative)
    keep = _partner_mask(first, second, certain, np.zeros(rows.count, dtype=bool))
    return _settle(rows, first[keep], second[keep], rough[keep], threshold, negative)


def exact_dots(n: int) -> int:
    """Dot products ``_gram_hits`` computes for ``n`` rows (each block times every later row)."""
    block = max(1, BLOCK_BYTES // max(1, 4 * n))
    return sum((min(n, s + block) - s) * (n - s) for s in range(0, n, block))


def exact_among(
    rows: Rows, members: np.ndarray, threshold: float, negative: bool, tally: Tally
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    tally.method = "exact"
    first, second, rough = _gram_hits(rows.unit(members), threshold, negative, tally)
    return _settle(rows, members[first], members[second], rough, threshold, negative)


def exact_pairs(
    rows: np.ndarray | Rows, threshold: float, negative: bool = False, tally: Tally | None = None
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Every pair ``i < k`` of rows past the cosine threshold, by blocked Gram products."""
    view = rows if isinstance(rows, Rows) else Rows.of(rows)
    return exact_among(view, np.arange(view.count), threshold, negative, tally or Tally())


def hash_plan(n: int, threshold: float) -> tuple[int, int]:
    """(bits, tables) for ``n`` rows so that a pair at the threshold collides w.p. >= 0.9999."""
    bits = min(24, max(16, math.ceil(math.log2(max(n, 2))) + 2))
    agree = 1.0 - math.acos(min(1.0, max(-1.0, threshold))) / math.pi
    per_table = agree**bits
    if per_table >= 1.0:
        return bits, 1
    tables = math.ceil(math.log(1.0 - DESIGN_RECALL) / math.log(1.0 - per_table))
    return bits, int(min(64, max(1, tables)))


def _table_buckets(
    view: Rows,
    signs: np.ndarray,
    negative: bool,
    outside: np.ndarray | None,
    table: int,
    seed: int,
    tally: Tally,
) -> tuple[np.ndarray, np.ndarray]:
    """Bucket number of every row in one table, oversized buckets split (see module docstring),
    and the rows in bucket order (see :func:`_ranked`)."""
    bits = signs.shape[1]
    keys = signs.astype(np.int64) @ (1 << np.arange(bits, dtype=np.int64))
    flipped = np.zeros(keys.size, dtype=bool)
    if negative:
        # x and −x get complementary keys; key the pair {key, ~key} by its smaller member and
        # remember which rows were flipped, so the bits added below are flipped alike.
        mask = (1 << bits) - 1
        flipped = keys > (keys ^ mask)
        keys[flipped] ^= mask
    if outside is not None:
        keys[outside] = -1 - np.flatnonzero(outside)  # distinct keys: never in a pair
    bucket, order = _ranked(keys)
    sizes = np.bincount(bucket)
    members = np.flatnonzero(sizes[bucket] > BUCKET_CAP)
    if members.size == 0:
        return bucket, order
    # Longer keys for the rows of oversized buckets only: their own hyperplanes, seeded by table.
    planes = np.random.default_rng((seed, table)).standard_normal(
        (view.matrix.shape[1] + (0 if view.extra is None else 1), EXTRA_BITS), dtype=np.float32
    )
    extra = (view.project_rows(members, planes) > 0) ^ flipped[members, None]
    weights = 1 << np.arange(_SPLIT_STEP, dtype=np.int64)
    for step in range(EXTRA_BITS // _SPLIT_STEP):
        big = sizes[bucket[members]] > BUCKET_CAP
        if not big.any():
            break
        tally.split += int(distinct(bucket[members[big]]).size)
        chunk = extra[big, step * _SPLIT_STEP : (step + 1) * _SPLIT_STEP].astype(np.int64) @ weights
        code = bucket.astype(np.int64) << _SPLIT_STEP  # other buckets keep their rows together
        code[members[big]] += chunk
        bucket, order = _ranked(code)
        sizes = np.bincount(bucket)
    return bucket, order


def _ranked(codes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(dense rank of every code, the stable order that sorts them): ``numpy.unique``'s
    inverse, and the order the bucket searches need, from one sort instead of three. The
    order also sorts the ranks stably: ranks rise with the codes."""
    order = np.argsort(codes, kind="stable")
    ranked = codes[order]
    rank = np.empty(codes.size, dtype=np.int64)
    if codes.size:
        rank[order] = np.cumsum(np.r_[False, ranked[1:] != ranked[:-1]])
    return rank, order


def confirmation_bound(n: int, tables: int) -> int:
    """Most dot products a hashed search of ``n`` rows in ``tables`` tables computes.

    A table puts every row in one bucket: a row of a bucket of at most ``PAIRED`` rows takes
    part in at most 3 pairs, of at most ``BUCKET_CAP`` rows in at most ``BUCKET_CAP`` Gram
    entries, of a larger (banded) bucket in at most ``BAND``·``BUCKET_CAP``. The exact search
    replaces this plan only when it needs fewer than ``BUCKET_DOT_COST`` times its dots."""
    return int(max(1.0, BUCKET_DOT_COST) * BAND * BUCKET_CAP * tables * n)


def _planned_dots(sizes: np.ndarray) -> int:
    """Dot products ``_bucket_hits`` will compute for buckets of these sizes."""
    middle = sizes[(sizes > PAIRED) & (sizes <= BUCKET_CAP)].astype(np.int64)
    dense = sizes[sizes > BUCKET_CAP].astype(np.int64)
    return int((middle * middle).sum()) + sum(_band_dots(int(b)) for b in dense)


def _band_dots(size: int) -> int:
    return sum(
        min(BUCKET_CAP, size - s) * min(BAND * BUCKET_CAP, size - s)
        for s in range(0, size, BUCKET_CAP)
    )


def _small_pairs(bucket: np.ndarray, order: np.ndarray) -> np.ndarray:
    """Codes ``i·n + k`` (i < k) of the pairs in buckets of at most ``PAIRED`` rows
    (``order``: the rows sorted stably by bucket)."""
    n = bucket.size
    ranked = bucket[order]
    small = (np.bincount(bucket) <= PAIRED)[ranked]
    codes: list[np.ndarray] = []
    for offset in range(1, PAIRED):  # pairs at distance ``offset`` in sorted order
        same = (ranked[offset:] == ranked[:-offset]) & small[offset:]
        a, b = order[:-offset][same], order[offset:][same]
        codes.append(np.minimum(a, b).astype(np.int64) * n + np.maximum(a, b))
    return np.concatenate(codes) if codes else EMPTY


def pair_hits(
    view: Rows, codes: np.ndarray, threshold: float, negative: bool, tally: Tally
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Float32 cosines of distinct candidate pairs (two gathered rows each), kept if passing."""
    n = view.count
    first, second = codes // n, codes % n
    width = view.matrix.shape[1] + (0 if view.extra is None else 1)
    step = max(1, PAIR_BYTES // (8 * width))
    rough = np.empty(codes.size, dtype=np.float32)
    inverse = inverse_norms(view.norms)
    odd = off_scale(view.norms)
    for start in range(0, codes.size, step):
        a, b = first[start : start + step], second[start : start + step]
        dots = np.einsum("ij,ij->i", view.take(a, np.float32), view.take(b, np.float32))
        with np.errstate(invalid="ignore", over="ignore"):
            part = dots * inverse[a] * inverse[b]
        redo = np.flatnonzero(odd[a] | odd[b])
        if redo.size:  # raw products of such rows underflow or overflow float32
            part[redo] = np.einsum("ij,ij->i", view.unit(a[redo]), view.unit(b[redo]))
        rough[start : start + step] = part
    tally.dots += int(codes.size)
    keep = passing(rough, threshold, negative)
    return first[keep], second[keep], rough[keep]


def candidate_pairs(
    rows: np.ndarray | Rows,
    threshold: float,
    negative: bool = False,
    seed: int = 0,
    usable: np.ndarray | None = None,
    tally: Tally | None = None,
    instead: Searcher | None = None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Pairs past the cosine threshold found through sign-hash buckets (see module docstring);
    only rows where ``usable`` is true take part. Falls back to ``instead`` (default: the
    exact search) when that is cheaper than confirming the buckets."""
    view = rows if isinstance(rows, Rows) else Rows.of(rows)
    tally = tally or Tally()
    n = view.count
    members = np.arange(n) if usable is None else np.flatnonzero(usable)
    width = view.matrix.shape[1] + (0 if view.extra is None else 1)
    bits, tables = hash_plan(n, threshold)
    tally.bits, tally.tables = bits, tables
    # Every table's hyperplanes in one matrix, so the projection is a single BLAS product.
    planes = gaussian_planes((seed,), width, bits * tables)
    projected = view.project(planes)
    signs = projected > 0
    outside = None if usable is None else ~np.asarray(usable, dtype=bool)
    buckets = [
        _table_buckets(view, signs[:, t * bits : (t + 1) * bits], negative, outside, t, seed, tally)
        for t in range(tables)
    ]
    del signs
    # True twins collide in most tables: list the small buckets' pairs once.
    paired = distinct(np.concatenate([_small_pairs(*b) for b in buckets]))
    planned = [_planned_dots(np.bincount(b)) for b, _order in buckets]
    tally.planned = paired.size + sum(planned)
    if tally.planned * BUCKET_DOT_COST > exact_dots(members.size):
        return (instead or exact_among)(view, members, threshold, negative, tally)
    tally.method = "hashed"
    # The buckets are compared on the projections that keyed them (the first SCREEN_MOST,
    # normalised), and only the pairs that pass the screen are confirmed from the rows
    # themselves (see the module docstring, "The screen").
    short = min(projected.shape[1], SCREEN_MOST)
    limit = screen_limit(threshold, short)
    first_table = None
    if limit > 0:
        kept = np.ascontiguousarray(projected[:, :short])
        on = Rows.of(units_of(view, np.arange(n), kept, planes[:, :short]))
        # The first table tells whether most colliding pairs pass the screen (a cluster of
        # near copies): Gram products of the buckets' rows then cost less than confirming
        # the pairs one by one.
        probe = Tally()
        with blas_threads(1):
            first_table = bucket_hits(on, buckets[0], limit, negative, probe)
        passed = sum(part.size for part in first_table[0])
        if passed * PAIR_BUCKET_DOT_COST > max(1, planned[0]):
            on, first_table = view, None  # (the probe's products are not counted then)
        else:
            tally.dots += probe.dots
            tally.largest = max(tally.largest, probe.largest)
            tally.banded += probe.banded
    else:
        on = view
    del projected
    screened = on is not view
    code, rough = _bucket_pairs(
        on, buckets, paired, limit if screened else threshold, negative, tally, first_table
    )
    if screened:
        tally.confirmed = int(code.size)
        first, second, rough = pair_hits(view, code, threshold, negative, Tally())
    else:
        first, second = code // n, code % n
    if not first.size:
        return EMPTY, EMPTY, np.zeros(0)
    return capped_settle(view, first, second, rough, threshold, negative)


def _bucket_pairs(
    view: Rows,
    buckets: list[tuple[np.ndarray, np.ndarray]],
    paired: np.ndarray,
    threshold: float,
    negative: bool,
    tally: Tally,
    first_table: tuple[list[np.ndarray], list[np.ndarray], list[np.ndarray]] | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Codes ``i·n + k`` (sorted, distinct) of the colliding pairs of ``view``'s rows that
    pass the float32 filter at ``threshold``, with their float32 cosines: the small buckets'
    listed ``paired`` codes, then every table's larger buckets (the first table's already
    found when ``first_table`` is given)."""
    n = view.count
    found: tuple[list[np.ndarray], list[np.ndarray], list[np.ndarray]] = ([], [], [])
    keep(found, *pair_hits(view, paired, threshold, negative, tally))
    # Bucket products are small: OpenBLAS threads would cost more than they do (measured: a
    # 32-row bucket of width 1024 took 8.8 ms on two threads, 0.2 ms on one).
    with blas_threads(1):
        for number, bucket in enumerate(buckets):
            if number == 0 and first_table is not None:
                hits = first_table
            else:
                hits = bucket_hits(view, bucket, threshold, negative, tally)
            for into, part in zip(found, hits, strict=True):
                into += part
    if not found[0]:
        return EMPTY, np.zeros(0, np.float32)
    code, where = np.unique(
        np.concatenate(found[0]) * n + np.concatenate(found[1]), return_index=True
    )
    return code, np.concatenate(found[2])[where]
