"""The ``steelyard.layers/1`` document: what a checkpoint holds, as plain data."""

from __future__ import annotations

from typing import Any

from steelyard.coverage import coverage_document, coverage_of
from steelyard.graph import Checkpoint, Layer

LAYERS_SCHEMA = "steelyard.layers/1"


def checkpoint_block(checkpoint: Checkpoint) -> dict[str, Any]:
    """The ``checkpoint`` object shared by every JSON document."""
    counted = checkpoint.counted
    return {
        "path": checkpoint.path,
        "format": checkpoint.format.value,
        "tensors": len(counted),
        "parameters": sum(t.size for t in counted),
    }


def stored_type_of(checkpoint: Checkpoint, layer: Layer) -> str | None:
    """What the file stored for the layer's weight when it is a decoded view (``gptq-int4``,
    ``Q4_K``); None for weights stored as the floats they are."""
    tensor = checkpoint.tensors.get(layer.weight)
    return tensor.stored_type if tensor is not None else None


def layer_block(layer: Layer, stored_type: str | None = None) -> dict[str, Any]:
    """One entry of ``layers``; ``stored_type`` is added only for a decoded weight, so the
    entries of float checkpoints are unchanged."""
    block = {
        "name": layer.name,
        "kind": layer.kind.value,
        "weight": layer.weight,
        "bias": layer.bias,
        "units": layer.units,
        "fan_in": layer.fan_in,
        "groups": layer.groups,
        "kernel": list(layer.kernel),
        "activation": layer.activation.value,
        "norm": layer.norm.scale if layer.norm is not None else None,
        "inputs_from": list(layer.inputs_from),
        "linked_by": layer.linked_by.value,
    }
    if stored_type is not None:
        block["stored_type"] = stored_type
    return block


def _groups(checkpoint: Checkpoint, layer: Layer) -> list[dict[str, Any]]:
    """The layer's units or inputs grouped into attention heads or experts (an added field of
    ``steelyard.layers/1``: empty when no transformer structure was recognised)."""
    return [
        {
            "kind": g.kind,
            "index": g.index,
            "part": g.part,
            "axis": g.axis,
            "start": g.start,
            "stop": g.stop,
            "block": g.block,
        }
        for g in checkpoint.unit_groups.get(layer.name, ())
    ]


def layers_document(checkpoint: Checkpoint) -> dict[str, Any]:
    """The whole ``steelyard layers --format json`` document."""
    return {
        "schema": LAYERS_SCHEMA,
        "checkpoint": checkpoint_block(checkpoint),
        "layers": [
            {
                **layer_block(layer, stored_type_of(checkpoint, layer)),
                "unit_groups": _groups(checkpoint, layer),
            }
            for layer in checkpoint.layers
        ],
        "coverage": coverage_document(coverage_of(checkpoint)),
    }
