"""One builder per layout: settings from the config (or, where the shapes determine them, from
the tensors), then the layout's own checks in its ``build``.

Where the config is silent the shapes decide: GPTQ's bit width follows from ``qzeros``
(``ceil(out * bits / 32)`` words per row) and its group size from ``scales`` (one row per
group); AWQ is 4-bit with ``scales`` rows as groups; MLX's bits and group size are taken only
from the config, except that MLX's defaults (4 bits, groups of 64) are accepted when the
shapes fit them exactly. A declared setting that the shapes contradict is bad input.
"""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path

import numpy as np

from steelyard.errors import LoadError
from steelyard.loaders.packed.assemble import Builder, Decoder
from steelyard.loaders.packed.awq import AwqWeight
from steelyard.loaders.packed.bnb import Bnb4Weight, Bnb8Weight
from steelyard.loaders.packed.compressed import (
    IntQuantizedWeight,
    PackQuantizedWeight,
    block_structure,
)
from steelyard.loaders.packed.config import QuantConfig
from steelyard.loaders.packed.detect import Layout
from steelyard.loaders.packed.fp4 import Fp4Weight
from steelyard.loaders.packed.fp8 import Fp8Weight
from steelyard.loaders.packed.gptq import SUPPORTED_BITS, GptqWeight, codes_in, words_for
from steelyard.loaders.packed.mlx import MlxWeight
from steelyard.loaders.packed.modules import PackedModule
from steelyard.loaders.packed.stored import Part

Parts = Mapping[str, Part]


def _need(path: Path, module: PackedModule, parts: Parts, *keys: str) -> None:
    for key in keys:
        if key not in parts:
            raise LoadError(path, f"{module.prefix}: {module.layout.value} weight has no {key}")
        if key != "g_idx" and parts[key].ndim != 2:
            raise LoadError(path, f"{module.prefix}: {module.layout.value} {key} "
                            f"{list(parts[key].shape)} is not 2-D")


def _gptq_bits(path: Path, module: PackedModule, parts: Parts, declared: int | None) -> int:
    n_out, zero_words = parts["qweight"].shape[1], parts["qzeros"].shape[1]
    fits = [b for b in SUPPORTED_BITS if words_for(n_out, b) == zero_words]
    if "g_idx" in parts:
        n_in = parts["g_idx"].shape[0] if parts["g_idx"].ndim == 1 else -2
        fits = [b for b in fits if codes_in(parts["qweight"].shape[0], b) == n_in]
    if declared is not None:
        if declared not in SUPPORTED_BITS:
            raise LoadError(path, f"{module.prefix}: GPTQ bit width {declared} is not "
                            f"supported {SUPPORTED_BITS}")
        if declared not in fits:
            raise LoadError(path, f"{module.prefix}: declared {declared}-bit GPTQ does not fit "
                            f"qweight {list(parts['qweight'].shape)} and qzeros "
                            f"{list(parts['qzeros'].shape)}")
        return declared
    if not fits:
        raise LoadError(path, f"{module.prefix}: GPTQ qweight/qzeros shapes fit no supported "
                        f"bit width {SUPPORTED_BITS}")
    return 4 if 4 in fits else fits[0]


