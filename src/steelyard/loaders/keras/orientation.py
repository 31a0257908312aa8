"""Keras kernels in canonical orientation ``[out, in/groups, *kernel]``: Dense ``[in, out]``,
Conv ``[k…, in/g, out]``, ConvTranspose ``[k…, out, in]``, DepthwiseConv ``[k…, C, dm]``
(channel ``c·dm+m``) and one gate's columns of a recurrent kernel ``[in, G·H]``; and
:class:`View`, a tensor read through one of them."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from functools import partial

import numpy as np

from steelyard.graph import Tensor
from steelyard.tiled_copy import contiguous


@dataclass(frozen=True)
class View:
    """A tensor read as float32 and brought into canonical orientation.

    A class rather than a closure so that checkpoints built in the HDF5 child process can be
    pickled back to the parent."""

    tensor: Tensor
    transform: Callable[[np.ndarray], np.ndarray]

    def __call__(self) -> np.ndarray:
        return contiguous(self.transform(self.tensor.read_float32()), np.float32)


def float_view(tensor: Tensor, transform: Callable[[np.ndarray], np.ndarray]) -> View:
    """``tensor`` read through ``transform`` (a picklable :class:`View`)."""
    return View(tensor, transform)


def same(array: np.ndarray) -> np.ndarray:
    """The stored orientation is canonical."""
    return array


def _gate(kernel: np.ndarray, columns: slice) -> np.ndarray:
    return np.asarray(kernel[:, columns].T)


def _gate_bias(bias: np.ndarray, columns: slice, row: int) -> np.ndarray:
    return np.asarray(bias[columns] if row == -1 else bias[row, columns])


def gate_columns(columns: slice) -> Callable[[np.ndarray], np.ndarray]:
    """One gate of a recurrent kernel ``[in, G·H]`` → ``[H, in]``."""
    return partial(_gate, columns=columns)


def bias_slice(columns: slice, row: int) -> Callable[[np.ndarray], np.ndarray]:
    """One gate of a recurrent bias: ``[G·H]`` (row -1) or row ``row`` of ``[2, G·H]``."""
    return partial(_gate_bias, columns=columns, row=row)


def dense_canonical(kernel: np.ndarray) -> np.ndarray:
    """Dense ``[in, out]`` → ``[out, in]``."""
    return kernel.T


def conv_canonical(kernel: np.ndarray) -> np.ndarray:
    """Conv ``[k…, in/g, out]`` → ``[out, in/g, k…]``."""
    n = kernel.ndim
    return np.transpose(kernel, (n - 1, n - 2, *range(n - 2)))


def conv_transpose_canonical(kernel: np.ndarray) -> np.ndarray:
    """ConvTranspose ``[k…, out, in]`` → ``[out, in, k…]`` (rows are output channels)."""
    n = kernel.ndim
    return np.transpose(kernel, (n - 2, n - 1, *range(n - 2)))


def depthwise_canonical(kernel: np.ndarray) -> np.ndarray:
    """DepthwiseConv ``[k…, C, dm]`` → ``[C·dm, 1, k…]``, channel ``c·dm + m``."""
    spatial = kernel.shape[:-2]
    flat = kernel.reshape(*spatial, kernel.shape[-2] * kernel.shape[-1])
    return np.moveaxis(flat, -1, 0)[:, None, ...]
