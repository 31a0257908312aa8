"""compressed-tensors ``pack-quantized`` weights: ``weight_packed``, ``weight_scale``,
optional ``weight_zero_point`` and ``weight_g_idx``, and ``weight_shape``.

From the library's published ``pack_to_int32``/``unpack_from_int32`` and
``compression_param_info`` (read from its source, not run here): signed codes ``q`` in
``[-2^(b-1), 2^(b-1))`` are stored as ``q + 2^(b-1)``, packed ``32 // b`` per int32 along the
input axis, lowest bits first, rows padded, giving ``weight_packed[out, ceil(in * b / 32)]``;
``weight_shape`` holds the true ``[out, in]``; ``weight_scale`` is ``[out, groups]`` (one
column per channel, or one per group of ``group_size`` inputs; ``g_idx`` maps inputs to groups
under activation ordering); asymmetric zero points are packed the same way along the *output*
axis, ``[ceil(out * b / 32), groups]``. Inference computes ``W = (q - z) * scale``.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from steelyard.budget import check_elements
from steelyard.errors import LoadError
from steelyard.loaders.packed.gptq import unpack_words
from steelyard.loaders.packed.stored import Part
from steelyard.loaders.packed.unpacked import UnpackedWeight, part_size

SUPPORTED_BITS = (2, 4, 8)


def declared(settings: Mapping[str, Any], key: str) -> int | None:
    """The one ``key`` (``num_bits``, ``group_size``) of the config's weight schemes, if they
    agree on one integer; None when absent or when schemes differ (the shapes decide)."""
    groups = settings.get("config_groups")
    if not isinstance(groups, Mapping):
        return None
    found = {
        scheme["weights"].get(key)
        for scheme in groups.values()
        if isinstance(scheme, Mapping) and isinstance(scheme.get("weights"), Mapping)
    }
    found.discard(None)
    if len(found) == 1:
        value = found.pop()
        return value if isinstance(value, int) and not isinstance(value, bool) else None
    return None


def block_structure(settings: Mapping[str, Any]) -> object:
    """compressed-tensors' ``block_structure`` ([rows, columns] of a block scale's tile) when
    every weight scheme of the config declares the same one; None otherwise."""
    groups = settings.get("config_groups")
    if not isinstance(groups, Mapping):
        return None
    found = [
        scheme["weights"].get("block_structure")
        for scheme in groups.values()
        if isinstance(scheme, Mapping) and isinstance(scheme.get("weights"), Mapping)
    ]
    return found[0] if found and all(f == found[0] for f in found) else None


def _scale(path: Path, name: str, part: Part, dims: tuple[int, int]) -> np.ndarray:
    """``weight_scale`` as ``[1 or out, groups]`` float32; its shape is checked before it is
    read (at most one scale per weight element), so a huge lying scale is never loaded."""
    shape = tuple(part.shape)
    if part_size(part) == 1:
        return np.asarray(part, dtype=np.float32).reshape(1, 1)
    if len(shape) != 2 or shape[0] not in (1, dims[0]) or not 0 < shape[1] <= max(dims[1], 1):
        raise LoadError(path, f"{name}: weight_scale {list(shape)} is not [out, groups]")
    return np.asarray(part, dtype=np.float32)


@dataclass(frozen=True)
class PackQuantizedWeight:
    """One pack-quantized weight, checked, with float rows on demand."""

    path: Path
    name: str
    packed: Part
    scale: np.ndarray
    zero: Part | None
    g_idx: np.ndarray
    bits: int
    dims: tuple[int, int]

    @classmethod
    def build(
        cls, path: Path, name: str, parts: Mapping[str, Part], settings: Mapping[str, Any]
    ) -> PackQuantizedWeight:
        """Check the parts against ``weight_shape`` and each other; lies are LoadErrors."""
        for key in ("weight_packed", "weight_scale", "weight_shape"):
            if key not in parts:
                raise LoadError(path, f"{name}: pack-quantized weight has no {key}")
        packed = parts["weight_packed"]
        if packed.ndim != 2 or packed.dtype.itemsize != 4:
            raise LoadError(path, f"{name}: weight_packed is not a 2-D int32 tensor")
        shape = np.asarray(parts["weight_shape"]).reshape(-1) if part_size(parts["weight_shape"]) == 2 \
            else np.empty(0)
        if shape.size != 2 or shape.dtype.kind not in "iu" or (shape <= 0).any():
            raise LoadError(path, f"{name}: weight_shape is not two positive sizes")
        dims = (int(shape[0]), int(shape[1]))
        check_elements(path, dims, f"{name} (dequantized)")
        fits = [b for b in SUPPORTED_BITS if -(-dims[1] * b // 32) == packed.shape[1]]
        bits = declared(settings, "num_bits")
        if bits is None:
            bits = 4 if 4 in fits else (fits[0] if fits else 0)
        if bits not in fits or packed.shape[0] != dims[0]:
            raise LoadError(path, f"{name}: weight_packed {list(packed.shape)} does not hold "
                            f"{list(dims)} at a supported bit width {SUPPORTED_BITS}")
        scale = _scale(path, name, parts["weight_scale"], dims)
        g_idx = cls._groups(path, name, parts, settings, dims[1], scale.shape[1])
        zero = parts.get("weight_zero_point")
        if zero is not None and part_size(zero) == 0:
            raise LoadError(path, f"{name}: weight_zero_point is empty")
        if zero is not None and part_size(zero) > 1:
            packed_zero = (-(-dims[0] * bits // 32), scale.shape[1])
            if zero.shape not in (scale.shape, packed_zero):
                raise LoadError(path, f"{name}: weight_zero_point {list(zero.shape)} fits "
                                "neither the scales nor their packed form")
        return cls(path, name, packed, scale, zero, g_idx, bits, dims)

    @staticmethod
    def _groups(
        path: Path, name: str, parts: Mapping[str, Part], settings: Mapping[str, Any],
        n_in: int, groups: int,
    ) -> np.ndarray:
        if "weight_g_idx" in parts:
            if parts["weight_g_idx"].shape != (n_in,):
                raise LoadError(path, f"{name}: weight_g_idx does not have {n_in} entries")
            g_idx = np.asarray(parts["weight_g_idx"]).astype(np.int64)
            if g_idx.size and (g_idx.min() < 0 or g_idx.max() >= groups):
                raise LoadError(path, f"{name}: weight_g_idx does not index the {groups} groups")
            return g_idx
        group = declared(settings, "group_size") or (-(-n_in // groups) if groups else 0)
        if groups == 1:  # per channel: one scale column whatever the declared group
            group = max(n_in, 1)
        if group <= 0 or -(-n_in // group) != groups:
            raise LoadError(path, f"{name}: {groups} scale groups do not cover {n_in} inputs")
        return np.arange(n_in, dtype=np.int64) // group

    @property
    def shape(self) -> tuple[int, int]:
        """Canonical ``[out, in]`` shape."""
        return self.dims

    @property
    def stored_type(self) -> str:
        """What was stored, for reports."""
        return f"pack-quantized-int{self.bits}"

    def _zeros(self, start: int, stop: int) -> np.ndarray:
        offset = 1 << (self.bits - 1)
        if self.zero is None or part_size(self.zero) <= 1:
            value = 0.0 if self.zero is None else float(np.asarray(self.zero).reshape(-1)[0])
            return np.full((stop - start, self.scale.shape[1]), value, dtype=np.float32)
        if self.zero.shape == self.scale.shape:
            return np.asarray(self.zero[start:stop], dtype=np.float32)
        per = 32 // self.bits
        w0 = start // per
        words = self.zero[w0 : -(-stop // per)]
        codes = unpack_words(words, self.bits, axis=0).astype(np.float32) - offset
        return codes[start - w0 * per : stop - w0 * per]

    def rows(self, start: int, stop: int) -> np.ndarray:
        """Dequantized float32 rows ``[start, stop)``."""
        offset = 1 << (self.bits - 1)
        words = self.packed[start:stop]
        codes = unpack_words(words, self.bits, axis=1)[:, : self.dims[1]].astype(np.float32)
        codes -= offset
        scale = self.scale if self.scale.shape[0] == 1 else self.scale[start:stop]
        zeros = self._zeros(start, stop)
        return (codes - zeros[:, self.g_idx]) * scale[:, self.g_idx]


@dataclass(frozen=True)
class IntQuantizedWeight(UnpackedWeight):
    """compressed-tensors ``int-quantized``: an int8 ``weight [out, in]`` stored unpacked,
    ``weight_scale`` per tensor, channel (``[out, 1]``) or group (``[out, groups]``), optional
    ``weight_zero_point`` of the scale's shape; ``W = (q - z) * scale`` (the library's
    ``dequantize``, as for pack-quantized)."""

    scale: np.ndarray
    zero: np.ndarray
    g_idx: np.ndarray

    @classmethod
    def build(
        cls, path: Path, name: str, parts: Mapping[str, Part], settings: Mapping[str, Any]
    ) -> IntQuantizedWeight:
        """Check the scale and zero point against the weight."""
        weight = parts["weight"]
        if weight.ndim != 2 or weight.dtype != np.int8:
            raise LoadError(path, f"{name}: int-quantized weight is not a 2-D int8 tensor")
        n_out, n_in = weight.shape
        check_elements(path, (n_out, n_in), f"{name} (dequantized)")
        scale = _scale(path, name, parts["weight_scale"], (n_out, n_in))
        zero = np.zeros(scale.shape, np.float32)
        if "weight_zero_point" in parts:
            if part_size(parts["weight_zero_point"]) != scale.size:  # checked before reading
                raise LoadError(path, f"{name}: weight_zero_point does not match weight_scale")
            zero = np.asarray(parts["weight_zero_point"], dtype=np.float32).reshape(scale.shape)
        g_idx = PackQuantizedWeight._groups(path, name, parts, settings, n_in, scale.shape[1])
        return cls(path, name, weight, scale, zero, g_idx)

    @property
    def stored_type(self) -> str:
        """What was stored, for reports."""
        return "int-quantized-int8"

    def rows(self, start: int, stop: int) -> np.ndarray:
        """Dequantized float32 rows ``[start, stop)``."""
        codes = self.codes(start, stop)
        pick = slice(None) if self.scale.shape[0] == 1 else slice(start, stop)
        scale, zero = self.scale[pick][:, self.g_idx], self.zero[pick][:, self.g_idx]
        return (codes - zero) * scale
