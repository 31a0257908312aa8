"""ONNX stored tensors and nodes: element types, lazy decoding, Constant values.

A tensor's bytes are never copied at load time: ``raw_data`` payloads were replaced by file
offsets (:mod:`steelyard.loaders.onnx.wire`), and every tensor, in the model file or in
external data, is read by positioned reads when asked for (:mod:`.file_bytes`).
Every claim of a TensorProto (type, shape, byte ranges) is checked before a byte is viewed.
"""

from __future__ import annotations

import functools
import math
import struct
import sys
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from steelyard import budget
from steelyard.errors import LoadError
from steelyard.loaders.onnx.file_bytes import FileBytes
from steelyard.loaders.onnx.wire import MARK, MARK_LEN

#: Highest tensor rank accepted (ONNX itself has no limit; real models stay under 10).
MAX_RANK = 32


def text(value: Any) -> str:
    """A protobuf string field as ``str``.

    The protobuf runtime hands back ``bytes`` for a string field that is not valid UTF-8;
    such bytes are kept distinct (and printable) with backslash escapes.
    """
    if isinstance(value, str):
        return value
    return bytes(value).decode("utf-8", "backslashreplace")


@dataclass(frozen=True)
class DType:
    """One ONNX element type."""

    code: int
    name: str
    """Short name used in reports (as in :mod:`steelyard.dtypes` where it exists)."""
    np: np.dtype[Any]
    bits: int
    is_float: bool


#: (code, name, numpy type, bits, is_float) of each ONNX element type.
_Row = tuple[int, str, Any, int, bool]
_PLAIN: tuple[_Row, ...] = (
    (1, "f32", np.float32, 32, True),
    (2, "u8", np.uint8, 8, False),
    (3, "i8", np.int8, 8, False),
    (4, "u16", np.uint16, 16, False),
    (5, "i16", np.int16, 16, False),
    (6, "i32", np.int32, 32, False),
    (7, "i64", np.int64, 64, False),
    (9, "bool", np.bool_, 8, False),
    (10, "f16", np.float16, 16, True),
    (11, "f64", np.float64, 64, True),
    (12, "u32", np.uint32, 32, False),
    (13, "u64", np.uint64, 64, False),
    # Complex tensors are not real-valued weights a rule could read: kept as bookkeeping.
    (14, "c64", np.complex64, 64, False),
    (15, "c128", np.complex128, 128, False),
)
#: ONNX codes of the types only ml_dtypes defines (bf16, fp8, the sub-byte and fp6 types).
_EXTENDED_CODES = range(16, 29)


def _table(rows: Iterable[_Row]) -> dict[int, DType]:
    return {
        code: DType(code, name, np.dtype(kind), bits, is_float)
        for code, name, kind, bits, is_float in rows
        if kind is not None
    }


@functools.cache
def _plain_table() -> dict[int, DType]:
    return _table(_PLAIN)


@functools.cache
def _extended_table() -> dict[int, DType]:
    # Built when a tensor of one of these types is met: ml_dtypes took about a second to
    # import on the benchmark host, which a float32 or float16 ONNX file should not pay.
    import ml_dtypes

    return _table(
        (
            (16, "bf16", ml_dtypes.bfloat16, 16, True),
            (17, "f8_e4m3", ml_dtypes.float8_e4m3fn, 8, True),
            (18, "f8_e4m3fnuz", ml_dtypes.float8_e4m3fnuz, 8, True),
            (19, "f8_e5m2", ml_dtypes.float8_e5m2, 8, True),
            (20, "f8_e5m2fnuz", ml_dtypes.float8_e5m2fnuz, 8, True),
            (21, "u4", getattr(ml_dtypes, "uint4", None), 4, False),
            (22, "i4", getattr(ml_dtypes, "int4", None), 4, False),
            (23, "f4_e2m1", getattr(ml_dtypes, "float4_e2m1fn", None), 4, True),
            (24, "f8_e8m0", getattr(ml_dtypes, "float8_e8m0fnu", None), 8, True),
            (25, "u2", getattr(ml_dtypes, "uint2", None), 2, False),
            (26, "i2", getattr(ml_dtypes, "int2", None), 2, False),
            (27, "f6_e2m3", getattr(ml_dtypes, "float6_e2m3fn", None), 6, True),
            (28, "f6_e3m2", getattr(ml_dtypes, "float6_e3m2fn", None), 6, True),
        )
    )


STRING_CODE = 8


