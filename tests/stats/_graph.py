"""Small hand-built checkpoints for the statistics tests: numpy arrays as stored tensors,
with readers that count every element they return (so tests can assert what is read)."""

from __future__ import annotations

import collections
import math
from collections.abc import Callable, Sequence

import numpy as np

from steelyard.graph import (
    Activation,
    Checkpoint,
    Format,
    Layer,
    LayerKind,
    Link,
    Norm,
    NormKind,
    RowSlice,
    Tensor,
    TensorRole,
)

#: The stored ``[out, in]`` matrix is the canonical one (streamable).
_WHOLE = RowSlice()


class Reads:
    """Elements returned per tensor name by the counting readers."""

    def __init__(self) -> None:
        self.elements: collections.Counter[str] = collections.Counter()

    def passes(self, tensor: Tensor) -> float:
        """How many times the tensor's elements were read, in whole-tensor units."""
        return self.elements[tensor.name] / max(1, tensor.size)


def stored(
    name: str, array: np.ndarray, reads: Reads, spans: bool = True, dtype: str | None = None
) -> Tensor:
    """A tensor over ``array``; ``spans`` gives it a thread-safe span reader."""
    flat = array.reshape(-1)

    def read() -> np.ndarray:
        reads.elements[name] += array.size
        return array.copy()

    def read_span(start: int, stop: int) -> np.ndarray:
        reads.elements[name] += stop - start
        return flat[start:stop].copy()

    names = {np.dtype(np.float32): "f32", np.dtype(np.float64): "f64", np.dtype(np.int8): "i8"}
    return Tensor(
        name=name,
        shape=tuple(array.shape),
        dtype=dtype or names.get(array.dtype, "f32"),
        role=TensorRole.PARAMETER,
        reader=read,
        read_span=read_span if spans else None,
    )


def dense(
    name: str,
    weight: Tensor,
    *,
    bias: Tensor | None = None,
    inputs_from: Sequence[str] = (),
    activation: Activation = Activation.RELU,
    norm: Norm | None = None,
    channels_last_inputs: bool = False,
    orient: Callable[[np.ndarray], np.ndarray] | None = _WHOLE,
) -> Layer:
    """A dense layer whose stored ``[out, in]`` weight is its canonical matrix."""
    units, fan_in = weight.shape[0], math.prod(weight.shape[1:])
    return Layer(
        name=name,
        kind=LayerKind.DENSE,
        weight=weight.name,
        bias=bias.name if bias is not None else None,
        units=units,
        in_per_group=fan_in,
        kernel=(),
        groups=1,
        activation=activation,
        weight_view=lambda: weight.read_float32().reshape(units, fan_in),
        bias_view=(lambda: bias.read_float32()) if bias is not None else None,
        orient=orient,
        norm=norm,
        inputs_from=tuple(inputs_from),
        linked_by=Link.GRAPH if inputs_from else Link.NONE,
        channels_last_inputs=channels_last_inputs,
    )


def batch_norm(prefix: str, arrays: dict[str, np.ndarray], eps: float = 1e-3) -> Norm:
    """A batch norm over ``prefix.{weight,bias,running_mean,running_var}``."""
    return Norm(
        NormKind.BATCH,
        scale=f"{prefix}.weight" if f"{prefix}.weight" in arrays else None,
        shift=f"{prefix}.bias",
        mean=f"{prefix}.running_mean",
        var=f"{prefix}.running_var",
        eps=eps,
    )


def checkpoint(tensors: Sequence[Tensor], layers: Sequence[Layer]) -> Checkpoint:
    """A checkpoint of these tensors and layers (the path is never opened)."""
    return Checkpoint(
        path="invented.safetensors",
        format=Format.SAFETENSORS,
        tensors={t.name: t for t in tensors},
        layers=tuple(layers),
        file_size=0,
    )
