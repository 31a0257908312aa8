"""GPTQ-style packed linear weights: ``qweight``, ``qzeros``, ``scales``, optional ``g_idx``.

Packing (as AutoGPTQ's ``QuantLinear.pack`` writes it; recalled from its published source,
not run here): the integer codes ``q[in, out]`` are packed along the input axis,
``32 // bits`` codes per little-endian int32 word, lowest bits first, giving
``qweight[in * bits / 32, out]``; zero points are packed the same way along the output axis,
``qzeros[groups, out * bits / 32]``, stored minus one (the "v1" checkpoint format, so the
reader adds one back); ``scales[groups, out]``; ``g_idx[in]`` names each input channel's
group (act-order shuffles it; without it channel ``i`` is in group ``i // group_size``).
Inference computes ``W[o, i] = scales[g, o] * (q[i, o] - (z[g, o] + 1))`` with ``g = g_idx[i]``.
3-bit codes cross word boundaries: every three words hold 32 codes as one little-endian
96-bit stream (code ``k`` at bits ``3k .. 3k+2``, word 0 lowest), which is what ``pack``'s
explicit bit splitting for 3 bits amounts to; so 3-bit axes are a multiple of 32 codes.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

from steelyard.budget import check_elements
from steelyard.errors import LoadError
from steelyard.loaders.packed.stored import ColumnWindow, Part
from steelyard.tiled_copy import contiguous

SUPPORTED_BITS = (2, 3, 4, 8)


def codes_in(words: int, bits: int) -> int:
    """Codes held by ``words`` packed words along one axis (-1 when 3-bit words are not a
    whole number of 3-word runs)."""
    if bits == 3:
        return words // 3 * 32 if words % 3 == 0 else -1
    return words * (32 // bits)


def words_for(codes: int, bits: int) -> int:
    """Packed words needed for ``codes`` codes along one axis (padded to whole words/runs)."""
    if bits == 3:
        return -(-codes // 32) * 3
    return -(-codes // (32 // bits))


def _unpack_3bit(moved: np.ndarray) -> np.ndarray:
    """3-bit codes of ``moved[..., words]`` (words a multiple of 3) along the last axis."""
    runs = moved.reshape(*moved.shape[:-1], -1, 3).astype(np.uint64)
    low = runs[..., 0] | (runs[..., 1] << np.uint64(32))
    high = runs[..., 2]
    out = np.empty((*runs.shape[:-1], 32), dtype=np.uint64)
    seven = np.uint64(7)
    for k in range(32):
        p = 3 * k
        if p + 3 <= 64:
            out[..., k] = (low >> np.uint64(p)) & seven
        elif p >= 64:
            out[..., k] = (high >> np.uint64(p - 64)) & seven
        else:  # code 21 straddles bit 64
            out[..., k] = ((low >> np.uint64(p)) | (high << np.uint64(64 - p))) & seven
    return out.astype(np.uint32).reshape(*moved.shape[:-1], -1)


def unpack_words(words: Part, bits: int, axis: int) -> np.ndarray:
    """Codes packed ``32 // bits`` per int32 word along ``axis``, lowest bits first (3-bit:
    32 codes per 3 words)."""
    raw = np.ascontiguousarray(words).view(np.uint32)
    if bits == 3:
        return np.moveaxis(_unpack_3bit(np.moveaxis(raw, axis, -1)), -1, axis)
    per_word = 32 // bits
    axis = axis % raw.ndim
    # Shift into a new axis right after the packed one: [..., words, per_word, ...] is already
    # the unpacked order, so the final reshape is free (no copy).
    shifts = (np.arange(per_word, dtype=np.uint32) * np.uint32(bits)).reshape(
        (per_word,) + (1,) * (raw.ndim - axis - 1))
    codes = (np.expand_dims(raw, axis + 1) >> shifts) & np.uint32((1 << bits) - 1)
    return codes.reshape((*raw.shape[:axis], raw.shape[axis] * per_word, *raw.shape[axis + 1:]))


def contiguous_group(g_idx: np.ndarray, groups: int) -> int:
    """The group size when ``g_idx`` is plain consecutive groups (no act-order shuffle), so
    rows can be dequantized by broadcasting instead of gathering; 0 otherwise."""
    n = g_idx.size
    if not groups or n % groups:
        return 0
    group = n // groups
    return group if np.array_equal(g_idx, np.arange(n) // group) else 0


def dequantize_groups(
    codes: np.ndarray, zeros: np.ndarray, scales: np.ndarray, g_idx: np.ndarray, group: int
) -> np.ndarray:
    """``scales[:, g] * (codes - zeros[:, g])`` for float32 ``codes [rows, in]`` and
    ``zeros``/``scales [rows, groups]``, in place in ``codes``; consecutive groups (``group``
    > 0) by broadcasting, act-order by gathering each input's group."""
    if group:
        shaped = codes.reshape(codes.shape[0], codes.shape[1] // group, group)
        shaped -= zeros[:, :, None]
        shaped *= scales[:, :, None]
        return codes
    codes -= np.take(zeros, g_idx, axis=1)
    codes *= np.take(scales, g_idx, axis=1)
    return codes


@dataclass(frozen=True)
class GptqWeight:
    """One GPTQ linear weight: the stored parts, checked, and its float rows on demand."""

    path: Path
    name: str
    qweight: Part
    qzeros: Part
    scales: Part
    g_idx: np.ndarray
    bits: int
    zero_offset: int = 1
    """Added to stored zero points: 1 for the "v1" format AutoGPTQ writes, 0 for "v2"."""
    group: int = 0
    """Group size when ``g_idx`` is consecutive groups (see :func:`contiguous_group`)."""

    @classmethod
    def build(
        cls,
        path: Path,
        name: str,
        parts: Mapping[str, Part],
        bits: int,
        group_size: int,
        zero_offset: int = 1,
    ) -> GptqWeight:
        """Check the parts against each other (a lying shape, bit width or group size is a
        :class:`LoadError`) and fill ``g_idx`` from ``group_size`` when it is absent."""
        if bits not in SUPPORTED_BITS:
            raise LoadError(path, f"{name}: GPTQ bit width {bits} is not supported (2, 3, 4, 8)")
        for key in ("qweight", "qzeros", "scales"):
            if key not in parts or parts[key].ndim != 2:
                raise LoadError(path, f"{name}: GPTQ needs a 2-D {key}")
        qweight, qzeros, scales = parts["qweight"], parts["qzeros"], parts["scales"]
        n_in, n_out = codes_in(qweight.shape[0], bits), qweight.shape[1]
        if n_in < 0:
            raise LoadError(path, f"{name}: 3-bit GPTQ qweight rows {qweight.shape[0]} are not "
                            "whole 3-word runs")
        check_elements(path, (n_out, n_in), f"{name} (dequantized)")
        groups = scales.shape[0]
        if scales.shape[1] != n_out or qzeros.shape != (groups, words_for(n_out, bits)):
            raise LoadError(path, f"{name}: GPTQ scales/qzeros shapes do not match qweight")
        if "g_idx" in parts:
            if parts["g_idx"].shape != (n_in,):  # checked before a lying size is read
                raise LoadError(path, f"{name}: GPTQ g_idx does not index the {groups} groups")
            g_idx = np.asarray(parts["g_idx"]).astype(np.int64).reshape(-1)
        else:
            if group_size in (-1, 0):
                group_size = n_in
            if group_size <= 0:
                raise LoadError(path, f"{name}: GPTQ group size {group_size} is invalid")
            g_idx = np.arange(n_in, dtype=np.int64) // group_size
        if g_idx.shape != (n_in,) or (g_idx.size and (g_idx.min() < 0 or g_idx.max() >= groups)):
            raise LoadError(path, f"{name}: GPTQ g_idx does not index the {groups} groups")
        return cls(path, name, qweight, qzeros, scales, g_idx, bits, zero_offset,
                   contiguous_group(g_idx, groups))

    @property
    def shape(self) -> tuple[int, int]:
        """Canonical ``[out, in]`` shape of the dequantized weight."""
        return (self.qweight.shape[1], codes_in(self.qweight.shape[0], self.bits))

    @property
    def stored_type(self) -> str:
        """What was stored, for reports (``gptq-int4``)."""
        return f"gptq-int{self.bits}"

    def codes(self) -> np.ndarray:
        """The integer codes in canonical ``[out, in]`` orientation."""
        return unpack_words(self.qweight, self.bits, axis=0).T

    def zeros(self) -> np.ndarray:
        """Effective zero points ``[groups, out]`` (stored value plus ``zero_offset``)."""
        n_out = self.shape[0]
        stored = unpack_words(self.qzeros, self.bits, axis=1)[:, :n_out].astype(np.int64)
        return stored + self.zero_offset

    def window(self, start: int, stop: int) -> GptqWeight:
        """This weight with the ``qweight`` and ``scales`` columns of rows ``[start, stop)``
        read into memory (rows outside them cannot be decoded from it)."""
        return replace(self, qweight=ColumnWindow.of(self.qweight, start, stop),
                       scales=ColumnWindow.of(self.scales, start, stop))

    def rows(self, start: int, stop: int) -> np.ndarray:
        """Dequantized float32 rows (output units) ``[start, stop)``: only their columns of
        ``qweight``, ``scales`` and ``qzeros`` are unpacked, so memory is one row block."""
        # Codes come [in, rows]. Narrowed to bytes first, the transposing copy moves a quarter
        # of the memory (about 4x faster than transposing uint32), then widens to float32.
        codes = unpack_words(self.qweight[:, start:stop], self.bits, axis=0).astype(np.uint8).T
        codes = contiguous(codes, np.float32)
        zeros = contiguous(self.zeros()[:, start:stop].T, np.float32)
        scales = contiguous(np.asarray(self.scales[:, start:stop]).T, np.float32)
        return dequantize_groups(codes, zeros, scales, self.g_idx, self.group)
