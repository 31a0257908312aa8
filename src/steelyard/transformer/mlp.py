"""Fused gate/up projections of gated feed-forward blocks: one layer whose first half of rows
is the gate and second half the up projection (Phi-3 ``mlp.gate_up_proj``; GGUF ``ffn_up`` with
no ``ffn_gate`` and twice the rows ``ffn_down`` reads, as llama.cpp's Phi-3 conversion stores
it). Recognised only when the down projection beside it reads exactly half of the rows, so an
ungated ``ffn_up`` (as wide as ``ffn_down``'s inputs) is never split.
"""

from __future__ import annotations

from steelyard.graph import Layer, LayerKind, UnitGroup

_PAIRS = (("gate_up_proj", "down_proj"), ("ffn_up", "ffn_down"))


def fused_gate_up(layers: tuple[Layer, ...]) -> dict[str, tuple[UnitGroup, ...]]:
    """Layer name → its gate and up halves, for every fused gate/up projection."""
    by_name = {layer.name: layer for layer in layers}
    out: dict[str, tuple[UnitGroup, ...]] = {}
    for layer in layers:
        parent, _, leaf = layer.name.rpartition(".")
        for fused, down_leaf in _PAIRS:
            if leaf != fused or layer.kind is not LayerKind.DENSE or layer.units % 2:
                continue
            down = by_name.get(f"{parent}.{down_leaf}")
            if fused == "ffn_up" and f"{parent}.ffn_gate" in by_name:
                continue
            half = layer.units // 2
            if down is not None and down.fan_in == half:
                out[layer.name] = (
                    UnitGroup("mlp", 0, "gate", "rows", 0, half, parent),
                    UnitGroup("mlp", 0, "up", "rows", half, layer.units, parent),
                )
    return out
