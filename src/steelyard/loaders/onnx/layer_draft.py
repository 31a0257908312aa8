"""A layer draft: what a node's weights say about a layer before the graph walks add its
bias, norm, activation and links (:mod:`~steelyard.loaders.onnx.loader` finishes it)."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from steelyard.dtypes import to_float32
from steelyard.graph import Activation, ColumnSlice, LayerKind, RowSlice
from steelyard.loaders.onnx.lookthrough import View
from steelyard.loaders.onnx.quantized import QuantWeight
from steelyard.loaders.onnx.stored import Node
from steelyard.tiled_copy import contiguous

Array = Callable[[], np.ndarray]


@dataclass
class Draft:
    """A layer before its bias, norm, activation and links are known."""

    node: Node
    name: str
    kind: LayerKind
    weight: View | QuantWeight
    units: int
    in_per_group: int
    kernel: tuple[int, ...]
    groups: int
    view: Array
    data: str
    """Value key of the input whose units the weights read."""
    out: str
    """Value key whose unit axis holds this layer's units (follow starts here)."""
    trailing: int = 0
    bias: str | None = None
    bias_view: Array | None = None
    want_bias: bool = True
    activation: Activation | None = None
    gate: str | None = None
    own_inputs: tuple[str, ...] | None = None
    opaque_next: bool = False
    orient: RowSlice | ColumnSlice | None = None
    """How the canonical matrix lies in the stored weight when it is a plain rearrangement
    of it (no op, cast, scale or dequantization between them); None otherwise."""


def stored_as_is(view: View | QuantWeight) -> bool:
    """Whether ``view`` is its stored tensor itself, no op looked through."""
    return (
        isinstance(view, View)
        and not view.via
        and not view.quantized
        and view.sources == (view.source,)
        and view.stored_elements < 0
    )


def f32(
    read: Array,
    transform: Callable[[np.ndarray], np.ndarray] | None = None,
    shape: tuple[int, ...] | None = None,
) -> Array:
    """``read`` as contiguous float32, through ``transform`` and reshaped to ``shape`` when
    given."""

    def view() -> np.ndarray:
        array = to_float32(np.asarray(read()))
        if transform is not None:
            array = transform(array)
        if shape is not None:
            array = array.reshape(shape)
        return contiguous(array, np.float32)

    return view
