"""Float facts shared by the parts: the stored float names (widths in ``steelyard.dtypes``),
exact sums of squares, a lean median, numpy's ``unique`` and ``quantile`` without their
import of ``numpy.ma``, and exact power-of-two rescaling."""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np

from steelyard.dtypes import FLOAT_ITEMSIZE

FLOAT_NAMES = frozenset(FLOAT_ITEMSIZE)


#: Rows at least this wide are summed by one BLAS dot product per row (see
#: :func:`sums_of_squares`); narrower ones by ``einsum``, which wins below about 64 inputs.
ROW_DOT_WIDTH = 128


def sums_of_squares(block: np.ndarray, axis: int) -> np.ndarray:
    """Σ x² of a float32 block along ``axis`` (1: per row, 0: per column), as float64.

    Accumulated in float32; entries whose float32 sum lies outside [1e-30, 1e30] (or is not
    finite) are summed again in float64, where float32 may have overflowed, underflowed or
    met a NaN/Inf (see :mod:`steelyard.stats`).

    Rows of ``ROW_DOT_WIDTH`` or more go through ``matmul`` as one (1 × n)·(n × 1) product
    per row, which numpy hands to BLAS: 2.2-3 × faster than ``einsum`` on 512-5632-wide
    weight rows and, from 512 inputs on, 3-6 × closer to the float64 sum (BLAS keeps several
    partial sums, einsum one running sum). Measured on this project's benchmark host,
    docs/performance.md ("Ninth session"). The result does not depend on BLAS's thread count
    (checked up to 200,000-wide rows, tests/stats/test_numerics.py).
    """
    spec = "ij,ij->i" if axis == 1 else "ij,ij->j"
    if axis == 1 and block.ndim == 2 and block.shape[1] >= ROW_DOT_WIDTH:
        # matmul reports float32 overflow (einsum does not); those rows are redone below
        with np.errstate(over="ignore", invalid="ignore"):
            rough = np.matmul(block[:, None, :], block[:, :, None]).reshape(-1)
    else:
        rough = np.einsum(spec, block, block)
    out = rough.astype(np.float64)
    risky = np.flatnonzero(~((rough >= 1e-30) & (rough <= 1e30)))
    if risky.size:
        part = block[risky] if axis == 1 else block[:, risky]
        out[risky] = np.einsum(spec, part, part, dtype=np.float64)
    return out


def row_norms(matrix: np.ndarray) -> np.ndarray:
    """Row L2 norms (see :func:`sums_of_squares`)."""
    return np.sqrt(sums_of_squares(np.asarray(matrix, dtype=np.float32), axis=1))


_LOW_HALF = np.uint32(0xFFFF)


def _flip(patterns: np.ndarray, negative: np.ndarray) -> np.ndarray:
    """The usual float-to-integer sort key on 16-bit patterns, in place, and its inverse:
    where ``negative`` is 1 every bit flips, elsewhere only the top one (``negative`` is
    used as scratch)."""
    np.negative(negative, out=negative)  # 0xFFFF where 1, 0 elsewhere (uint16 wraps)
    negative |= np.uint16(0x8000)
    patterns ^= negative
    return patterns


def _order_keys(high: np.ndarray) -> np.ndarray:
    """bf16 bit patterns (uint16) to keys that order as the floats do, in place: a
    negative's bits all flipped, a positive's sign bit set."""
    return _flip(high, high >> 15)


def _bf16_patterns(keys: np.ndarray) -> np.ndarray:
    """The inverse of :func:`_order_keys`, in place: a key whose top bit is clear came from a
    negative, one whose top bit is set from a positive."""
    negative = keys >> 15
    negative ^= np.uint16(1)
    return _flip(keys, negative)


#: numpy 2 sorts float32 with vectorised quicksort on x86 (AVX2 and AVX-512 kernels of
#: x86-simd-sort) and on ARM (Highway's VQSort); numpy 1 with a scalar introsort.
_VECTOR_SORT = int(np.__version__.split(".", 1)[0]) >= 2


def sorted_wide(values: np.ndarray) -> np.ndarray:
    """``values`` (float32) sorted ascending, as float64: the same array as
    ``np.sort(values).astype(np.float64)``.

    With numpy 2 that is what it does: the vectorised float32 sort beats every detour (20,000
    values widened from bf16: 44 against 79 µs for the radix path below; Intel Xeon with
    AVX-512, docs/performance.md, "Fourteenth session"). With numpy 1, values widened from
    bf16 (every low 16-bit half zero, as in most shipped checkpoints) are sorted by their
    upper halves, mapped to unsigned keys that order as the floats do: numpy sorts 16-bit
    integers with a radix sort, 3 × faster than its scalar float32 sort (20,000 values: 104
    against 330 µs), and the few in-place steps around it keep the temporaries small. With a
    NaN among them numpy's order (NaNs last) is kept by its own sort."""
    flat = np.ascontiguousarray(values, dtype=np.float32).reshape(-1)
    if _VECTOR_SORT:
        return np.sort(flat).astype(np.float64)
    return _sorted_by_bf16_keys(flat)


