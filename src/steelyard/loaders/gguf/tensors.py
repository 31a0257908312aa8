"""Lazy readers for GGUF tensors: plain types as stored, block-quantized types dequantized.

A quantized tensor is exposed as what inference computes from it: float32 values, produced by
``gguf.quants.dequantize`` on the blocks that cover the requested elements, read from the file
with positional reads (never the whole file, never more than one bounded run of blocks at a
time). A row of a GGUF tensor is a whole number of blocks (32, 64, 128 or 256 elements), so
flattened element ``i`` is in block ``i // block_size`` and any span can be served from the
blocks around it. The tensor's ``dtype`` is then ``f32``, the type ``read_span`` returns, so
the audit streams it row block by row block like any float32 tensor; the stored ggml type is
named in the checkpoint's notes.
"""

from __future__ import annotations

from collections.abc import Callable
from functools import cache
from pathlib import Path

import numpy as np

from steelyard import budget
from steelyard.dtypes import FLOAT_DTYPES
from steelyard.errors import LoadError
from steelyard.graph import Tensor, TensorRole
from steelyard.loaders.base import float32_tensor, read_exactly
from steelyard.loaders.conventions import role_for
from steelyard.loaders.gguf.header import Header, TensorInfo

#: ggml types stored as plain elements: type id → (our dtype name, numpy dtype); bf16's dtype
#: comes from ml_dtypes, whose import costs about a second, so it is looked up when used.
PLAIN: dict[int, tuple[str, np.dtype[np.generic] | None]] = {
    0: ("f32", np.dtype("<f4")),
    1: ("f16", np.dtype("<f2")),
    30: ("bf16", None),
    28: ("f64", np.dtype("<f8")),
    24: ("i8", np.dtype("<i1")),
    25: ("i16", np.dtype("<i2")),
    26: ("i32", np.dtype("<i4")),
    27: ("i64", np.dtype("<i8")),
}
_FLOATS = {0, 1, 28, 30}
#: Elements dequantized per call: bounds the package's temporaries (a few float32 copies).
_STEP = 2**18


def type_name(type_id: int) -> str:
    """The ggml type's name as the gguf package spells it (``Q4_K``)."""
    from gguf.constants import GGMLQuantizationType

    return GGMLQuantizationType(type_id).name


@cache
def can_dequantize(type_id: int) -> bool:
    """Whether the installed gguf package dequantizes this block type (asked, not assumed)."""
    from gguf.constants import GGML_QUANT_SIZES, GGMLQuantizationType
    from gguf.quants import dequantize

    kind = GGMLQuantizationType(type_id)
    try:
        dequantize(np.zeros((1, GGML_QUANT_SIZES[kind][1]), dtype=np.uint8), kind)
    except NotImplementedError:
        return False
    return True


class DataFile:
    """Positional reads from the data section of one GGUF file."""

    def __init__(self, path: Path, header: Header) -> None:
        self.path = path
        self.start = header.data_start

    def read(self, offset: int, count: int) -> np.ndarray:
        """``count`` bytes at ``offset`` of the data section, as uint8.

        A private file object per call keeps concurrent reads from several threads safe, and
        positional reads (not a memory map) keep pages that were read out of the resident set.
        """
        buffer = np.empty(count, dtype=np.uint8)
        short = "ended before the tensor data its header describes"
        read_exactly(self.path, self.start + offset, buffer, short)
        return buffer


