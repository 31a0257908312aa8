"""Finding pairs of nearly parallel rows: blocked exact search and a hashed candidate search.

Both return the same thing, every pair ``i < k`` whose cosine is ``>= threshold`` (and, when
``negative`` is set, also ``<= -threshold``), with the cosine recomputed in float64 from the
rows themselves, so the two searches agree on every pair they both see.

The rows are a :class:`Rows` view: a float32 matrix, an optional extra last column (a bias)
and float64 norms. Neither search copies the whole layer: the hashed one projects the stored
rows directly (a sign hash is unchanged by scaling a row, so nothing needs normalising), and
only the rows of candidate pairs are gathered.

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
from dataclasses import dataclass

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
#: Slack of the float32 pre-filters before the float64 check (float32 dot products of unit
#: vectors are accurate to about 1e-6 at the widths seen here).
_SLACK = 1e-4

_EMPTY = np.zeros(0, np.int64)


@dataclass(frozen=True)
class Rows:
    """Rows r_j = [matrix_j, extra_j] and their float64 norms, viewed without copying."""

    matrix: np.ndarray
    """``[n, d]`` float32 (never written to)."""
    norms: np.ndarray
    """‖r_j‖, float64 (non-finite for a row holding a NaN or an infinity)."""
    extra: np.ndarray | None = None
    """An optional last column ``[n]`` (a bias), part of every row."""

    @classmethod
    def of(cls, rows: np.ndarray) -> Rows:
        """A view of plain rows, with their norms computed in float64."""
        matrix = np.asarray(rows, dtype=np.float32)
        return cls(matrix, np.sqrt(np.einsum("ij,ij->i", matrix, matrix, dtype=np.float64)))

    @property
    def count(self) -> int:
        return int(self.matrix.shape[0])

    def take(self, index: np.ndarray | list[int], dtype: type = np.float64) -> np.ndarray:
        """The rows at ``index`` (extra column included), as ``dtype``."""
        index = np.asarray(index, dtype=np.int64)
        width = self.matrix.shape[1] + (0 if self.extra is None else 1)
        out = np.empty((index.size, width), dtype=dtype)
        out[:, : self.matrix.shape[1]] = self.matrix[index]
        if self.extra is not None:
            out[:, -1] = self.extra[index]
        return out

    def unit(self, index: np.ndarray) -> np.ndarray:
        """r_j/‖r_j‖ at ``index`` as float32 (rows with a zero or non-finite norm become 0)."""
        return scaled(self.take(index, np.float32), self.norms[index])

    def project(self, planes: np.ndarray) -> np.ndarray:
        """Every row times ``planes`` (``[d (+1), k]``), one BLAS product on the stored rows."""
        d = self.matrix.shape[1]
        out = np.asarray(self.matrix @ planes[:d])
        if self.extra is not None:
            out += self.extra[:, None].astype(np.float32) * planes[d]
        return out


def normalise(rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Unit-norm float32 copies of ``rows`` and their float64 norms (zero rows stay zero)."""
    view = Rows.of(rows)
    return scaled(view.matrix, view.norms), view.norms


def scaled(rows: np.ndarray, norms: np.ndarray) -> np.ndarray:
    """``rows / norms`` as a new float32 array; rows with a zero or non-finite norm become 0."""
    usable = np.isfinite(norms) & (norms > 0)
    scale = np.divide(1.0, norms, out=np.zeros_like(norms), where=usable).astype(np.float32)
    out = np.empty(rows.shape, dtype=np.float32)
    with np.errstate(invalid="ignore", over="ignore"):
        np.multiply(rows, scale[:, None], out=out)
    out[~usable] = 0.0
    return out