def _sorted_by_bf16_keys(flat: np.ndarray) -> np.ndarray:
    """:func:`sorted_wide` for numpy 1 (see there)."""
    bits = flat.view(np.uint32)
    if flat.size < 1024 or (bits & _LOW_HALF).any():
        return np.sort(flat).astype(np.float64)
    high = (bits >> 16).astype(np.uint16)
    if ((high & np.uint16(0x7FFF)) > np.uint16(0x7F80)).any():  # a NaN
        return np.sort(flat).astype(np.float64)
    keys = _order_keys(high)
    keys.sort(kind="stable")
    wide = _bf16_patterns(keys).astype(np.uint32)
    wide <<= 16
    out = np.empty(flat.size, dtype=np.float64)
    out[...] = wide.view(np.float32)
    return out


def distinct(values: np.ndarray) -> np.ndarray:
    """The distinct values of an integer array, sorted: ``numpy.unique(values)`` for the index
    arrays the rules deduplicate. numpy 2's plain ``unique`` asks ``numpy.ma`` whether the
    array is masked, and its first call in a process imports that package (16 ms here, on
    every command that audits)."""
    ordered = np.sort(values, axis=None)
    if ordered.size < 2:
        return ordered
    keep = np.empty(ordered.size, dtype=bool)
    keep[0] = True
    np.not_equal(ordered[1:], ordered[:-1], out=keep[1:])
    return ordered[keep]


def median_of(values: np.ndarray | list[float]) -> float:
    """``float(numpy.median(values))`` bit for bit (NaN when any value is NaN, and for no
    values), without numpy's general machinery: 3 µs against 12 µs on 512 values (the rules
    take a few medians of every layer's row norms).

    The same steps as numpy's: a partition around the middle (and the last position, where
    a partition puts NaNs), then the mean of the middle one or two values in the array's
    own dtype."""
    flat = np.asarray(values).reshape(-1)
    n = flat.size
    if n == 0:
        return math.nan
    half = n // 2
    middle = [half - 1, half] if n % 2 == 0 else [half]
    inexact = np.issubdtype(flat.dtype, np.inexact)
    parted = np.partition(flat, [*middle, n - 1] if inexact else middle)
    if inexact and np.isnan(parted[-1]):
        return math.nan
    return float(parted[middle[0] : middle[-1] + 1].mean())


def quantile_of(values: np.ndarray, q: float | Sequence[float]) -> Any:
    """``numpy.quantile(values, q)`` (its default, linear method) bit for bit: a float of the
    array's dtype for a float ``q``, a float64 array for a sequence (numpy's promotion rules
    for a weak scalar and an array of weights).

    The same steps as numpy's: a partition at the order statistics either side of each
    virtual index (n − 1)·q and numpy's linear interpolation, taken from the nearer end.
    numpy's own passes those positions through ``numpy.unique``, whose first call imports
    ``numpy.ma`` (see :func:`distinct`)."""
    flat = np.asarray(values).reshape(-1)
    n = flat.size
    scalar = isinstance(q, (int, float))
    virtual = ((n - 1) * np.asarray(q, dtype=np.float64)).reshape(-1)
    below = np.floor(virtual)
    above = below + 1
    # Beyond the last position both neighbours are the last value, before the first both the
    # first (numpy's _get_indexes), and gamma is taken from those adjusted positions.
    last = virtual >= n - 1
    below[last], above[last] = -1, -1
    first = virtual < 0
    below[first], above[first] = 0, 0
    gamma = virtual - below
    low, high = below.astype(np.intp), above.astype(np.intp)
    parted = np.partition(flat, distinct(np.concatenate(([0, n - 1], low % n, high % n))))
    a, b = parted[low], parted[high]
    t: Any = float(gamma[0]) if scalar else gamma
    diff = b - a
    out = np.add(a, diff * t)
    np.subtract(b, diff * (1 - t), out=out, where=np.asarray(t) >= 0.5,
                casting="unsafe", dtype=type(out.dtype))
    if np.issubdtype(flat.dtype, np.inexact) and np.isnan(parted[-1]):
        out[...] = np.nan  # numpy: a NaN anywhere makes every quantile NaN
    return out[0] if scalar else out


def power_of_two_toward_one(peak: float, bound: float) -> float:
    """1.0, or the power of two that brings ``peak`` to [0.5, 1) when it lies outside
    [1/bound, bound], where float32 sums and products of values that large or small could
    overflow or vanish (1.0 too for a peak that is 0, negative or not finite). Multiplying
    by a power of two is exact (but for subnormals), so ratios measured after it are the
    same; the factor itself may lie beyond float32 (see :func:`times_exactly`)."""
    if not (math.isfinite(peak) and peak > 0.0) or 1.0 / bound <= peak <= bound:
        return 1.0
    return 2.0 ** -math.frexp(peak)[1]


def times_exactly(values: np.ndarray, factor: float) -> np.ndarray:
    """``values`` times the power of two ``factor`` as float32: in float32 when the factor is
    a normal float32 (one pass, 4 × faster on a token table; the same exact products), else
    in float64, since a power of two for a table of subnormals (2^142, say) is beyond float32
    itself."""
    if 2.0**-126 <= factor <= 2.0**127:
        return np.multiply(values, np.float32(factor), dtype=np.float32)
    return np.multiply(values, factor, dtype=np.float64).astype(np.float32)
