"""The bytes of an ONNX model file and its external data files, read with positioned reads."""

from __future__ import annotations

import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from steelyard import budget
from steelyard.errors import LoadError
from steelyard.loaders.base import file_size, inside, read_exactly


class FileBytes:
    """The model file and its external data files, read with positioned reads.

    Reads into fresh arrays rather than memory maps: a mapped file's pages count in the
    process's resident set once touched, so auditing a 650 MB float32 model held 938 MiB
    (docs/performance.md, "Thirteenth session") and a model of several gigabytes would have
    held all of them. A private file object per read keeps concurrent reads safe."""

    def __init__(self, path: Path) -> None:
        self.path = path
        self.folder = path.parent
        self.size = file_size(path)
        self.files: dict[Path, int] = {}
        """External data files in first-use order → size."""
        self.ledger = budget.Ledger(path)
        """Bytes this model makes steelyard compute beyond what it stores (densified sparse
        tensors, folded constants)."""

    def view(self, target: Path, offset: int, count: int, dtype: np.dtype[Any]) -> np.ndarray:
        """``count`` elements of ``dtype`` at ``offset`` of ``target`` (bounds already checked)."""
        if count == 0:
            return np.zeros(0, dtype=dtype)
        array = np.empty(count, dtype=dtype)
        self.read_into(target, offset, array)
        if sys.byteorder == "big" and dtype.itemsize > 1:
            array.byteswap(inplace=True)
        return array

    def read_into(self, target: Path, offset: int, array: np.ndarray) -> None:
        """Fill the C-contiguous ``array`` with the bytes at ``offset`` of ``target``."""
        try:
            read_exactly(target, offset, array, "became shorter after it was opened")
        except OSError as exc:
            raise LoadError(target, f"cannot be read ({exc})") from None

    def external(self, location: str) -> tuple[Path, int]:
        """Resolve an external data location strictly inside the model's folder."""
        target = inside(self.folder, location, self.path)
        if target not in self.files:
            self.files[target] = file_size(target)
        return target, self.files[target]

    def spans(
        self, target: Path, offset: int, dtype: np.dtype[Any], count: int, whole_bytes: bool
    ) -> tuple[Callable[[int, int], np.ndarray] | None, Callable[[int, int, np.ndarray], None] | None]:
        """(read_span, fill_span) of a tensor of ``count`` elements whose bytes lie at
        ``offset`` of ``target``: None for types narrower than a byte (no element offsets);
        fill_span only for float32 on a little-endian host, where the bytes are the array's."""
        if not whole_bytes:
            return None, None
        itemsize = dtype.itemsize

        def read_span(start: int, stop: int) -> np.ndarray:
            start, stop = max(0, start), min(count, stop)
            if stop <= start:
                return np.empty(0, dtype=dtype)
            return self.view(target, offset + start * itemsize, stop - start, dtype)

        def fill_span(start: int, stop: int, out: np.ndarray) -> None:
            start, stop = max(0, start), min(count, stop)
            if stop > start:
                self.read_into(target, offset + start * itemsize, out.reshape(-1)[: stop - start])

        little = sys.byteorder == "little"
        return read_span, (fill_span if dtype == np.float32 and little else None)
