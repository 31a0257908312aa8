"""Finding pairs of nearly parallel rows: blocked exact search and a hashed candidate search.

Both return the same thing, every pair ``i < k`` whose cosine is ``>= threshold`` (and, when
``negative`` is set, also ``<= -threshold``), with the cosine recomputed in float64, so the
two searches agree on every pair they both see.

* :func:`exact_pairs` multiplies blocks of normalised rows with every later row (BLAS) and
  keeps the entries past the threshold (``np.argwhere``). Cost n²·d/2, memory one block.
* :func:`candidate_pairs` is sub-quadratic: random-hyperplane sign hashing (Charikar 2002,
  "Similarity estimation techniques from rounding algorithms", STOC) into ``tables`` tables of
  ``bits`` bits. Two rows at angle θ agree on one random hyperplane with probability 1 − θ/π,
  on a whole table key with (1 − θ/π)^bits, and share at least one of L tables with
  1 − (1 − (1 − θ/π)^bits)^L. ``bits`` and ``tables`` are chosen so that this is >= 0.9999 at
  the threshold angle itself; pairs above the threshold collide more often. Candidates from
  shared buckets are then checked exactly. Seeded, hence deterministic.

The measured recall against the exact search is printed by ``bench/twin_recall.py``.
"""

from __future__ import annotations

import math

import numpy as np

#: Working-set bytes for one Gram block (rows of the block × all later rows, float32).
BLOCK_BYTES = 32 * 2**20
#: Recall the candidate search is designed for at the threshold angle (see module docstring).
DESIGN_RECALL = 0.9999
#: Recall measured by ``bench/twin_recall.py`` on planted twins (worst width, rounded down).
MEASURED_RECALL = 0.99
#: Buckets up to this size enumerate their pairs directly; larger ones use a Gram product.
_SMALL_BUCKET = 32
#: Most partners kept per row. A layer of many identical rows (a constant initialisation,
#: say) would otherwise yield n²/2 pairs; 64 partners per row keep such a group connected.
PARTNERS = 64
#: Slack of the float32 pre-filter before the float64 check (float32 dot products of unit
#: vectors are accurate to about 1e-6 at the widths seen here).
_SLACK = 1e-4


