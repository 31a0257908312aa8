"""How an inferred layer's canonical weight ``[out, in/groups, *kernel]`` is read from the
stored tensors: as stored, transposed, one gate's rows or columns of a stacked recurrent
matrix, or the effective weight ``g·v/‖v‖`` of a weight-normalised module.

The transform's type tells the audit what it may do: a :class:`~steelyard.graph.RowSlice`
means the canonical matrix is a contiguous run of the stored tensor (streamed in row blocks);
any other callable means the audit reads the layer's ``weight_view`` whole.

Weight norm (``<m>.weight_g`` + ``<m>.weight_v``): the norm is taken over every dimension but
``dim``, read from g's shape (g keeps v's size there and 1 elsewhere; a one-element g means the
norm of the whole tensor). ``Layer.weight`` names v, ``Layer.aux`` names g.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from steelyard.graph import RowSlice, Tensor
from steelyard.loaders.layer_parts import WeightSource, weight_source
from steelyard.tiled_copy import contiguous


def float_reader(
    tensor: Tensor, transform: Callable[[np.ndarray], np.ndarray] | None = None
) -> Callable[[], np.ndarray]:
    """Read ``tensor`` as float32, through ``transform`` when given (contiguous result)."""

    def read() -> np.ndarray:
        array = tensor.read_float32()
        return contiguous(transform(array)) if transform else array

    return read


#: Stored orientation is canonical; a RowSlice (not a bare function) tells the audit so.
AS_STORED = RowSlice()


def stored_source(
    weight: Tensor,
    orient: Callable[[np.ndarray], np.ndarray],
    bias: Tensor | None = None,
    bias_rows: RowSlice | None = None,
) -> WeightSource:
    """A layer's weights read from the stored ``weight`` through ``orient`` (nothing applied
    when it is :data:`AS_STORED`), its bias from ``bias``, cut to ``bias_rows`` when given."""
    return weight_source(
        weight.name,
        float_reader(weight, None if orient is AS_STORED else orient),
        orient,
        None if bias is None else bias.name,
        None if bias is None else float_reader(bias, bias_rows),
    )


def row_slice(rows: slice) -> RowSlice:
    """A transform taking one gate's rows of a stacked recurrent matrix."""
    return RowSlice(rows.start or 0, rows.stop)


@dataclass(frozen=True, slots=True)
class SameOrientation:
    """Stored orientation is canonical, but the canonical weight is not the stored tensor
    (weight norm): a plain callable, not a RowSlice, so the audit reads ``weight_view``."""

    def __call__(self, array: np.ndarray) -> np.ndarray:
        return array


def weight_norm_dim(g: tuple[int, ...], v: tuple[int, ...]) -> int | bool | None:
    """The ``dim`` of a weight-norm pair from the shapes of g and v: an axis, None (norm of
    the whole tensor), or False when the shapes are no weight-norm pair."""
    if math.prod(g) == 1:
        return None
    if len(g) == 1 and g[0] == v[0]:
        return 0  # g saved squeezed; the default dim=0
    if len(g) != len(v):
        return False
    axes = [d for d in range(len(v)) if g[d] != 1]
    if len(axes) == 1 and g[axes[0]] == v[axes[0]]:
        return axes[0]
    return False


@dataclass(frozen=True)
class WeightNormView:
    """The effective weight ``g·v/‖v‖`` of a weight-normalised module, in canonical form.

    torch.nn.utils.weight_norm: ``w = g · v / ‖v‖`` with the norm over every dimension but
    ``dim`` (https://pytorch.org/docs/stable/generated/torch.nn.utils.weight_norm.html); the
    parametrization API computes the same (torch.nn.utils.parametrizations.weight_norm)."""

    g: Tensor
    v: Tensor
    dim: int | None
    transform: Callable[[np.ndarray], np.ndarray] | None = None

    def __call__(self) -> np.ndarray:
        v = self.v.read_float32().astype(np.float64)
        g = self.g.read_float32().astype(np.float64)
        if self.dim is None:
            norm: np.ndarray | float = float(np.sqrt(np.sum(v * v)))
            scale = g.reshape(())
        else:
            axes = tuple(d for d in range(v.ndim) if d != self.dim)
            norm = np.sqrt(np.sum(v * v, axis=axes, keepdims=True))
            shape = [1] * v.ndim
            shape[self.dim] = v.shape[self.dim]
            scale = g.reshape(shape)
        with np.errstate(divide="ignore", invalid="ignore"):
            weight = (v * (scale / norm)).astype(np.float32)
        return contiguous(self.transform(weight) if self.transform else weight)
