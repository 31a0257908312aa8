"""Packed and quantized weights stored in safetensors files: GPTQ, AWQ, bitsandbytes (NF4/FP4
and LLM.int8), FP8 with scales, MLX grouped, compressed-tensors pack- and int-quantized.

Each layout module turns the stored codes, scales and zero points into the float weight
that inference computes, in the canonical ``[out, in]`` orientation, one row block at a
time. :func:`~steelyard.loaders.packed.assemble.unpack_checkpoint` (called by the safetensors
loader) replaces each packed layer's parts with one logical ``f32`` tensor carrying its
``stored_type``. Parameters count as logical weight elements (``out * in``), not stored words.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from steelyard.lazy_exports import attribute_loader

if TYPE_CHECKING:
    from steelyard.loaders.packed.awq import AwqWeight
    from steelyard.loaders.packed.bnb import Bnb4Weight, Bnb8Weight
    from steelyard.loaders.packed.compressed import IntQuantizedWeight, PackQuantizedWeight
    from steelyard.loaders.packed.detect import Layout, detect_layout
    from steelyard.loaders.packed.fp8 import Fp8Weight
    from steelyard.loaders.packed.gptq import GptqWeight
    from steelyard.loaders.packed.mlx import MlxWeight

#: Public name -> the module defining it, imported on first use (PEP 562): every safetensors
#: file passes through ``assemble``, and a float one needs none of the layout modules (about
#: 15 ms of a 5,000-parameter audit's start-up on the benchmark host).
_HOMES = {
    "AwqWeight": "awq",
    "Bnb4Weight": "bnb",
    "Bnb8Weight": "bnb",
    "Fp8Weight": "fp8",
    "GptqWeight": "gptq",
    "IntQuantizedWeight": "compressed",
    "Layout": "detect",
    "MlxWeight": "mlx",
    "PackQuantizedWeight": "compressed",
    "detect_layout": "detect",
}


__getattr__ = attribute_loader(__name__, _HOMES)
# Literal, so that linters and type checkers see the re-exports (tests check it equals _HOMES).
__all__ = [
    "AwqWeight",
    "Bnb4Weight",
    "Bnb8Weight",
    "Fp8Weight",
    "GptqWeight",
    "IntQuantizedWeight",
    "Layout",
    "MlxWeight",
    "PackQuantizedWeight",
    "detect_layout",
]
