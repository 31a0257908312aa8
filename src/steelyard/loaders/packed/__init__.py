"""Packed and quantized weights stored in safetensors files: GPTQ, AWQ, bitsandbytes (NF4/FP4
and LLM.int8), FP8 with scales, MLX grouped, compressed-tensors pack- and int-quantized.

Each layout module turns the stored codes, scales and zero points into the float weight
that inference computes, in the canonical ``[out, in]`` orientation, one row block at a
time. :func:`~steelyard.loaders.packed.assemble.unpack_checkpoint` (called by the safetensors
loader) replaces each packed layer's parts with one logical ``f32`` tensor carrying its
``stored_type``. Parameters count as logical weight elements (``out * in``), not stored words.
"""

from steelyard.loaders.packed.awq import AwqWeight
from steelyard.loaders.packed.bnb import Bnb4Weight, Bnb8Weight
from steelyard.loaders.packed.compressed import IntQuantizedWeight, PackQuantizedWeight
from steelyard.loaders.packed.detect import Layout, detect_layout
from steelyard.loaders.packed.fp8 import Fp8Weight
from steelyard.loaders.packed.gptq import GptqWeight
from steelyard.loaders.packed.mlx import MlxWeight

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
