"""Which stored tensors make up each packed linear weight, by module and leaf name.

Each layout leaves its own signature of leaves under the module's prefix; a module is matched
by the first signature it carries (GPTQ and AWQ share theirs, and only the declared
``quant_method`` tells them apart, see :func:`~steelyard.loaders.packed.detect.detect_layout`).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

from steelyard.graph import Tensor
from steelyard.loaders.packed.detect import Layout

_BNB_LEAVES = ("absmax", "quant_map", "nested_absmax", "nested_quant_map")


@dataclass(frozen=True)
class PackedModule:
    """One packed weight: its layout and the stored tensor behind each part."""

    prefix: str
    layout: Layout
    parts: Mapping[str, str]
    """Part key (``qweight``, ``scales``...) → stored tensor name."""

    @property
    def weight_name(self) -> str:
        """Name of the logical float weight that replaces the parts."""
        return f"{self.prefix}.weight" if self.prefix else "weight"


def _split(name: str) -> tuple[str, str]:
    module, _, leaf = name.rpartition(".")
    return module, leaf


def _present(leaves: Mapping[str, Tensor], prefix: str, keys: tuple[str, ...]) -> dict[str, str]:
    return {key: f"{prefix}.{key}" if prefix else key for key in keys if key in leaves}


def find_packed(tensors: Mapping[str, Tensor], qweight_layout: Layout) -> list[PackedModule]:
    """Every packed weight among ``tensors``, in the order their first part appears."""
    modules: dict[str, dict[str, Tensor]] = {}
    for name, tensor in tensors.items():
        module, leaf = _split(name)
        modules.setdefault(module, {})[leaf] = tensor
    found: list[PackedModule] = []
    for prefix, leaves in modules.items():
        match = _match(prefix, leaves, modules, qweight_layout)
        if match is not None:
            found.append(match)
    return found


def _match(
    prefix: str,
    leaves: Mapping[str, Tensor],
    modules: Mapping[str, Mapping[str, Tensor]],
    qweight_layout: Layout,
) -> PackedModule | None:
    weight = leaves.get("weight")
    if "qweight" in leaves:
        layout = Layout.AWQ if qweight_layout is Layout.AWQ else Layout.GPTQ
        keys: tuple[str, ...] = ("qweight", "qzeros", "scales", "g_idx")
        return PackedModule(prefix, layout, _present(leaves, prefix, keys))
    if "weight_packed" in leaves:
        keys = ("weight_packed", "weight_scale", "weight_zero_point", "weight_shape",
                "weight_g_idx", "weight_global_scale", "input_global_scale")
        return PackedModule(prefix, Layout.COMPRESSED, _present(leaves, prefix, keys))
    if weight is None:
        return None
    base = f"{prefix}.weight" if prefix else "weight"
    # bitsandbytes 4-bit: <m>.weight.absmax ... and <m>.weight.quant_state.bitsandbytes__nf4
    state = [k for k in modules.get(f"{base}.quant_state", {}) if k.startswith("bitsandbytes__")]
    if state:
        inner = modules.get(base, {})
        parts = {"weight": base}
        parts.update({key: f"{base}.{key}" for key in _BNB_LEAVES if key in inner})
        parts.update({f"quant_state.{key}": f"{base}.quant_state.{key}" for key in state})
        return PackedModule(prefix, Layout.BNB4, parts)
    if "SCB" in leaves and weight.dtype == "i8":
        return PackedModule(prefix, Layout.BNB8,
                            _present(leaves, prefix, ("weight", "SCB", "weight_format")))
    if weight.dtype == "u32" and "scales" in leaves and "biases" in leaves:
        return PackedModule(prefix, Layout.MLX,
                            _present(leaves, prefix, ("weight", "scales", "biases")))
    if weight.dtype == "i8" and "weight_scale" in leaves:  # compressed-tensors int-quantized
        keys = ("weight", "weight_scale", "weight_zero_point", "weight_g_idx", "input_scale",
                "input_zero_point")
        return PackedModule(prefix, Layout.INT8, _present(leaves, prefix, keys))
    if weight.dtype.startswith("f8") and ("weight_scale" in leaves or
                                          "weight_scale_inv" in leaves):
        keys = ("weight", "weight_scale", "weight_scale_inv", "input_scale")
        return PackedModule(prefix, Layout.FP8, _present(leaves, prefix, keys))
    return None


__all__ = ["PackedModule", "find_packed"]
