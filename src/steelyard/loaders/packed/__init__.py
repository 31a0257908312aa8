"""Packed and quantized weights stored in safetensors files (GPTQ, AWQ, FP8 with scales, MLX grouped).

Each layout module turns the stored codes, scales and zero points into the float weight
that inference computes, in the canonical ``[out, in]`` orientation, one row block at a
time. Parameters count as logical weight elements (``out * in``), not stored words.
"""

from steelyard.loaders.packed.awq import AwqWeight
from steelyard.loaders.packed.detect import Layout, detect_layout
from steelyard.loaders.packed.fp8 import Fp8Weight
from steelyard.loaders.packed.gptq import GptqWeight
from steelyard.loaders.packed.mlx import MlxWeight

__all__ = ["AwqWeight", "Fp8Weight", "GptqWeight", "Layout", "MlxWeight", "detect_layout"]
