"""A C-contiguous copy of a strided view (a transposed or permuted weight), made in tiles.

Checkpoints often store a layer's weight in another order than the canonical ``[out, in]``:
GPT-2's Conv1D, Keras Dense and convolution kernels and many ONNX MatMul initializers are
``[in, out]``. ``numpy.ascontiguousarray`` of the transposed view writes the result in order
and reads the source across its rows, one cache line per element, and ran at 0.6-0.7 GB/s on
4096 × 1024 float32 (24-30 ms) on this project's benchmark host, against 3.3 ms when the same
copy is made in slabs whose source bytes fit in the core's cache (docs/performance.md,
"Thirteenth session"). The slabs are cut across the axis along which the source moves in the
largest steps, then, within a slab still too spread out, across the next one, and so on; each
slab is one numpy assignment, so the values are exactly those of ``ascontiguousarray``.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
from numpy.typing import DTypeLike

#: Most source bytes one slab may span: well inside a core's L2 cache (1-4 MiB on the hosts
#: measured), so every source line a slab reads is still cached when the next element of it
#: is needed. 64 rows of a 4096-wide float32 matrix.
SLAB_BYTES = 2**20


def _span(view: np.ndarray) -> int:
    """Bytes between the lowest and highest addressed element of ``view``, plus one item."""
    reach = sum(abs(stride) * (length - 1) for stride, length in zip(view.strides, view.shape, strict=True))
    return reach + view.itemsize


def _copy_into(out: np.ndarray, view: np.ndarray) -> None:
    if _span(view) <= SLAB_BYTES:
        out[...] = view
        return
    # The axis whose step in the source is the largest among those longer than one.
    axis = max(
        (a for a in range(view.ndim) if view.shape[a] > 1), key=lambda a: abs(view.strides[a])
    )
    step = max(1, SLAB_BYTES // max(1, abs(view.strides[axis])))
    if step == 1 and all(view.shape[a] == 1 for a in range(view.ndim) if a != axis):
        out[...] = view  # a single strided line: nothing to tile
        return
    lead = (slice(None),) * axis
    for start in range(0, view.shape[axis], step):
        part = (*lead, slice(start, start + step))
        _copy_into(out[part], view[part])


def contiguous(array: np.ndarray, dtype: DTypeLike | None = None) -> np.ndarray:
    """``numpy.ascontiguousarray(array, dtype)``, value for value, made in cache-sized slabs
    when ``array`` is a strided view (see the module); a C-contiguous array of that dtype is
    returned as it is."""
    target = array.dtype if dtype is None else np.dtype(dtype)
    if array.flags.c_contiguous or array.ndim < 2 or _span(array) <= SLAB_BYTES:
        return np.ascontiguousarray(array, dtype=target)
    out = np.empty(array.shape, dtype=target)
    _copy_into(out, array)
    return out


def transposed_from_parts(
    widen: Callable[[int, int, np.ndarray], None], shape: tuple[int, int], start: int, stop: int
) -> np.ndarray:
    """Columns ``[start, stop)`` of a stored ``[rows, width]`` tensor, transposed, as a
    C-contiguous float32 ``[stop − start, rows]``: ``widen(a, b, into)`` writes elements
    ``[a, b)`` of the flattened tensor as float32 into ``into``.

    The stored rows are read a slab at a time into one reused buffer and each slab is
    transposed into place while it is still in the cache, so the tensor is neither held whole
    in its stored order nor copied across a second time."""
    rows, width = shape
    out = np.empty((stop - start, rows), dtype=np.float32)
    step = max(1, min(rows, SLAB_BYTES // (4 * max(1, width))))
    scratch = np.empty((step, width), dtype=np.float32)
    for first in range(0, rows, step):
        last = min(rows, first + step)
        part = scratch[: last - first]
        widen(first * width, last * width, part.reshape(-1))
        out[:, first:last] = part[:, start:stop].T
    return out
