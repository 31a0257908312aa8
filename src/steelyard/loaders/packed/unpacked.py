"""What the layouts that keep one stored code per weight element share (FP8, LLM.int8,
compressed-tensors int-quantized): the weight part is ``[out, in]`` as stored, so its shape is
the canonical one and a row block's codes are one read of its rows."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from steelyard.loaders.packed.stored import Part
from steelyard.streaming import convert_into


def part_size(part: Part) -> int:
    """Elements of ``part`` from its shape alone (nothing is read, so a size can be checked
    before a lying part is loaded); a scalar counts one."""
    return int(np.prod(part.shape, dtype=np.int64)) if part.shape else 1


@dataclass(frozen=True)
class UnpackedWeight:
    """A weight stored unpacked ``[out, in]``; each layout adds its scales and ``rows``."""

    path: Path
    name: str
    weight: Part

    @property
    def shape(self) -> tuple[int, int]:
        """Canonical ``[out, in]`` shape."""
        return (int(self.weight.shape[0]), int(self.weight.shape[1]))

    def codes(self, start: int, stop: int) -> np.ndarray:
        """Rows ``[start, stop)`` of the stored codes as float32 (a fresh, writable copy;
        float8 widened from its bit patterns, :func:`steelyard.streaming.convert_into`)."""
        stored = np.asarray(self.weight[start:stop])
        out = np.empty(stored.shape, dtype=np.float32)
        convert_into(stored, out)
        return out
