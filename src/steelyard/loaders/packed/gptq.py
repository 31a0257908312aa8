"""GPTQ-style packed linear weights: ``qweight``, ``qzeros``, ``scales``, optional ``g_idx``.

Packing (as AutoGPTQ's ``QuantLinear.pack`` writes it; recalled from its published source,
not run here): the integer codes ``q[in, out]`` are packed along the input axis,
``32 // bits`` codes per little-endian int32 word, lowest bits first, giving
``qweight[in * bits / 32, out]``; zero points are packed the same way along the output axis,
``qzeros[groups, out * bits / 32]``, stored minus one (the "v1" checkpoint format, so the
reader adds one back); ``scales[groups, out]``; ``g_idx[in]`` names each input channel's
group (act-order shuffles it; without it channel ``i`` is in group ``i // group_size``).
Inference computes ``W[o, i] = scales[g, o] * (q[i, o] - (z[g, o] + 1))`` with ``g = g_idx[i]``.
3-bit packing crosses word boundaries and is refused until it is implemented.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from steelyard.budget import check_elements
from steelyard.errors import LoadError
from steelyard.loaders.packed.stored import Part

SUPPORTED_BITS = (2, 4, 8)


def unpack_words(words: Part, bits: int, axis: int) -> np.ndarray:
    """Codes packed ``32 // bits`` per int32 word along ``axis``, lowest bits first."""
    per_word = 32 // bits
    raw = np.ascontiguousarray(words).view(np.uint32)
    shifts = np.arange(per_word, dtype=np.uint32) * np.uint32(bits)
    mask = np.uint32((1 << bits) - 1)
    moved = np.moveaxis(raw, axis, -1)
    codes = (moved[..., None] >> shifts) & mask
    codes = codes.reshape(*moved.shape[:-1], moved.shape[-1] * per_word)
    return np.moveaxis(codes, -1, axis)


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
            raise LoadError(path, f"{name}: GPTQ bit width {bits} is not supported (2, 4, 8)")
        for key in ("qweight", "qzeros", "scales"):
            if key not in parts or parts[key].ndim != 2:
                raise LoadError(path, f"{name}: GPTQ needs a 2-D {key}")
        qweight, qzeros, scales = parts["qweight"], parts["qzeros"], parts["scales"]
        per_word = 32 // bits
        n_in, n_out = qweight.shape[0] * per_word, qweight.shape[1]
        check_elements(path, (n_out, n_in), f"{name} (dequantized)")
        groups = scales.shape[0]
        if scales.shape[1] != n_out or qzeros.shape != (groups, -(-n_out // per_word)):
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
        return cls(path, name, qweight, qzeros, scales, g_idx, bits, zero_offset)

    @property
    def shape(self) -> tuple[int, int]:
        """Canonical ``[out, in]`` shape of the dequantized weight."""
        return (self.qweight.shape[1], self.qweight.shape[0] * (32 // self.bits))

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

    def rows(self, start: int, stop: int) -> np.ndarray:
        """Dequantized float32 rows (output units) ``[start, stop)``: only their columns of
        ``qweight``, ``scales`` and ``qzeros`` are unpacked, so memory is one row block."""
        codes = unpack_words(self.qweight[:, start:stop], self.bits, axis=0).astype(np.float32)
        zeros = self.zeros()[:, start:stop].astype(np.float32)
        scales = np.asarray(self.scales[:, start:stop], dtype=np.float32)
        g = self.g_idx
        return np.ascontiguousarray((scales[g] * (codes - zeros[g])).T)
