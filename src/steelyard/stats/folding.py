"""Folding an inference-form batch norm into the layer it follows.

With a_j = γ_j/sqrt(var_j+ε), the layer followed by the norm computes the same function as
one with weights ``W'[j] = a_j·W[j]`` and bias ``b'_j = (b_j − μ_j)·a_j + β_j`` (the standard
inference-time fold; Ioffe & Szegedy 2015, §3.1).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from steelyard.graph import Layer, NormKind

#: Reads a stored tensor as float32 by name (None when absent).
TensorRead = Callable[[str], np.ndarray | None]


@dataclass(frozen=True, slots=True)
class Folded:
    """A layer's weights with an inference-form batch norm folded in."""

    matrix: np.ndarray
    """``W'[units, fan_in]`` = W·γ/sqrt(var+ε)."""
    bias: np.ndarray
    """``b'`` = (b−μ)·γ/sqrt(var+ε) + β."""
    folded: bool
    """False when no batch norm follows (then these are the raw weights)."""


def fold_scale(
    layer: Layer, read: TensorRead, dtype: type[np.floating] = np.float32
) -> np.ndarray | None:
    """a_j = γ_j/sqrt(var_j+ε) of the batch norm following ``layer``, computed in ``dtype``;
    None when there is none or its running variance is unusable (absent, or not one value per
    unit). A missing γ, or one that is not one value per unit, counts as 1.

    ``read`` is how stored tensors are read (``LayerStats.tensor``), so rules pass their
    statistics and nothing is read twice.
    """
    norm = layer.norm
    if norm is None or norm.kind is not NormKind.BATCH or norm.var is None:
        return None
    var = read(norm.var)
    if var is None or var.shape != (layer.units,):
        return None
    gamma = read(norm.scale) if norm.scale else None
    if gamma is None or gamma.shape != (layer.units,):
        gamma = np.ones(layer.units, np.float32)
    return np.asarray(gamma, dtype) / np.sqrt(
        np.maximum(np.asarray(var, dtype), 0) + norm.eps
    )


def fold_bias(
    layer: Layer, scale: np.ndarray, bias: np.ndarray | None, read: TensorRead
) -> np.ndarray:
    """b' = (b − μ)·a + β as float32 (a missing b, μ or β counts as 0)."""
    norm = layer.norm
    assert norm is not None
    zero = np.zeros(layer.units, np.float32)
    mean = read(norm.mean) if norm.mean else None
    beta = read(norm.shift) if norm.shift else None
    base = zero if bias is None else bias
    shift = zero if beta is None else beta
    mu = zero if mean is None else mean
    with np.errstate(over="ignore", invalid="ignore"):  # Inf or NaN there, as folded
        return np.asarray(((base - mu) * scale + shift).astype(np.float32))