def make_tensor(data: DataFile, info: TensorInfo) -> Tensor:
    """The lazily read :class:`Tensor` for one tensor info."""
    shape = info.shape
    if info.type_id in PLAIN:
        name, stored = PLAIN[info.type_id]
        # bf16's numpy type (ml_dtypes) is looked up only when a tensor is read as stored; the
        # audit widens bf16 from its bit patterns instead (Tensor.read_bits).
        dtype: Callable[[], np.dtype[np.generic]] = (
            (lambda: FLOAT_DTYPES[name]) if stored is None else (lambda: stored)
        )
        return Tensor(
            name=info.name,
            shape=shape,
            dtype=name,
            role=role_for(info.name, info.type_id in _FLOATS),
            reader=_plain_reader(data, info, dtype),
            read_span=_plain_span(data, info, dtype),
            read_bits=_plain_span(data, info, lambda: np.dtype("<u2")) if name == "bf16" else None,
        )
    if not can_dequantize(info.type_id):
        return Tensor(
            name=info.name,
            shape=shape,
            dtype=type_name(info.type_id).lower(),
            role=TensorRole.QUANTIZED,
            reader=_refuse(data.path, info),
        )
    return float32_tensor(
        info.name,
        shape,
        TensorRole.PARAMETER,
        _dequantized_reader(data, info),
        _dequantized_span(data, info),
        type_name(info.type_id),
        fill_span=_dequantized_fill(data, info),
    )


def _plain_span(
    data: DataFile, info: TensorInfo, dtype_of: Callable[[], np.dtype[np.generic]]
) -> Callable[[int, int], np.ndarray]:
    def read_span(start: int, stop: int) -> np.ndarray:
        dtype = dtype_of()
        start, stop = max(0, start), min(info.elements, stop)
        if stop <= start:
            return np.empty(0, dtype=dtype)
        raw = data.read(info.offset + start * dtype.itemsize, (stop - start) * dtype.itemsize)
        return raw.view(dtype)

    return read_span


def _plain_reader(
    data: DataFile, info: TensorInfo, dtype_of: Callable[[], np.dtype[np.generic]]
) -> Callable[[], np.ndarray]:
    def read() -> np.ndarray:
        return data.read(info.offset, info.nbytes).view(dtype_of()).reshape(info.shape)

    return read


def _dequantized_fill(data: DataFile, info: TensorInfo) -> Callable[[int, int, np.ndarray], None]:
    """Dequantize elements ``[start, stop)`` straight into a float32 ``out`` of that size
    (``Tensor.fill_span``: no second copy through a fresh array)."""
    from gguf.constants import GGML_QUANT_SIZES, GGMLQuantizationType
    from gguf.quants import dequantize

    kind = GGMLQuantizationType(info.type_id)
    block, type_size = GGML_QUANT_SIZES[kind]
    step = max(1, _STEP // block)

    def fill_span(start: int, stop: int, out: np.ndarray) -> None:
        start, stop = max(0, start), min(info.elements, stop)
        if stop <= start:
            return
        flat = out.reshape(-1)
        first, last = start // block, -(-stop // block)
        for a in range(first, last, step):
            b = min(last, a + step)
            raw = data.read(info.offset + a * type_size, (b - a) * type_size)
            # A NaN or Inf scale is data the audit reports, not a warning to print.
            with np.errstate(all="ignore"):
                values = np.asarray(dequantize(raw.reshape(1, -1), kind), dtype=np.float32)
            values = values.reshape(-1)
            lo, hi = max(start, a * block), min(stop, b * block)
            flat[lo - start : hi - start] = values[lo - a * block : hi - a * block]

    return fill_span


def _dequantized_span(data: DataFile, info: TensorInfo) -> Callable[[int, int], np.ndarray]:
    fill = _dequantized_fill(data, info)

    def read_span(start: int, stop: int) -> np.ndarray:
        out = np.empty(max(0, min(info.elements, stop) - max(0, start)), dtype=np.float32)
        fill(start, stop, out)
        return out

    return read_span


def _dequantized_reader(data: DataFile, info: TensorInfo) -> Callable[[], np.ndarray]:
    span = _dequantized_span(data, info)

    def read() -> np.ndarray:
        # A whole quantized tensor in float32 is bytes the file does not store.
        budget.check_expansion(
            data.path, 4 * info.elements, info.nbytes, f"tensor {info.name!r} dequantized"
        )
        return span(0, info.elements).reshape(info.shape)

    return read


def _refuse(path: Path, info: TensorInfo) -> Callable[[], np.ndarray]:
    def read() -> np.ndarray:
        raise LoadError(
            path,
            f"tensor {info.name!r} is {type_name(info.type_id)}, which the installed gguf "
            "package cannot dequantize",
        )

    return read
