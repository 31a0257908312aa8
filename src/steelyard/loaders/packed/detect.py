"""Which packed layout a safetensors file holds, from tensor names and the config."""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from enum import Enum


class Layout(str, Enum):
    """Packed layouts steelyard recognises (``stored_type`` prefixes in reports)."""

    GPTQ = "gptq"
    AWQ = "awq"
    FP8 = "fp8"
    MLX = "mlx"
    BNB4 = "bnb-4bit"
    BNB8 = "bnb-int8"
    COMPRESSED = "compressed-tensors"
    INT8 = "int-quantized"
    PLAIN = "plain"


def detect_layout(names: Iterable[str], quant_config: Mapping[str, object] | None) -> Layout:
    """The layout named by ``quantization_config``/``quantize_config.json`` (``quant_method``)
    or, without one, by GPTQ's tensor suffixes (``qweight`` + ``qzeros`` + ``scales``).

    AWQ shares GPTQ's suffixes but packs in another order, so only the config can tell the
    two apart; without a config the suffixes are read as GPTQ (its packing is the older one).
    """
    method = str((quant_config or {}).get("quant_method", "")).lower()
    if method == "awq":
        return Layout.AWQ
    if method == "gptq":
        return Layout.GPTQ
    if method == "fp8":
        return Layout.FP8
    if method == "compressed-tensors":
        return Layout.COMPRESSED
    if method == "bitsandbytes":
        return Layout.BNB4 if (quant_config or {}).get("load_in_4bit") else Layout.BNB8
    suffixes = {name.rsplit(".", 1)[-1] for name in names}
    if any(s.startswith("bitsandbytes__") for s in suffixes):
        return Layout.BNB4
    if "SCB" in suffixes:
        return Layout.BNB8
    if "weight_packed" in suffixes:
        return Layout.COMPRESSED
    if {"qweight", "qzeros", "scales"} <= suffixes:
        return Layout.GPTQ
    if suffixes & {"weight_scale", "weight_scale_inv"}:
        return Layout.FP8
    if {"scales", "biases"} <= suffixes:  # MLX: packed "weight" beside group scales and biases
        return Layout.MLX
    return Layout.PLAIN
