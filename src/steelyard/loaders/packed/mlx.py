"""MLX-style grouped affine quantization: ``weight`` (packed uint32), ``scales``, ``biases``.

From MLX's published ``mx.quantize`` description: each row of ``[out, in]`` is cut into groups
of ``group_size`` consecutive inputs; a code ``q`` decodes to ``scale * q + bias`` of its group;
codes are packed along the input axis as one little-endian bit stream per row (code ``k`` at
bits ``k*bits ..``; for 2, 4 and 8 bits that is ``32 // bits`` whole codes per uint32, lowest
bits first; 3, 5 and 6 bits cross words), so the stored weight is ``[out, in * bits / 32]``
and scales/biases are ``[out, in / group_size]``. Checked against ``mx.quantize`` /
``mx.dequantize`` of MLX 0.32 (CPU) in ``fixtures/gen_mlx.py``. Bits 2, 3, 4, 5, 6, 8.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from steelyard.budget import check_elements
from steelyard.errors import LoadError
from steelyard.loaders.packed.gptq import unpack_words
from steelyard.loaders.packed.stored import Part

SUPPORTED_BITS = (2, 3, 4, 5, 6, 8)


def unpack_stream(words: Part, bits: int) -> np.ndarray:
    """Codes of rows of uint32 words ``[rows, n]`` read as little-endian bit streams."""
    raw = np.ascontiguousarray(words).view(np.uint32)
    if 32 % bits == 0:
        return unpack_words(raw, bits, axis=1)
    rows = raw.shape[0]
    stream = np.unpackbits(raw.astype("<u4").view(np.uint8).reshape(rows, -1), axis=1,
                           bitorder="little")
    weights = (1 << np.arange(bits, dtype=np.uint32)).astype(np.uint32)
    return stream.reshape(rows, -1, bits).astype(np.uint32) @ weights


@dataclass(frozen=True)
class MlxWeight:
    """One MLX grouped weight, checked, with float rows on demand."""

    path: Path
    name: str
    packed: Part
    scales: Part
    biases: Part
    bits: int
    group_size: int

    @classmethod
    def build(
        cls, path: Path, name: str, parts: Mapping[str, Part], bits: int, group_size: int
    ) -> MlxWeight:
        """Check the parts against each other; lying shapes, bits or groups are LoadErrors."""
        if bits not in SUPPORTED_BITS:
            raise LoadError(path, f"{name}: MLX bit width {bits} is not supported "
                            f"{SUPPORTED_BITS}")
        for key in ("weight", "scales", "biases"):
            if key not in parts or parts[key].ndim != 2:
                raise LoadError(path, f"{name}: MLX quantization needs a 2-D {key}")
        packed = parts["weight"]
        if packed.shape[1] * 32 % bits:
            raise LoadError(path, f"{name}: MLX weight of {packed.shape[1]} words per row does "
                            f"not hold whole {bits}-bit codes")
        n_out, n_in = packed.shape[0], packed.shape[1] * 32 // bits
        check_elements(path, (n_out, n_in), f"{name} (dequantized)")
        if group_size <= 0 or n_in % group_size:
            raise LoadError(path, f"{name}: MLX group size {group_size} does not divide {n_in}")
        want = (n_out, n_in // group_size)
        if parts["scales"].shape != want or parts["biases"].shape != want:
            raise LoadError(path, f"{name}: MLX scales/biases are not {list(want)}")
        return cls(path, name, packed, parts["scales"], parts["biases"], bits, group_size)

    @property
    def shape(self) -> tuple[int, int]:
        """Canonical ``[out, in]`` shape."""
        return (int(self.packed.shape[0]), int(self.packed.shape[1]) * 32 // self.bits)

    @property
    def stored_type(self) -> str:
        """What was stored, for reports (``mlx-int4-g64``)."""
        return f"mlx-int{self.bits}-g{self.group_size}"

    def codes(self) -> np.ndarray:
        """Integer codes ``[out, in]``."""
        return unpack_stream(self.packed, self.bits)

    def rows(self, start: int, stop: int) -> np.ndarray:
        """Dequantized float32 rows ``[start, stop)``."""
        codes = unpack_stream(self.packed[start:stop], self.bits).astype(np.float32)
        scales = np.asarray(self.scales[start:stop], dtype=np.float32)
        biases = np.asarray(self.biases[start:stop], dtype=np.float32)
        rows, n_in = codes.shape
        grouped = codes.reshape(rows, n_in // self.group_size, self.group_size)
        out = grouped * scales[:, :, None] + biases[:, :, None]
        return np.ascontiguousarray(out.reshape(rows, n_in))
