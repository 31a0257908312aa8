"""FP8 weights with scales: per tensor, per output channel, or per ``block x block`` tile.

Inference computes ``W = float(w_fp8) * s`` where ``s`` is the tile's scale. Checkpoints name
it ``weight_scale`` (a multiplier, per tensor ``[]``/``[1]`` or per channel ``[out]``/
``[out, 1]``) or ``weight_scale_inv`` (per 128x128 block ``[ceil(out/128), ceil(in/128)]``;
despite the name it is also multiplied: it is the inverse of the quantizer's scale).
The e4m3/e5m2 bytes are decoded by ``ml_dtypes`` (the reference for those encodings).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from steelyard.errors import LoadError
from steelyard.loaders.packed.stored import Part
from steelyard.loaders.packed.unpacked import UnpackedWeight, part_size


@dataclass(frozen=True)
class Fp8Weight(UnpackedWeight):
    """One FP8 weight ``[out, in]`` (float32 rows through ``weight``) and its scales."""

    scale: np.ndarray
    block: tuple[int, int] | None

    @classmethod
    def build(
        cls, path: Path, name: str, weight: Part, scale: Part,
        block: tuple[int, int] | None = None,
    ) -> Fp8Weight:
        """Tell the scale's granularity from its shape; a shape that fits none is refused."""
        if weight.ndim != 2:
            raise LoadError(path, f"{name}: an FP8 weight must be 2-D")
        n_out, n_in = weight.shape
        # Shapes are checked before the scale is read, so a huge lying scale is never loaded.
        size = part_size(scale)
        if block is not None:
            bo, bi = block
            if bo <= 0 or bi <= 0 or tuple(scale.shape) != (-(-n_out // bo), -(-n_in // bi)):
                raise LoadError(path, f"{name}: FP8 block scales {list(scale.shape)} do not "
                                f"tile {[n_out, n_in]} in {bo}x{bi} blocks")
            values = np.asarray(scale, dtype=np.float32)
        elif size == 1:
            values = np.asarray(scale, dtype=np.float32).reshape(1, 1)
        elif size == n_out and scale.ndim in (1, 2):
            values = np.asarray(scale, dtype=np.float32).reshape(n_out, 1)
        else:
            raise LoadError(path, f"{name}: FP8 scale shape {list(scale.shape)} fits neither "
                            f"one scale nor one per output channel of {n_out}")
        return cls(path, name, weight, values, block)

    @property
    def granularity(self) -> str:
        """``tensor``, ``channel`` or ``block``: reported as part of the stored type."""
        if self.block is not None:
            return "block"
        return "tensor" if self.scale.shape == (1, 1) else "channel"

    @property
    def stored_type(self) -> str:
        """What was stored, for reports (``fp8-e4m3-block``)."""
        kind = "e5m2" if "e5m2" in self.weight.dtype.name else "e4m3"
        return f"fp8-{kind}-{self.granularity}"

    def rows(self, start: int, stop: int) -> np.ndarray:
        """Dequantized float32 rows ``[start, stop)``."""
        values = self.codes(start, stop)  # scaled in place below
        if self.block is None:
            scale = self.scale if self.scale.shape[0] == 1 else self.scale[start:stop]
            return values * scale
        bo, bi = self.block
        per_row = self.scale[np.arange(start, stop) // bo]  # [rows, column blocks]
        if bi < 32:  # narrow tiles (tests, odd files): one broadcast scale matrix
            values *= np.repeat(per_row, bi, axis=1)[:, : values.shape[1]]
            return values
        for j in range(per_row.shape[1]):  # wide tiles: scale each column block in place
            values[:, j * bi : (j + 1) * bi] *= per_row[:, j : j + 1]
        return values
