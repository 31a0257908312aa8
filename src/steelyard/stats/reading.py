"""The one way tensors are read during an audit: streamed when the loader allows it, else
under one process-wide lock.

A loader that sets ``Tensor.read_span`` promises both of its readers are safe to call from
several threads at once. Any other reader (a zip member, an HDF5 dataset: h5py itself is not
thread-safe) is called under :data:`READ_LOCK`, whichever checkpoint or sidecar it belongs
to, so per-layer rules on ``--jobs`` threads and gradient support never read such files at
the same time.
"""

from __future__ import annotations

import threading
from collections.abc import Callable
from typing import TypeVar

import numpy as np

from steelyard.graph import Layer, Tensor

T = TypeVar("T")

#: Held while reading any tensor whose loader does not declare thread-safe reads.
READ_LOCK = threading.Lock()


def locked(tensor: Tensor | None, read: Callable[[], T]) -> T:
    """Run ``read`` (which reads ``tensor``, or something a loader built over unknown
    tensors when ``tensor`` is None) under :data:`READ_LOCK` unless the tensor's loader reads
    thread-safely."""
    if tensor is not None and tensor.read_span is not None:
        return read()
    with READ_LOCK:
        return read()


def read_float32(tensor: Tensor) -> np.ndarray:
    """``tensor.read_float32()`` through the audit's read path (see :func:`locked`)."""
    return locked(tensor, tensor.read_float32)


def read_stored(tensor: Tensor) -> np.ndarray:
    """``tensor.read()`` (stored dtype and orientation) through the audit's read path."""
    return np.asarray(locked(tensor, tensor.read))


def stored_weight(tensor: Tensor | None, layer: Layer) -> np.ndarray | None:
    """``layer``'s stored weight ``tensor`` (stored dtype, e.g. quantized integers) as
    ``[units, fan_in]`` in canonical order, by the loader's ``orient``; a layer without one is
    taken as stored only when its tensor already has the canonical shape ``[units,
    in/groups, *kernel]``. None when the tensor is absent or the order is not known."""
    if tensor is None:
        return None
    canonical = (layer.units, layer.in_per_group, *layer.kernel)
    if layer.orient is None and tensor.shape not in (canonical, (layer.units, layer.fan_in)):
        return None
    stored = read_stored(tensor)
    try:
        view = np.asarray(stored if layer.orient is None else layer.orient(stored))
    except (ValueError, IndexError):
        return None
    if view.size != layer.units * layer.fan_in:
        return None
    return view.reshape(layer.units, layer.fan_in)