def dtype_of(code: int) -> DType | None:
    """The element type for an ONNX ``data_type`` code, None when not numeric or unknown."""
    if code in _EXTENDED_CODES:
        return _extended_table().get(code)
    return _plain_table().get(code)


def packed_bytes(dtype: DType, count: int) -> int:
    """Bytes ``count`` elements take in ``raw_data`` (sub-byte types are packed)."""
    return -(-count * dtype.bits // 8)


def _unpack(data: np.ndarray, dtype: DType, count: int) -> np.ndarray:
    """Sub-byte elements (low bits first) from packed bytes, as ``dtype`` values."""
    data = data.astype(np.uint8, copy=False)
    if dtype.bits == 4:
        out = np.empty(data.size * 2, dtype=np.uint8)
        out[0::2] = data & 0x0F
        out[1::2] = data >> 4
    elif dtype.bits == 2:
        out = np.empty(data.size * 4, dtype=np.uint8)
        for slot in range(4):
            out[slot::4] = (data >> (2 * slot)) & 0x03
    else:  # 6 bits: four elements in every three bytes, low bits first
        groups = -(-count // 4)
        padded = np.zeros(groups * 3, dtype=np.uint8)
        padded[: data.size] = data[: groups * 3]
        b0, b1, b2 = padded[0::3], padded[1::3], padded[2::3]
        out = np.empty((groups, 4), dtype=np.uint8)
        out[:, 0] = b0 & 0x3F
        out[:, 1] = (b0 >> 6) | ((b1 & 0x0F) << 2)
        out[:, 2] = (b1 >> 4) | ((b2 & 0x03) << 4)
        out[:, 3] = b2 >> 2
        out = out.reshape(-1)
    return out[:count].view(dtype.np)


@dataclass(frozen=True)
class Stored:
    """One tensor as stored in the file (not yet a :class:`~steelyard.graph.Tensor`)."""

    key: str
    shape: tuple[int, ...]
    dtype: DType
    reader: Callable[[], np.ndarray] = field(repr=False)
    span: Callable[[int, int], np.ndarray] | None = field(default=None, repr=False)
    """Elements ``[start, stop)`` of the flattened tensor, for bytes at a known place of a
    file in a whole-byte type (``Tensor.read_span``: the audit then streams the tensor)."""
    fill: Callable[[int, int, np.ndarray], None] | None = field(default=None, repr=False)
    """For float32 such bytes on a little-endian host: elements ``[start, stop)`` read
    straight into a float32 array (``Tensor.fill_span``)."""


def check_shape(dims: Any, where: str, path: Path) -> tuple[int, ...]:
    """Validated dims: at most :data:`MAX_RANK` non-negative sizes."""
    shape = tuple(int(d) for d in dims)
    if len(shape) > MAX_RANK:
        raise LoadError(path, f"{where} has rank {len(shape)}, more than {MAX_RANK}")
    if any(d < 0 for d in shape):
        raise LoadError(path, f"{where} has a negative dimension in {list(shape)}")
    return shape


def _int_entry(value: str, key: str, where: str, path: Path) -> int:
    if not value.isascii() or not value.isdigit():
        raise LoadError(path, f"{where}: external data {key} {value!r} is not a byte count")
    return int(value)


def _typed_reader(
    proto: Any, dtype: DType, shape: tuple[int, ...], count: int
) -> Callable[[], np.ndarray]:
    """Reader for values kept in the typed repeated fields (``float_data``, ``int32_data``…)."""
    code = dtype.code

    def read() -> np.ndarray:
        if code in (1, 14):
            array = np.array(proto.float_data, dtype=np.float32)
            if code == 14:
                array = array.view(np.complex64)
        elif code in (11, 15):
            array = np.array(proto.double_data, dtype=np.float64)
            if code == 15:
                array = array.view(np.complex128)
        elif code == 7:
            array = np.array(proto.int64_data, dtype=np.int64)
        elif code in (12, 13):
            array = np.array(proto.uint64_data, dtype=np.uint64).astype(dtype.np)
        else:
            # int32_data holds one value (or bit pattern, or packed byte) per entry.
            words = np.array(proto.int32_data, dtype=np.int32).view(np.uint32)
            if code == 6:
                array = words.view(np.int32)
            elif dtype.bits == 16:
                array = words.astype(np.uint16).view(dtype.np)
            elif dtype.bits == 8:
                array = words.astype(np.uint8).view(dtype.np)
            elif dtype.bits == 6:
                array = (words.astype(np.uint8) & 0x3F).view(dtype.np)
            else:
                array = _unpack(words.astype(np.uint8), dtype, count)
        return array.reshape(shape)

    return read


def _typed_entries(proto: Any, dtype: DType) -> int:
    code = dtype.code
    if code in (1, 14):
        return len(proto.float_data)
    if code in (11, 15):
        return len(proto.double_data)
    if code == 7:
        return len(proto.int64_data)
    if code in (12, 13):
        return len(proto.uint64_data)
    return len(proto.int32_data)


def _expected_entries(dtype: DType, count: int) -> int:
    if dtype.code in (14, 15):
        return 2 * count
    if dtype.bits in (2, 4):
        return -(-count * dtype.bits // 8)
    return count


def tensor(proto: Any, key: str, files: FileBytes) -> Stored | None:
    """A TensorProto as a lazily read :class:`Stored`; None for string tensors.

    Every claim (shape, type, byte ranges) is checked here, before any byte is viewed.
    """
    path = files.path
    where = f"tensor {key!r}"
    if proto.HasField("segment"):
        raise LoadError(path, f"{where} is a segment of a larger tensor, which is not supported")
    code = int(proto.data_type)
    if code == STRING_CODE:
        return None
    dtype = dtype_of(code)
    if dtype is None:
        raise LoadError(path, f"{where} has unknown data type {code}")
    shape = check_shape(proto.dims, where, path)
    count = math.prod(shape)
    reader: Callable[[], np.ndarray]
    if int(proto.data_location) == 1:
        keys = {text(entry.key): text(entry.value) for entry in proto.external_data}
        location = keys.get("location")
        if location is None:
            raise LoadError(path, f"{where} is stored externally but names no location")
        target, size = files.external(location)
        offset = _int_entry(keys.get("offset", "0"), "offset", where, path)
        needed = packed_bytes(dtype, count)
        if "length" in keys:
            length = _int_entry(keys["length"], "length", where, path)
            if length != needed:
                raise LoadError(
                    path,
                    f"{where}: external length {length} does not match {dtype.name} "
                    f"{list(shape)} ({needed} bytes)",
                )
        if offset + needed > size:
            raise LoadError(
                path,
                f"{where}: bytes {offset}..{offset + needed} lie outside {location!r} "
                f"({size} bytes)",
            )
        reader = _raw_reader(files, target, offset, dtype, shape, count)
        span, fill = files.spans(target, offset, dtype.np, count, _whole_bytes(dtype))
        return Stored(key, shape, dtype, reader, span, fill)
    if int(proto.data_location) != 0:
        raise LoadError(path, f"{where} has unknown data_location {proto.data_location}")
    if proto.HasField("raw_data"):
        raw = proto.raw_data
        needed = packed_bytes(dtype, count)
        if len(raw) == MARK_LEN:
            if raw[:4] != MARK:
                raise LoadError(path, f"{where} has an unreadable raw_data field")
            offset, length = struct.unpack("<QQ", raw[4:])
            if offset + length > files.size:
                raise LoadError(path, f"{where}: raw_data lies outside the file")
            if length != needed:
                raise LoadError(
                    path,
                    f"{where}: raw_data holds {length} bytes but {dtype.name} "
                    f"{list(shape)} needs {needed}",
                )
            reader = _raw_reader(files, path, offset, dtype, shape, count)
            span, fill = files.spans(path, offset, dtype.np, count, _whole_bytes(dtype))
            return Stored(key, shape, dtype, reader, span, fill)
        else:
            if len(raw) != needed:
                raise LoadError(
                    path,
                    f"{where}: raw_data holds {len(raw)} bytes but {dtype.name} "
                    f"{list(shape)} needs {needed}",
                )
            reader = _inline_reader(raw, dtype, shape, count)
        return Stored(key, shape, dtype, reader)
    entries = _typed_entries(proto, dtype)
    if entries != _expected_entries(dtype, count):
        raise LoadError(
            path,
            f"{where} holds {entries} values but {dtype.name} {list(shape)} needs "
            f"{_expected_entries(dtype, count)}",
        )
    return Stored(key, shape, dtype, _typed_reader(proto, dtype, shape, count))


def _raw_reader(
    files: FileBytes, target: Path, offset: int, dtype: DType, shape: tuple[int, ...], count: int
) -> Callable[[], np.ndarray]:
    def read() -> np.ndarray:
        if dtype.bits < 8 or dtype.bits == 6:
            packed = files.view(target, offset, packed_bytes(dtype, count), np.dtype(np.uint8))
            return _unpack(packed, dtype, count).reshape(shape)
        return files.view(target, offset, count, dtype.np).reshape(shape)

    return read


def _whole_bytes(dtype: DType) -> bool:
    """Whether each element of ``dtype`` is whole bytes (so has a byte offset)."""
    return dtype.bits >= 8 and dtype.bits != 6


def _inline_reader(
    raw: bytes, dtype: DType, shape: tuple[int, ...], count: int
) -> Callable[[], np.ndarray]:
    def read() -> np.ndarray:
        if dtype.bits < 8 or dtype.bits == 6:
            return _unpack(np.frombuffer(raw, dtype=np.uint8), dtype, count).reshape(shape)
        array = np.frombuffer(raw, dtype=dtype.np, count=count)
        if sys.byteorder == "big" and dtype.np.itemsize > 1:
            array = array.byteswap()
        return array.reshape(shape)

    return read


def sparse(proto: Any, key: str, files: FileBytes) -> Stored | None:
    """A SparseTensorProto, densified on read (values scattered into zeros)."""
    path = files.path
    where = f"sparse tensor {key!r}"
    shape = check_shape(proto.dims, where, path)
    values = tensor(proto.values, key, files)
    indices = tensor(proto.indices, f"{key}/indices", files)
    if values is None or indices is None:
        return None
    if values.dtype.bits < 8 or values.dtype.bits == 6:
        raise LoadError(path, f"{where} has packed {values.dtype.name} values (not supported)")
    nnz = math.prod(values.shape)
    if len(values.shape) != 1:
        raise LoadError(path, f"{where}: values must be 1-D, not {list(values.shape)}")
    if indices.dtype.is_float or indices.dtype.code in (9, 14, 15):
        raise LoadError(path, f"{where}: indices are {indices.dtype.name}, not integers")
    rank = len(shape)
    if indices.shape not in ((nnz,), (nnz, rank)):
        raise LoadError(
            path,
            f"{where}: indices shape {list(indices.shape)} fits neither [{nnz}] nor "
            f"[{nnz}, {rank}]",
        )
    # The dense array is expansion: checked and charged now, from the claimed shape, before
    # anything is allocated (reading it later allocates exactly this).
    count = budget.check_elements(path, shape, where)
    itemsize = values.dtype.np.itemsize
    stored = nnz * itemsize + math.prod(indices.shape) * indices.dtype.np.itemsize
    budget.check_expansion(path, count * itemsize, stored, f"{where} densified")
    files.ledger.charge(max(0, count * itemsize - stored), f"{where} densified")
    dtype = values.dtype

    def read() -> np.ndarray:
        dense = np.zeros(count, dtype=dtype.np)
        index = np.asarray(indices.reader()).astype(np.int64)
        if index.ndim == 2:
            if index.size and (index.min() < 0 or np.any(index >= np.array(shape))):
                raise LoadError(path, f"{where} has an index outside {list(shape)}")
            flat = np.ravel_multi_index(tuple(index.T), shape) if index.size else index[:, 0]
        else:
            flat = index
        if flat.size and (flat.min() < 0 or flat.max() >= count):
            raise LoadError(path, f"{where} has an index outside {list(shape)}")
        dense[flat] = values.reader()
        return dense.reshape(shape)

    return Stored(key, shape, dtype, read)


# --- nodes and attributes -------------------------------------------------------------------

_FLOAT, _INT, _STRING, _TENSOR_T, _GRAPH_T, _FLOATS, _INTS, _STRINGS = 1, 2, 3, 4, 5, 6, 7, 8
_GRAPHS_T, _SPARSE_T = 10, 11
#: Default-domain spellings (``ai.onnx`` is the same opset as the empty domain).
DEFAULT_DOMAINS = ("", "ai.onnx")


@dataclass(eq=False)
class Node:
    """One graph node with its value names resolved to unique value keys."""

    op: str
    domain: str
    name: str
    inputs: list[str]
    """Value keys of the inputs; ``""`` marks an omitted optional input."""
    outputs: list[str]
    attrs: dict[str, Any]
    """Attribute name → AttributeProto."""
    scope: str
    """Where the node lives: ``""`` for the main graph, else the subgraph path."""
    index: int
    """Position in the whole walk (main graph and subgraphs), which is topological per graph."""
    path: Path = field(repr=False)

    @property
    def label(self) -> str:
        """A name for messages: the node name, else ``<op>#<index>``."""
        return self.name or f"{self.op}#{self.index}"

    @property
    def standard(self) -> bool:
        """True for nodes of the default ONNX operator set."""
        return self.domain in DEFAULT_DOMAINS

    def input(self, position: int) -> str:
        """The value key of input ``position``, ``""`` when absent."""
        return self.inputs[position] if position < len(self.inputs) else ""

    def attr_of(self, name: str, kinds: tuple[int, ...]) -> Any | None:
        attr = self.attrs.get(name)
        if attr is None:
            return None
        # Type 0 (undefined) comes from very old writers; read the field the name implies.
        if int(attr.type) not in (*kinds, 0):
            raise LoadError(
                self.path,
                f"node {self.label!r}: attribute {name!r} has type {attr.type}, "
                f"expected {kinds[0]}",
            )
        return attr

    def required(self, name: str, kinds: tuple[int, ...]) -> Any:
        """An attribute known to be present (checked type)."""
        attr = self.attr_of(name, kinds)
        if attr is None:
            raise LoadError(self.path, f"node {self.label!r} lacks attribute {name!r}")
        return attr

    def get_int(self, name: str, default: int) -> int:
        """An INT attribute."""
        attr = self.attr_of(name, (_INT,))
        return default if attr is None else int(attr.i)

    def get_float(self, name: str, default: float) -> float:
        """A FLOAT attribute."""
        attr = self.attr_of(name, (_FLOAT,))
        return default if attr is None else float(attr.f)

    def get_ints(self, name: str) -> list[int] | None:
        """An INTS attribute, None when absent."""
        attr = self.attr_of(name, (_INTS,))
        return None if attr is None else [int(v) for v in attr.ints]

    def get_floats(self, name: str) -> list[float] | None:
        """A FLOATS attribute, None when absent."""
        attr = self.attr_of(name, (_FLOATS,))
        return None if attr is None else [float(v) for v in attr.floats]

    def get_str(self, name: str, default: str) -> str:
        """A STRING attribute decoded as UTF-8 (undecodable bytes replaced)."""
        attr = self.attr_of(name, (_STRING,))
        return default if attr is None else bytes(attr.s).decode("utf-8", "replace")

    def get_strs(self, name: str) -> list[str] | None:
        """A STRINGS attribute, None when absent."""
        attr = self.attr_of(name, (_STRINGS,))
        return None if attr is None else [bytes(s).decode("utf-8", "replace") for s in attr.strings]

    def graphs(self) -> list[tuple[str, Any]]:
        """Subgraph attributes as (attribute name, GraphProto), in attribute order."""
        found: list[tuple[str, Any]] = []
        for name, attr in self.attrs.items():
            kind = int(attr.type)
            if kind == _GRAPH_T or (kind == 0 and attr.HasField("g")):
                found.append((name, attr.g))
            elif kind == _GRAPHS_T:
                found.extend((f"{name}[{i}]", g) for i, g in enumerate(attr.graphs))
        return found


_CONSTANT_VALUES = (
    "value",
    "sparse_value",
    "value_float",
    "value_floats",
    "value_int",
    "value_ints",
    "value_string",
    "value_strings",
)


def _lazy(make: Callable[[], np.ndarray]) -> Callable[[], np.ndarray]:
    def read() -> np.ndarray:
        return make()

    return read


def constant(node: Node, key: str, files: FileBytes) -> Stored | None:
    """The tensor a ``Constant`` node holds, None for string constants."""
    present = [name for name in _CONSTANT_VALUES if name in node.attrs]
    if len(present) != 1:
        raise LoadError(
            files.path,
            f"Constant node {node.label!r} has {len(present)} value attributes, not exactly one",
        )
    which = present[0]
    f32, i64 = _plain_table()[1], _plain_table()[7]
    if which == "value":
        attr = node.required(which, (_TENSOR_T,))
        return tensor(attr.t, key, files)
    if which == "sparse_value":
        attr = node.required(which, (_SPARSE_T,))
        return sparse(attr.sparse_tensor, key, files)
    if which == "value_float":
        value = node.get_float(which, 0.0)
        return Stored(key, (), f32, _lazy(lambda: np.array(value, dtype=np.float32)))
    if which == "value_int":
        number = node.get_int(which, 0)
        return Stored(key, (), i64, _lazy(lambda: np.array(number, dtype=np.int64)))
    if which == "value_floats":
        attr = node.required(which, (_FLOATS,))
        return Stored(
            key, (len(attr.floats),), f32, _lazy(lambda: np.array(attr.floats, dtype=np.float32))
        )
    if which == "value_ints":
        attr = node.required(which, (_INTS,))
        return Stored(
            key, (len(attr.ints),), i64, _lazy(lambda: np.array(attr.ints, dtype=np.int64))
        )
    return None