def gptq(path: Path, module: PackedModule, parts: Parts, config: QuantConfig) -> Decoder:
    """GPTQ: bits and group size declared or read from the shapes; v2 zero points."""
    _need(path, module, parts, "qweight", "qzeros", "scales")
    declared = config.integer("bits", "w_bit")
    if config.settings.get("dynamic") and declared is not None:
        # GPTQModel's per-module overrides (regular expressions, not evaluated here) may give
        # this module another width: the declared one is a default that the shapes may refute.
        n_out, words = parts["qweight"].shape[1], parts["qzeros"].shape[1]
        declared = declared if words_for(n_out, declared) == words else None
    bits = _gptq_bits(path, module, parts, declared)
    n_in = codes_in(parts["qweight"].shape[0], bits)
    groups = parts["scales"].shape[0]
    group = config.integer("group_size", "q_group_size")
    if group is None or group in (-1, 0) or (config.settings.get("dynamic") and groups and
                                            -(-n_in // group) != groups):
        group = -(-n_in // groups) if groups else 0
    if "g_idx" not in parts and (group <= 0 or -(-n_in // group) != groups):
        raise LoadError(path, f"{module.prefix}: GPTQ group size {group} over {n_in} inputs "
                        f"does not give the {groups} groups of scales")
    layout = str(config.settings.get("checkpoint_format", "gptq")).lower()
    if layout not in ("gptq", "gptq_v2"):  # marlin, bitblas...: kernel-specific repacking
        raise LoadError(path, f"{module.prefix}: GPTQ checkpoint format {layout!r} is not "
                        "supported (gptq, gptq_v2)")
    v2 = layout == "gptq_v2"
    return GptqWeight.build(path, module.prefix, parts, bits, group, zero_offset=0 if v2 else 1)


def awq(path: Path, module: PackedModule, parts: Parts, config: QuantConfig) -> Decoder:
    """AWQ GEMM: 4-bit; other kernels' layouts (gemv, marlin...) are refused."""
    _need(path, module, parts, "qweight", "qzeros", "scales")
    version = str(config.settings.get("version", "gemm")).lower()
    if version != "gemm":
        raise LoadError(path, f"{module.prefix}: AWQ version {version!r} is not supported "
                        "(gemm)")
    bits = config.integer("bits", "w_bit")
    n_in = parts["qweight"].shape[0]
    groups = parts["scales"].shape[0]
    group = config.integer("group_size", "q_group_size")
    if group is None:
        group = n_in // groups if groups else 0
    return AwqWeight.build(path, module.prefix, parts, 4 if bits is None else bits, group)


def mlx(path: Path, module: PackedModule, parts: Parts, config: QuantConfig) -> Decoder:
    """MLX grouped affine: bits and group size from the config's ``quantization``."""
    _need(path, module, parts, "weight", "scales", "biases")
    bits, group = config.mlx_for(module.prefix)
    if bits is None and group is None:
        words, groups = parts["weight"].shape[1], parts["scales"].shape[1]
        if words * 8 != groups * 64:  # 4-bit, groups of 64: MLX's defaults
            raise LoadError(path, f"{module.prefix}: MLX weight needs config.json "
                            "'quantization' bits and group_size (the shapes do not fit the "
                            "4-bit, group-64 defaults)")
        bits, group = 4, 64
    return MlxWeight.build(path, module.prefix, parts, bits or 4, group or 64)


def fp8(path: Path, module: PackedModule, parts: Parts, config: QuantConfig) -> Decoder:
    """FP8 with a per-tensor, per-channel or block scale (block size declared or 128x128)."""
    weight = parts["weight"]
    scale = parts.get("weight_scale_inv", parts.get("weight_scale"))
    if scale is None:
        raise LoadError(path, f"{module.prefix}: FP8 weight has no scale")
    block: tuple[int, int] | None = None
    n_out = weight.shape[0] if weight.ndim else 0
    per_channel = scale.size == n_out and (scale.ndim == 1 or scale.shape[-1:] == (1,))
    if scale.ndim == 2 and scale.size > 1 and not per_channel:
        declared = config.settings.get("weight_block_size", block_structure(config.settings))
        if declared is None:
            block = (128, 128)  # the one block size FP8 checkpoints with block scales use
        elif (isinstance(declared, list) and len(declared) == 2 and all(
                isinstance(d, int) and not isinstance(d, bool) for d in declared)):
            block = (declared[0], declared[1])
        else:
            raise LoadError(path, f"weight_block_size {declared!r} is not [rows, columns]")
    return Fp8Weight.build(path, module.prefix, weight, scale, block)


def bnb4(path: Path, module: PackedModule, parts: Parts, config: QuantConfig) -> Decoder:
    """bitsandbytes 4-bit: everything is in the stored quant state."""
    return Bnb4Weight.build(path, module.prefix, parts)


def bnb8(path: Path, module: PackedModule, parts: Parts, config: QuantConfig) -> Decoder:
    """bitsandbytes LLM.int8."""
    return Bnb8Weight.build(path, module.prefix, parts)


def compressed(path: Path, module: PackedModule, parts: Parts, config: QuantConfig) -> Decoder:
    """compressed-tensors ``pack-quantized`` (int32 words), or NVFP4/MXFP4 (uint8 bytes)."""
    if "weight_packed" in parts and parts["weight_packed"].dtype == np.uint8:
        return Fp4Weight.build(path, module.prefix, parts)
    return PackQuantizedWeight.build(path, module.prefix, parts, config.settings)


def int8(path: Path, module: PackedModule, parts: Parts, config: QuantConfig) -> Decoder:
    """compressed-tensors ``int-quantized`` (int8 weight stored unpacked, with scales)."""
    return IntQuantizedWeight.build(path, module.prefix, parts, config.settings)


BUILDERS: dict[Layout, Builder] = {
    Layout.GPTQ: gptq,
    Layout.AWQ: awq,
    Layout.MLX: mlx,
    Layout.FP8: fp8,
    Layout.BNB4: bnb4,
    Layout.BNB8: bnb8,
    Layout.COMPRESSED: compressed,
    Layout.INT8: int8,
}
