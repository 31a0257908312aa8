"""AWQ-style packed linear weights (4-bit, GEMM layout): ``qweight``, ``qzeros``, ``scales``.

Packing (as AutoAWQ's GEMM ``pack`` writes it; recalled from its published source, not run
here): codes ``q[in, out]`` are packed along the *output* axis, eight per int32 word, and
slot ``k`` of a word (bits ``4k .. 4k+3``) holds output column ``ORDER[k]`` of that word's
eight, with ``ORDER = (0, 2, 4, 6, 1, 3, 5, 7)``; zero points ``qzeros[groups, out / 8]`` are
packed the same way and stored as they are (no minus one, unlike GPTQ v1);
``scales[groups, out]``. Inference computes ``W[o, i] = scales[g, o] * (q[i, o] - z[g, o])``
with ``g = i // group_size``.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

from steelyard.budget import check_elements
from steelyard.errors import LoadError
from steelyard.loaders.packed.gptq import dequantize_groups, unpack_words
from steelyard.loaders.packed.stored import ColumnWindow, Part
from steelyard.tiled_copy import contiguous

ORDER = (0, 2, 4, 6, 1, 3, 5, 7)
_SLOT_OF_COLUMN = np.argsort(ORDER)


def unpack_awq(words: Part) -> np.ndarray:
    """Codes of AWQ words ``[rows, out / 8]`` as ``[rows, out]`` in true column order."""
    slots = unpack_words(words, 4, axis=1)
    rows, cols = slots.shape
    grouped = slots.reshape(rows, cols // 8, 8)
    return grouped[:, :, _SLOT_OF_COLUMN].reshape(rows, cols)


@dataclass(frozen=True)
class AwqWeight:
    """One AWQ linear weight, checked, with float rows on demand."""

    path: Path
    name: str
    qweight: Part
    qzeros: Part
    scales: Part
    group_size: int

    @classmethod
    def build(
        cls, path: Path, name: str, parts: Mapping[str, Part], bits: int, group_size: int
    ) -> AwqWeight:
        """Check the parts against each other; lying shapes, bits or groups are LoadErrors."""
        if bits != 4:
            raise LoadError(path, f"{name}: AWQ bit width {bits} is not supported (4)")
        for key in ("qweight", "qzeros", "scales"):
            if key not in parts or parts[key].ndim != 2:
                raise LoadError(path, f"{name}: AWQ needs a 2-D {key}")
        qweight, qzeros, scales = parts["qweight"], parts["qzeros"], parts["scales"]
        n_in, n_out = qweight.shape[0], qweight.shape[1] * 8
        check_elements(path, (n_out, n_in), f"{name} (dequantized)")
        if group_size in (-1, 0):
            group_size = n_in
        if group_size <= 0 or n_in % group_size:
            raise LoadError(path, f"{name}: AWQ group size {group_size} does not divide {n_in}")
        groups = n_in // group_size
        if scales.shape != (groups, n_out) or qzeros.shape != (groups, n_out // 8):
            raise LoadError(path, f"{name}: AWQ scales/qzeros shapes do not match qweight")
        return cls(path, name, qweight, qzeros, scales, group_size)

    @property
    def shape(self) -> tuple[int, int]:
        """Canonical ``[out, in]`` shape of the dequantized weight."""
        return (self.qweight.shape[1] * 8, self.qweight.shape[0])

    @property
    def stored_type(self) -> str:
        """What was stored, for reports."""
        return "awq-int4"

    def codes(self) -> np.ndarray:
        """The integer codes in canonical ``[out, in]`` orientation."""
        return unpack_awq(self.qweight).T

    def window(self, start: int, stop: int) -> AwqWeight:
        """This weight with the words and scales of rows ``[start, stop)`` read into memory."""
        w0, w1 = start // 8, -(-stop // 8)
        return replace(self, qweight=ColumnWindow.of(self.qweight, w0, w1),
                       qzeros=ColumnWindow.of(self.qzeros, w0, w1),
                       scales=ColumnWindow.of(self.scales, start, stop))

    def rows(self, start: int, stop: int) -> np.ndarray:
        """Dequantized float32 rows ``[start, stop)``; whole words are unpacked, then cut."""
        w0, w1 = start // 8, -(-stop // 8)
        cut = slice(start - 8 * w0, stop - 8 * w0)
        # Codes fit a byte: transpose them as bytes, then widen once in [rows, in] order.
        codes = unpack_awq(self.qweight[:, w0:w1])[:, cut].astype(np.uint8).T
        values = contiguous(codes, np.float32)
        zeros = contiguous(unpack_awq(self.qzeros[:, w0:w1])[:, cut].T, np.float32)
        scales = contiguous(np.asarray(self.scales[:, start:stop]).T, np.float32)
        g = np.arange(self.shape[1]) // self.group_size
        return dequantize_groups(values, zeros, scales, g, self.group_size)