def normalise(rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Unit-norm float32 copies of ``rows`` and their float64 norms (zero rows stay zero)."""
    norms = np.sqrt(np.einsum("ij,ij->i", rows, rows, dtype=np.float64))
    return scaled(rows, norms), norms


def scaled(rows: np.ndarray, norms: np.ndarray, extra: np.ndarray | None = None) -> np.ndarray:
    """``[rows | extra] / norms`` as one new float32 array (rows with a zero or non-finite norm
    become zero), written in place so no intermediate copy of a wide layer is made."""
    usable = np.isfinite(norms) & (norms > 0)
    scale = np.divide(1.0, norms, out=np.zeros_like(norms), where=usable).astype(np.float32)
    width = rows.shape[1] + (0 if extra is None else 1)
    out = np.empty((rows.shape[0], width), dtype=np.float32)
    with np.errstate(invalid="ignore", over="ignore"):
        np.multiply(rows, scale[:, None], out=out[:, : rows.shape[1]])
        if extra is not None:
            out[:, -1] = np.asarray(extra, dtype=np.float32) * scale
    out[~usable] = 0.0
    return out


def _confirm(
    unit: np.ndarray, first: np.ndarray, second: np.ndarray, threshold: float, negative: bool
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Float64 cosines of candidate pairs, keeping those past the threshold."""
    if first.size == 0:
        empty = np.zeros(0, np.int64)
        return empty, empty, np.zeros(0)
    cos = np.empty(first.size)
    step = max(1, BLOCK_BYTES // max(1, unit.shape[1] * 16))
    for start in range(0, first.size, step):
        a = unit[first[start : start + step]].astype(np.float64)
        b = unit[second[start : start + step]].astype(np.float64)
        cos[start : start + step] = np.einsum("ij,ij->i", a, b)
    keep = cos >= threshold
    if negative:
        keep |= cos <= -threshold
    return first[keep], second[keep], cos[keep]


def _cap_partners(hits: np.ndarray) -> np.ndarray:
    """At most ``PARTNERS`` hits per row (``hits`` is in row-major order, as argwhere gives)."""
    if hits.shape[0] <= PARTNERS:
        return hits
    rows = hits[:, 0]
    starts = np.flatnonzero(np.r_[True, rows[1:] != rows[:-1]])
    rank = np.arange(rows.size) - np.repeat(starts, np.diff(np.r_[starts, rows.size]))
    return hits[rank < PARTNERS]


def exact_pairs(
    unit: np.ndarray, threshold: float, negative: bool = False
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Every pair ``i < k`` of unit rows past the cosine threshold, by blocked Gram products."""
    n = unit.shape[0]
    block = max(1, BLOCK_BYTES // max(1, 4 * n))
    firsts: list[np.ndarray] = []
    seconds: list[np.ndarray] = []
    loose = threshold - _SLACK
    for start in range(0, n, block):
        stop = min(n, start + block)
        gram = unit[start:stop] @ unit[start:].T  # [block, n - start]
        mask = gram >= loose
        if negative:
            mask |= gram <= -loose
        hits = np.argwhere(mask)
        hits = hits[hits[:, 1] > hits[:, 0]]  # column c is row start + c: keep k > i only
        hits = _cap_partners(hits)
        firsts.append(hits[:, 0] + start)
        seconds.append(hits[:, 1] + start)
    first = np.concatenate(firsts) if firsts else np.zeros(0, np.int64)
    second = np.concatenate(seconds) if seconds else np.zeros(0, np.int64)
    return _confirm(unit, first.astype(np.int64), second.astype(np.int64), threshold, negative)


def hash_plan(n: int, threshold: float) -> tuple[int, int]:
    """(bits, tables) for ``n`` rows so that a pair at the threshold collides w.p. >= 0.9999."""
    bits = min(24, max(16, math.ceil(math.log2(max(n, 2))) + 2))
    agree = 1.0 - math.acos(min(1.0, max(-1.0, threshold))) / math.pi
    per_table = agree**bits
    if per_table >= 1.0:
        return bits, 1
    tables = math.ceil(math.log(1.0 - DESIGN_RECALL) / math.log(1.0 - per_table))
    return bits, int(min(64, max(1, tables)))


def _bucket_pairs(
    order: np.ndarray, keys: np.ndarray, unit: np.ndarray, threshold: float, negative: bool
) -> tuple[list[np.ndarray], list[np.ndarray]]:
    """Candidate pairs of rows sharing a key (``order`` sorts ``keys``)."""
    sorted_keys = keys[order]
    starts = np.flatnonzero(np.r_[True, sorted_keys[1:] != sorted_keys[:-1]])
    sizes = np.diff(np.r_[starts, sorted_keys.size])
    bucket = np.repeat(np.arange(starts.size), sizes)
    small = sizes[bucket] <= _SMALL_BUCKET
    firsts: list[np.ndarray] = []
    seconds: list[np.ndarray] = []
    # Pairs at distance o in sorted order inside the same small bucket, for o = 1 … 31.
    for offset in range(1, min(_SMALL_BUCKET, int(sizes.max(initial=1)))):
        same = (bucket[offset:] == bucket[:-offset]) & small[offset:]
        if not same.any():
            continue
        a = order[:-offset][same]
        b = order[offset:][same]
        firsts.append(np.minimum(a, b))
        seconds.append(np.maximum(a, b))
    # Large buckets (rows that hash alike in bulk): exact search inside the bucket.
    for index in np.flatnonzero(sizes > _SMALL_BUCKET):
        members = np.sort(order[starts[index] : starts[index] + sizes[index]])
        a, b, _ = exact_pairs(unit[members], threshold, negative)
        firsts.append(members[a])
        seconds.append(members[b])
    return firsts, seconds


def candidate_pairs(
    unit: np.ndarray, threshold: float, negative: bool = False, seed: int = 0
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Pairs past the cosine threshold found through sign-hash buckets (see module docstring)."""
    n, width = unit.shape
    bits, tables = hash_plan(n, threshold)
    rng = np.random.default_rng(seed)
    # Every table's hyperplanes in one matrix, so the projection is a single BLAS product.
    planes = rng.standard_normal((width, bits * tables), dtype=np.float32)
    signs = (unit @ planes) > 0
    weights = 1 << np.arange(bits, dtype=np.int64)
    mask = (1 << bits) - 1
    firsts: list[np.ndarray] = []
    seconds: list[np.ndarray] = []
    for table in range(tables):
        keys = signs[:, table * bits : (table + 1) * bits].astype(np.int64) @ weights
        if negative:
            # x and −x get complementary keys; key the pair {key, ~key} by its smaller member.
            keys = np.minimum(keys, keys ^ mask)
        order = np.argsort(keys, kind="stable")
        found_a, found_b = _bucket_pairs(order, keys, unit, threshold, negative)
        firsts += found_a
        seconds += found_b
    if not firsts:
        empty = np.zeros(0, np.int64)
        return empty, empty, np.zeros(0)
    code = np.unique(np.concatenate(firsts).astype(np.int64) * n + np.concatenate(seconds))
    return _confirm(unit, code // n, code % n, threshold, negative)


def similar_pairs(
    unit: np.ndarray, threshold: float, negative: bool, exact_limit: int, seed: int = 0
) -> tuple[np.ndarray, np.ndarray, np.ndarray, str]:
    """Exact search up to ``exact_limit`` rows, hashed candidates beyond; names the method."""
    if unit.shape[0] <= exact_limit:
        return (*exact_pairs(unit, threshold, negative), "exact")
    return (*candidate_pairs(unit, threshold, negative, seed), "hashed")
