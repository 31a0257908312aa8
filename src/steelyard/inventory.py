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


def layer_block(layer: Layer) -> dict[str, Any]:
    """One entry of ``layers``."""
    return {
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
            {**layer_block(layer), "unit_groups": _groups(checkpoint, layer)}
            for layer in checkpoint.layers
        ],
        "coverage": coverage_document(coverage_of(checkpoint)),
    }
