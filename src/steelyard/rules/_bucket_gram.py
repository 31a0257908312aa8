"""Confirming the rows that share a hash bucket: one Gram product per bucket, buckets of
similar sizes stacked into one batched product, and a band of the Gram matrix for buckets no
key length splits (see :mod:`steelyard.rules._similarity`, steps 2 and 4)."""

from __future__ import annotations

import numpy as np

from steelyard.rules._rows import Rows, Tally, inverse_norms, off_scale, passing

#: Most rows compared all against all in one hash bucket; a larger bucket gets a longer key.
BUCKET_CAP = 128
#: A bucket that longer keys cannot split compares each run of ``BUCKET_CAP`` members with
#: the ``BAND``·``BUCKET_CAP`` members from its start: every pair up to that size, a band beyond.
BAND = 4
#: Buckets up to this size list their pairs, which are deduplicated across tables and
#: confirmed once each; larger buckets are confirmed by one Gram product per table.
PAIRED = 4


def bucket_hits(
    view: Rows, table: tuple[np.ndarray, np.ndarray], threshold: float, negative: bool, tally: Tally
) -> tuple[list[np.ndarray], list[np.ndarray], list[np.ndarray]]:
    """Pairs inside buckets of more than ``PAIRED`` rows passing the float32 filter, with
    their float32 cosines.

    A bucket of up to ``BUCKET_CAP`` rows gets one Gram product; a bucket still larger (its
    rows agree on every bit of the longest key) compares each run of ``BUCKET_CAP`` members
    (in index order) with itself and the next ``BAND`` − 1 runs, a band of its Gram matrix:
    every pair of a bucket of up to ``BAND``·``BUCKET_CAP`` rows, and beyond that every
    member meets at least the (``BAND`` − 1)·``BUCKET_CAP`` >= ``PARTNERS`` members that
    follow it (all of its capped partners when the bucket is a cluster of copies).
    ``table`` is :func:`steelyard.rules._similarity._table_buckets`'s (bucket of every row,
    rows in bucket order)."""
    bucket, order = table  # the order keeps each bucket's members in index order
    sizes = np.bincount(bucket)
    starts = np.r_[0, np.cumsum(sizes)[:-1]]
    found: tuple[list[np.ndarray], list[np.ndarray], list[np.ndarray]] = ([], [], [])
    medium = np.flatnonzero((sizes > PAIRED) & (sizes <= BUCKET_CAP))
    _stacked_hits(view, order, starts[medium], sizes[medium], threshold, negative, tally, found)
    for number in np.flatnonzero(sizes > BUCKET_CAP):
        members = order[starts[number] : starts[number] + sizes[number]]
        tally.banded += int(members.size)
        for at in range(0, members.size, BUCKET_CAP):
            _block_hits(
                view,
                members[at : at + BUCKET_CAP],
                members[at : at + BAND * BUCKET_CAP],
                threshold,
                negative,
                tally,
                found,
            )
    return found


#: Float32 bytes of the gathered rows of one stack of buckets.
STACK_BYTES = 2**21
#: Largest bucket of a stack over its smallest: every bucket is padded to the largest, so a
#: stack of 5-row buckets ending in a 100-row one would compute 400 × the products it keeps.
STACK_SPREAD = 1.5


def _stacked_hits(
    view: Rows,
    order: np.ndarray,
    starts: np.ndarray,
    sizes: np.ndarray,
    threshold: float,
    negative: bool,
    tally: Tally,
    found: tuple[list[np.ndarray], list[np.ndarray], list[np.ndarray]],
) -> None:
    """Every pair inside each bucket (``order[start : start + size]``), buckets of similar
    sizes stacked into one gather and one batched Gram product, padded to the stack's largest
    bucket; each pair's product is the one :func:`_block_hits` computes for its bucket alone."""
    if not sizes.size:
        return
    width = view.matrix.shape[1] + (0 if view.extra is None else 1)
    by_size = np.argsort(sizes, kind="stable")
    at = 0
    while at < by_size.size:
        widest = int(sizes[by_size[min(by_size.size, at + 1) - 1]])
        # as many buckets as fit the budget at the size of the largest one taken so far
        count = 1
        smallest = int(sizes[by_size[at]])
        while at + count < by_size.size:
            widest = int(sizes[by_size[at + count]])
            if (count + 1) * widest * width * 4 > STACK_BYTES or widest > STACK_SPREAD * smallest:
                break
            count += 1
        chosen = by_size[at : at + count]
        at += count
        pad = int(sizes[chosen].max())
        slots = np.arange(pad)
        valid = slots[None, :] < sizes[chosen][:, None]
        # Padding slots repeat the bucket's first member: one plain gather, and their
        # products are dropped below.
        index = starts[chosen][:, None] + np.where(valid, slots[None, :], 0)
        members = order[index]
        norms = view.norms[members]
        if off_scale(norms[valid]).any():  # raw products would underflow or overflow float32
            for row, size in zip(members, sizes[chosen], strict=True):
                _block_hits(view, row[:size], row[:size], threshold, negative, tally, found)
            continue
        raw = view.take(members.reshape(-1), np.float32).reshape(chosen.size, pad, width)
        inverse = inverse_norms(norms.reshape(-1)).reshape(chosen.size, pad)
        gram = np.matmul(raw, raw.transpose(0, 2, 1))
        with np.errstate(invalid="ignore", over="ignore"):
            gram *= inverse[:, :, None]
            gram *= inverse[:, None, :]
        tally.dots += int(np.sum(sizes[chosen].astype(np.int64) ** 2))
        tally.largest = max(tally.largest, pad)
        stack, i, k = np.unravel_index(
            np.flatnonzero(passing(gram, threshold, negative)), gram.shape
        )
        later = (k > i) & valid[stack, k]
        stack, i, k = stack[later], i[later], k[later]
        keep(found, members[stack, i], members[stack, k], gram[stack, i, k])


def _block_hits(
    view: Rows,
    rows: np.ndarray,
    against: np.ndarray,
    threshold: float,
    negative: bool,
    tally: Tally,
    found: tuple[list[np.ndarray], list[np.ndarray], list[np.ndarray]],
) -> None:
    """Pairs (rows[i], against[k]) with k > i (``against`` starts with ``rows``)."""
    # Cosines from the raw rows' Gram matrix, scaled afterwards: b² multiplications instead of
    # a normalised copy of every gathered row.
    norms = view.norms[against]
    if off_scale(norms).any():  # raw products would underflow or overflow float32
        raw, inverse = view.unit(against), np.ones(against.size, np.float32)
    else:
        raw, inverse = view.take(against, np.float32), inverse_norms(norms)
    gram = raw[: rows.size] @ raw.T
    with np.errstate(invalid="ignore", over="ignore"):
        gram *= inverse[: rows.size, None]
        gram *= inverse[None, :]
    tally.dots += int(gram.size)
    tally.largest = max(tally.largest, rows.size)
    # Flat positions split by divmod: ``nonzero`` of a 2-D mask is several times slower.
    i, k = np.divmod(np.flatnonzero(passing(gram, threshold, negative)), gram.shape[1])
    later = k > i
    i, k = i[later], k[later]
    keep(found, rows[i], against[k], gram[i, k])


def keep(
    found: tuple[list[np.ndarray], list[np.ndarray], list[np.ndarray]],
    a: np.ndarray,
    b: np.ndarray,
    cos: np.ndarray,
) -> None:
    if a.size:
        found[0].append(np.minimum(a, b))
        found[1].append(np.maximum(a, b))
        found[2].append(cos)
