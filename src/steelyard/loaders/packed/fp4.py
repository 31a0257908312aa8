"""4-bit float weights with group scales: NVFP4 and MXFP4 as compressed-tensors stores them.

From compressed-tensors' published ``pack_fp4_to_uint8`` and its NVFP4/MXFP4 compressors
(read from its source; checked against its own ``decompress`` in ``fixtures/gen_packed.py``):
``weight_packed`` is uint8 ``[out, in / 2]``, two FP4 E2M1 codes per byte, *low nibble first*
(element ``2k`` in bits 0-3, ``2k + 1`` in bits 4-7); the codes are the OCP Microscaling
(MX) FP4 E2M1 encoding, decoded here by ``ml_dtypes.float4_e2m1fn``.

* **NVFP4**: ``weight_scale`` FP8 E4M3 ``[out, in / 16]`` and ``weight_global_scale`` float32
  ``[1]``; ``W = fp4 * scale / global_scale`` per group of 16 inputs.
* **MXFP4**: ``weight_scale`` uint8 E8M0 exponents ``[out, in / 32]`` (``2^(e - 127)``, 255 is
  NaN; ``ml_dtypes.float8_e8m0fnu``), no global scale; ``W = fp4 * scale``.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from steelyard.budget import check_elements
from steelyard.errors import LoadError
from steelyard.loaders.packed.stored import Part
from steelyard.loaders.packed.unpacked import part_size


def _table() -> np.ndarray:
    import ml_dtypes

    return np.arange(16, dtype=np.uint8).view(ml_dtypes.float4_e2m1fn).astype(np.float32)


@dataclass(frozen=True)
class Fp4Weight:
    """One NVFP4 or MXFP4 weight ``[out, in]`` with its decoded group scales."""

    path: Path
    name: str
    packed: Part
    scale: np.ndarray
    """Effective float32 group scales ``[out, groups]`` (global scale already divided out)."""
    kind: str
    table: np.ndarray

    @classmethod
    def build(cls, path: Path, name: str, parts: Mapping[str, Part]) -> Fp4Weight:
        """Check shapes (before reading the scales) and decode the scales."""
        packed, scale = parts["weight_packed"], parts.get("weight_scale")
        if packed.ndim != 2 or packed.dtype != np.uint8 or scale is None or scale.ndim != 2:
            raise LoadError(path, f"{name}: FP4 needs a 2-D uint8 weight_packed and 2-D scales")
        n_out, n_in = packed.shape[0], 2 * packed.shape[1]
        check_elements(path, (n_out, n_in), f"{name} (dequantized)")
        groups = scale.shape[1]
        if scale.shape[0] != n_out or not groups or n_in % groups:
            raise LoadError(path, f"{name}: FP4 scales {list(scale.shape)} do not group "
                            f"{[n_out, n_in]}")
        if scale.dtype == np.uint8:  # E8M0 exponents: MXFP4
            import ml_dtypes

            raw = np.asarray(scale).view(ml_dtypes.float8_e8m0fnu)
            values, kind = raw.astype(np.float32), "mxfp4"
        elif "float8" in scale.dtype.name:
            values, kind = np.asarray(scale, dtype=np.float32), "nvfp4"
            glob = parts.get("weight_global_scale")
            if glob is None or part_size(glob) != 1:
                raise LoadError(path, f"{name}: NVFP4 needs one weight_global_scale")
            with np.errstate(all="ignore"):  # a zero or NaN global scale is data to report
                values = values / np.float32(np.asarray(glob, dtype=np.float32).reshape(-1)[0])
        else:
            raise LoadError(path, f"{name}: FP4 scales of dtype {scale.dtype.name} are neither "
                            "FP8 E4M3 (NVFP4) nor E8M0 (MXFP4)")
        return cls(path, name, packed, values, kind, _table())

    @property
    def shape(self) -> tuple[int, int]:
        """Canonical ``[out, in]`` shape."""
        return (int(self.packed.shape[0]), 2 * int(self.packed.shape[1]))

    @property
    def stored_type(self) -> str:
        """What was stored, for reports (``nvfp4``, ``mxfp4``)."""
        return self.kind

    def rows(self, start: int, stop: int) -> np.ndarray:
        """Dequantized float32 rows ``[start, stop)``."""
        raw = np.asarray(self.packed[start:stop])
        rows, n_in = raw.shape[0], self.shape[1]
        codes = np.empty((rows, n_in), dtype=np.uint8)
        codes[:, 0::2] = raw & 0x0F
        codes[:, 1::2] = raw >> 4
        values = np.take(self.table, codes)
        groups = self.scale.shape[1]
        shaped = values.reshape(rows, groups, n_in // groups)
        shaped *= self.scale[start:stop, :, None]
        return values
