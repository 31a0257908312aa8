"""Counting NaN and ±Inf: once per tensor, shared by the statistics and the ``nonfinite`` rule.

A weight tensor read by a layer's pass is counted on the way (see :mod:`.passes`); every other
tensor is counted by :meth:`NonfiniteCounts.count`, streamed in chunks when its loader allows.
Values are judged as the audit reads them, in float32: bf16/fp16/fp8 after widening (which
keeps NaN and ±Inf), integers after conversion, and wider floats after narrowing, so a float64
value beyond the float32 range (|x| > 3.4e38) counts as the ±Inf every float32, bf16 or fp16
reader would get: the audit could not judge it otherwise, and a gate must not pass it.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass

import numpy as np

from steelyard.dtypes import FLOAT_ITEMSIZE, to_float32
from steelyard.graph import Tensor
from steelyard.stats.memo import Memo
from steelyard.stats.numerics import FLOAT_NAMES
from steelyard.stats.reading import read_stored
from steelyard.streaming import chunks

#: NaN, +Inf and −Inf counts of one tensor.
Counts = tuple[int, int, int]


def count_into(values: np.ndarray, counts: list[int]) -> None:
    """Add the NaN, +Inf and −Inf counts of ``values`` (one cheap pass when all finite),
    floats wider than float32 judged after narrowing to it (see the module)."""
    values = _narrowed(values)
    if values.size == 0:
        return
    finite = np.isfinite(values)
    if bool(finite.all()):
        return
    # The few non-finite values are classified on their own: two passes over the block, not
    # four (a checkpoint with a handful of NaNs in every matrix: 0.29 → 0.07 s, profiled).
    odd = values[~finite]
    counts[0] += int(np.isnan(odd).sum())
    counts[1] += int(np.count_nonzero(odd == np.inf))
    counts[2] += int(np.count_nonzero(odd == -np.inf))


def _narrowed(values: np.ndarray) -> np.ndarray:
    """Floats wider than float32 narrowed to it (beyond its range: ±Inf, quietly)."""
    return to_float32(values) if values.dtype.kind == "f" and values.dtype.itemsize > 4 else values


def _judged(array: np.ndarray) -> np.ndarray:
    """The values as the counts judge them: as float32 (see the module)."""
    if array.dtype.kind not in ("f", "V") or array.dtype.itemsize < 4:
        return np.asarray(array, dtype=np.float32)
    return _narrowed(array)


@dataclass(frozen=True, slots=True)
class NonfiniteScan:
    """Where a tensor's non-finite values are (stored shape) and how many of each kind."""

    bad: np.ndarray
    """True where the stored element is NaN or ±Inf (shaped as stored)."""
    nan: int
    posinf: int
    neginf: int


def scan(tensor: Tensor) -> NonfiniteScan | None:
    """The positions and counts of a tensor's non-finite values, None when it has none; read
    whole through the audit's read path (callers first check :meth:`NonfiniteCounts.count`,
    so only tensors that hold such values are read again)."""
    values = _judged(read_stored(tensor))
    bad = ~np.isfinite(values)
    if not bad.any():
        return None
    counts = [0, 0, 0]
    count_into(values, counts)
    return NonfiniteScan(bad, counts[0], counts[1], counts[2])


class NonfiniteCounts:
    """NaN/±Inf counts per tensor, computed once per audit (thread-safe)."""

    def __init__(self, memo: Memo) -> None:
        self._memo = memo
        self._found: dict[int, tuple[Tensor, Counts]] = {}
        self._guard = threading.Lock()

    def record(self, tensor: Tensor, counts: Counts) -> None:
        """Keep counts a layer's pass made on the way (the tensor is never read for them)."""
        with self._guard:
            # The tensor is kept with its counts so its id cannot be reused meanwhile.
            self._found[id(tensor)] = (tensor, counts)

    def known(self, tensor: Tensor) -> Counts | None:
        """The counts when they are already known."""
        with self._guard:
            found = self._found.get(id(tensor))
        return None if found is None else found[1]

    def count(self, tensor: Tensor) -> Counts:
        """NaN, +Inf and −Inf counts of ``tensor``, read for them only the first time."""
        found = self.known(tensor)
        if found is not None:
            return found
        with self._memo.lock_for(("counts", id(tensor))):
            found = self.known(tensor)
            if found is None:
                found = _count(tensor)
                self.record(tensor, found)
            return found


def _count(tensor: Tensor) -> Counts:
    counts = [0, 0, 0]
    if tensor.read_span is not None and tensor.size:
        wide = FLOAT_ITEMSIZE.get(tensor.dtype, 4) >= 4 and tensor.dtype in FLOAT_NAMES
        for start, stop in chunks(tensor.size):
            if wide:
                count_into(tensor.read_part(start, stop), counts)
            else:
                block = np.empty(stop - start, dtype=np.float32)
                tensor.widen_part(start, stop, block)
                count_into(block, counts)
    elif tensor.size:
        count_into(_judged(read_stored(tensor)), counts)
    return counts[0], counts[1], counts[2]
