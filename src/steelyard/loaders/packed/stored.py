"""A stored part of a packed weight (``qweight``, ``scales``, ``absmax`` ...), read on demand.

The layout decoders index their parts like numpy arrays (``part[a:b]``, ``part[:, a:b]``,
``np.asarray(part)``). A :class:`StoredPart` answers those requests from the file: a row range
is one positional read; a column range (GPTQ and AWQ keep the output axis as columns of
``qweight``) is read in runs of whole rows of at most :data:`RUN_BYTES` and cut, so memory
stays one run plus the answer however large the stored tensor is.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any, TypeAlias

import numpy as np

#: Stored bytes read per run when a request cuts columns out of whole rows.
RUN_BYTES = 4 * 2**20


@dataclass(frozen=True)
class StoredPart:
    """One stored tensor of a packed weight: its shape and dtype, bytes read when indexed."""

    path: Path
    """The file that holds it (named in errors)."""
    name: str
    shape: tuple[int, ...]
    dtype: np.dtype[Any]
    read_span: Callable[[int, int], np.ndarray]
    """Elements ``[start, stop)`` of the flattened tensor, in ``dtype``."""

    @property
    def ndim(self) -> int:
        """Number of axes."""
        return len(self.shape)

    @property
    def size(self) -> int:
        """Number of elements."""
        return math.prod(self.shape)

    @property
    def nbytes(self) -> int:
        """Stored bytes."""
        return self.size * self.dtype.itemsize

    def whole(self) -> np.ndarray:
        """The whole tensor (for the small parts: scales, zero points, index vectors)."""
        return np.asarray(self.read_span(0, self.size)).reshape(self.shape)

    def __array__(self, dtype: Any = None, copy: Any = None) -> np.ndarray:
        array = self.whole()
        return array if dtype is None else array.astype(dtype)

    def __getitem__(self, key: Any) -> np.ndarray:
        if isinstance(key, tuple):
            if len(key) != 2:
                raise IndexError("a stored part takes [rows] or [rows, columns]")
            rows, cols = key
        else:
            rows, cols = key, slice(None)
        if not isinstance(rows, slice) or not isinstance(cols, slice):
            raise IndexError("a stored part takes slices")
        return self._block(rows, cols)

    def _block(self, rows: slice, cols: slice) -> np.ndarray:
        n_rows = self.shape[0] if self.shape else 1
        r0, r1, r_step = rows.indices(n_rows)
        if r_step != 1:
            raise IndexError("a stored part takes contiguous rows")
        r1 = max(r0, r1)
        inner = self.shape[1:]
        row_size = math.prod(inner)
        if cols == slice(None) or self.ndim < 2:
            flat = self.read_span(r0 * row_size, r1 * row_size)
            return np.asarray(flat).reshape((r1 - r0, *inner))
        c0, c1, c_step = cols.indices(self.shape[1])
        if c_step != 1:
            raise IndexError("a stored part takes contiguous columns")
        c1 = max(c0, c1)
        tail = math.prod(self.shape[2:])
        out = np.empty((r1 - r0, c1 - c0, *self.shape[2:]), dtype=self.dtype)
        per_run = max(1, RUN_BYTES // max(1, row_size * self.dtype.itemsize))
        for a in range(r0, r1, per_run):
            b = min(r1, a + per_run)
            if c1 - c0 == self.shape[1]:
                out[a - r0 : b - r0] = self._block(slice(a, b), slice(None))
                continue
            # Only the span from the first wanted element of row a to the last of row b-1.
            first = a * row_size + c0 * tail
            last = (b - 1) * row_size + c1 * tail
            run = np.asarray(self.read_span(first, last))
            padded = np.empty((b - a) * row_size, dtype=self.dtype)
            padded[c0 * tail : c0 * tail + run.size] = run
            shaped = padded.reshape((b - a, *inner))
            out[a - r0 : b - r0] = shaped[:, c0:c1]
        return out


@dataclass(frozen=True)
class ColumnWindow:
    """Columns ``[offset, offset + array.shape[1])`` of a 2-D part, read once and held in
    memory, indexed in the whole part's coordinates. A decoder restricted to one read's rows
    (``window``) uses it so that the packed columns are read once per read, not once per
    decoding step."""

    array: np.ndarray
    offset: int
    shape: tuple[int, ...]
    """Shape of the whole part."""

    @classmethod
    def of(cls, part: Part, start: int, stop: int) -> ColumnWindow:
        """Columns ``[start, stop)`` of ``part`` read now."""
        return cls(np.asarray(part[:, start:stop]), start, tuple(part.shape))

    @property
    def ndim(self) -> int:
        """Number of axes (of the whole part)."""
        return len(self.shape)

    @property
    def dtype(self) -> np.dtype[Any]:
        """Element type."""
        return self.array.dtype

    @property
    def size(self) -> int:
        """Number of elements (of the whole part)."""
        return math.prod(self.shape)

    def __getitem__(self, key: Any) -> np.ndarray:
        rows, cols = key
        c0, c1, _ = cols.indices(self.shape[1])
        end = self.offset + self.array.shape[1]
        if not self.offset <= c0 <= max(c0, c1) <= end:
            raise IndexError(f"columns [{c0}, {c1}) outside the window [{self.offset}, {end})")
        return np.asarray(self.array[rows, c0 - self.offset : max(c0, c1) - self.offset])


#: What a decoder accepts for each part: an array in memory (tests), a stored part, or a
#: window of one held in memory.
Part: TypeAlias = "np.ndarray | StoredPart | ColumnWindow"