def _confirm(
    rows: Rows, first: np.ndarray, second: np.ndarray, threshold: float, negative: bool
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Cosines of candidate pairs, keeping those past the threshold: a float32 pass over the
    gathered rows, then float64 for the pairs it cannot rule out."""
    if first.size == 0:
        return _EMPTY, _EMPTY, np.zeros(0)
    with np.errstate(divide="ignore", invalid="ignore"):
        return _confirm_pairs(rows, first, second, threshold, negative)


def _confirm_pairs(
    rows: Rows, first: np.ndarray, second: np.ndarray, threshold: float, negative: bool
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    width = rows.matrix.shape[1] + 1
    step = max(1, BLOCK_BYTES // (8 * width))
    rough = np.empty(first.size)
    for start in range(0, first.size, step):
        a, b = first[start : start + step], second[start : start + step]
        dots = np.einsum("ij,ij->i", rows.matrix[a], rows.matrix[b], dtype=np.float32)
        if rows.extra is not None:
            dots = dots + rows.extra[a] * rows.extra[b]
        rough[start : start + step] = dots / (rows.norms[a] * rows.norms[b])
    loose = threshold - _SLACK
    maybe = rough >= loose
    if negative:
        maybe |= rough <= -loose
    first, second = first[maybe], second[maybe]
    cos = np.empty(first.size)
    step = max(1, BLOCK_BYTES // (16 * width))
    for start in range(0, first.size, step):
        a, b = first[start : start + step], second[start : start + step]
        dots = np.einsum("ij,ij->i", rows.take(a), rows.take(b))
        cos[start : start + step] = dots / (rows.norms[a] * rows.norms[b])
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


def _gram_candidates(
    unit: np.ndarray, threshold: float, negative: bool
) -> tuple[np.ndarray, np.ndarray]:
    """Pairs ``i < k`` of normalised rows whose float32 cosine is within slack of the
    threshold, by blocked Gram products."""
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
    if not firsts:
        return _EMPTY, _EMPTY
    return np.concatenate(firsts).astype(np.int64), np.concatenate(seconds).astype(np.int64)


def exact_pairs(
    rows: np.ndarray | Rows, threshold: float, negative: bool = False
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Every pair ``i < k`` of rows past the cosine threshold, by blocked Gram products."""
    view = rows if isinstance(rows, Rows) else Rows.of(rows)
    every = np.arange(view.count)
    first, second = _gram_candidates(view.unit(every), threshold, negative)
    return _confirm(view, first, second, threshold, negative)


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
    order: np.ndarray, keys: np.ndarray, rows: Rows, threshold: float, negative: bool
) -> tuple[list[np.ndarray], list[np.ndarray]]:
    """Candidate pairs of rows sharing a key (``order`` sorts ``keys``; negative keys are
    rows left out, each alone in its bucket)."""
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
    # Large buckets (rows that hash alike in bulk): a Gram search inside the bucket.
    for index in np.flatnonzero(sizes > _SMALL_BUCKET):
        members = np.sort(order[starts[index] : starts[index] + sizes[index]])
        a, b = _gram_candidates(rows.unit(members), threshold, negative)
        firsts.append(members[a])
        seconds.append(members[b])
    return firsts, seconds


def candidate_pairs(
    rows: np.ndarray | Rows,
    threshold: float,
    negative: bool = False,
    seed: int = 0,
    usable: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Pairs past the cosine threshold found through sign-hash buckets (see module docstring);
    only rows where ``usable`` is true take part."""
    view = rows if isinstance(rows, Rows) else Rows.of(rows)
    n = view.count
    width = view.matrix.shape[1] + (0 if view.extra is None else 1)
    bits, tables = hash_plan(n, threshold)
    rng = np.random.default_rng(seed)
    # Every table's hyperplanes in one matrix, so the projection is a single BLAS product.
    planes = rng.standard_normal((width, bits * tables), dtype=np.float32)
    signs = view.project(planes) > 0
    weights = 1 << np.arange(bits, dtype=np.int64)
    mask = (1 << bits) - 1
    outside = None if usable is None else ~np.asarray(usable, dtype=bool)
    firsts: list[np.ndarray] = []
    seconds: list[np.ndarray] = []
    for table in range(tables):
        keys = signs[:, table * bits : (table + 1) * bits].astype(np.int64) @ weights
        if negative:
            # x and −x get complementary keys; key the pair {key, ~key} by its smaller member.
            keys = np.minimum(keys, keys ^ mask)
        if outside is not None:
            keys[outside] = -1 - np.flatnonzero(outside)  # distinct keys: never in a pair
        order = np.argsort(keys, kind="stable")
        found_a, found_b = _bucket_pairs(order, keys, view, threshold, negative)
        firsts += found_a
        seconds += found_b
    if not firsts:
        return _EMPTY, _EMPTY, np.zeros(0)
    code = np.unique(np.concatenate(firsts).astype(np.int64) * n + np.concatenate(seconds))
    return _confirm(view, code // n, code % n, threshold, negative)


def similar_pairs(
    rows: Rows,
    threshold: float,
    negative: bool,
    exact_limit: int,
    seed: int = 0,
    usable: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, str]:
    """Pairs among the ``usable`` rows: exact search up to ``exact_limit`` of them, hashed
    candidates beyond; names the method."""
    members = np.arange(rows.count) if usable is None else np.flatnonzero(usable)
    if members.size < 2:
        return _EMPTY, _EMPTY, np.zeros(0), "exact"
    if members.size <= exact_limit:
        first, second = _gram_candidates(rows.unit(members), threshold, negative)
        a, b, cos = _confirm(rows, members[first], members[second], threshold, negative)
        return a, b, cos, "exact"
    return (*candidate_pairs(rows, threshold, negative, seed, usable), "hashed")
