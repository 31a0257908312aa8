"""The GGUF header, parsed by hand with a cap on every count, length and offset.

Layout (little-endian; the ``gguf`` package 0.19.0 and docs FORMATS.md "GGUF"): magic
``GGUF``, u32 version, u64 tensor count, u64 metadata count, the metadata key/value pairs
(typed; strings and arrays carry u64 lengths), the tensor infos (name, u32 n_dims, u64 dims
innermost first, u32 ggml type, u64 offset relative to the data section), padding to
``general.alignment`` (default 32), then the data. Versions 2 and 3 share this layout (version 1
had 32-bit counts; version 3 allows big-endian files, which we refuse).

The package's own ``GGUFReader`` maps the whole file and builds numpy views of every array in
the metadata, with no limits on what a count claims; here each claim is checked against the
bytes that remain before anything is built, so a 1 KB file claiming 2**60 strings is refused
at once, and the work done is bounded by the file's size.
"""

from __future__ import annotations

import mmap
import struct
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from steelyard import budget
from steelyard.errors import LoadError
from steelyard.loaders.base import MAX_METADATA_BYTES, file_size
from steelyard.loaders.signatures import GGUF_MAGIC as MAGIC

VERSIONS = (2, 3)
DEFAULT_ALIGNMENT = 32
#: GGML_MAX_DIMS (ggml.h; the gguf package writes at most 4 dims).
MAX_DIMS = 4
#: More tensors or metadata pairs than any real model has (large MoE files hold ~50k tensors).
MAX_TENSORS = 2**20
MAX_PAIRS = 2**20
#: Keys and tensor names longer than this are refused (real ones are well under 256 bytes).
MAX_NAME = 4096
#: Array elements walked or kept: vocabularies reach ~10^6 entries, nothing needs 2^28.
MAX_ARRAY = 2**28
#: Arrays of arrays deeper than this are refused (real files nest at most once).
MAX_DEPTH = 3
#: Numeric arrays up to this many elements are kept as lists (per-layer head counts);
#: longer ones (token scores, types) only keep their length.
KEEP_ARRAY = 65536
#: String values longer than this are kept as their length only (chat templates are ~10 KB).
KEEP_STRING = 65536

# GGUFValueType (gguf.constants): fixed-size scalar types and their struct codes.
_SCALARS: dict[int, tuple[str, str]] = {
    0: ("<B", "uint8"),
    1: ("<b", "int8"),
    2: ("<H", "uint16"),
    3: ("<h", "int16"),
    4: ("<I", "uint32"),
    5: ("<i", "int32"),
    6: ("<f", "float32"),
    7: ("<?", "bool"),
    10: ("<Q", "uint64"),
    11: ("<q", "int64"),
    12: ("<d", "float64"),
}
_STRING = 8
_ARRAY = 9
_NUMPY = {
    0: "<u1", 1: "<i1", 2: "<u2", 3: "<i2", 4: "<u4", 5: "<i4", 6: "<f4", 7: "<u1",
    10: "<u8", 11: "<i8", 12: "<f8",
}  # fmt: skip


@dataclass(frozen=True, slots=True)
class StringValue:
    """A string too long to keep: only its length."""

    length: int


@dataclass(frozen=True, slots=True)
class ArrayValue:
    """An array in the metadata: its element type, length and (when small) its values."""

    item_type: int
    length: int
    values: list[Any] | None = None


@dataclass(frozen=True, slots=True)
class TensorInfo:
    """One tensor info entry, checked against the file."""

    name: str
    dims: tuple[int, ...]
    """As stored: innermost (contiguous) dimension first."""
    type_id: int
    offset: int
    """Relative to the data section."""
    nbytes: int
    elements: int

    @property
    def shape(self) -> tuple[int, ...]:
        """The numpy (row-major) shape: the stored dims reversed."""
        return tuple(reversed(self.dims))


@dataclass
class Header:
    """Everything before the tensor data."""

    version: int
    metadata: dict[str, Any]
    tensors: list[TensorInfo] = field(default_factory=list)
    alignment: int = DEFAULT_ALIGNMENT
    data_start: int = 0
    file_size: int = 0


class _Cursor:
    """Bounds-checked little-endian reads from a memory map of the file."""

    def __init__(self, path: Path, view: mmap.mmap, size: int, ledger: budget.Ledger) -> None:
        self.path = path
        self.view = view
        self.size = size
        self.pos = 0
        self.ledger = ledger
        self.steps = 0

    def remaining(self) -> int:
        return self.size - self.pos

    def need(self, count: int, what: str) -> None:
        if count > self.size - self.pos:
            raise LoadError(
                self.path,
                f"{what} needs {count:,} bytes at offset {self.pos:,} but the file ends at "
                f"{self.size:,} (truncated or lying header)",
            )

    def unpack(self, code: str, what: str) -> Any:
        width = struct.calcsize(code)
        self.need(width, what)
        (value,) = struct.unpack_from(code, self.view, self.pos)
        self.pos += width
        return value

    def raw(self, count: int, what: str) -> bytes:
        self.need(count, what)
        data = bytes(self.view[self.pos : self.pos + count])
        self.pos += count
        return data

    def skip(self, count: int, what: str) -> None:
        self.need(count, what)
        self.pos += count

    def tick(self, what: str) -> None:
        """Check the structure-reading time budget now and then in long loops."""
        self.steps += 1
        if self.steps % 65536 == 0:
            self.ledger.check_time(what)

    def name(self, what: str) -> str:
        length = self.unpack("<Q", f"length of {what}")
        if length > MAX_NAME:
            raise LoadError(self.path, f"{what} claims {length:,} bytes, more than {MAX_NAME}")
        try:
            return self.raw(length, what).decode("utf-8")
        except UnicodeDecodeError:
            raise LoadError(self.path, f"{what} at offset {self.pos:,} is not UTF-8") from None

    def string(self, what: str) -> str | StringValue:
        length = self.unpack("<Q", f"length of {what}")
        if length > MAX_METADATA_BYTES:
            raise LoadError(
                self.path, f"{what} claims a string of {length:,} bytes, more than the 100 MB cap"
            )
        self.need(length, what)
        if length > KEEP_STRING:
            self.pos += length
            return StringValue(length)
        return self.raw(length, what).decode("utf-8", errors="replace")

    def value(self, type_id: int, what: str, depth: int = 0) -> Any:
        scalar = _SCALARS.get(type_id)
        if scalar is not None:
            return self.unpack(scalar[0], what)
        if type_id == _STRING:
            return self.string(what)
        if type_id == _ARRAY:
            return self.array(what, depth + 1)
        raise LoadError(self.path, f"{what} has unknown value type {type_id}")

    def array(self, what: str, depth: int) -> ArrayValue:
        if depth > MAX_DEPTH:
            raise LoadError(self.path, f"{what} nests arrays more than {MAX_DEPTH} deep")
        item = self.unpack("<I", f"element type of {what}")
        count = self.unpack("<Q", f"length of {what}")
        # The smallest encoding of one element bounds how many the rest of the file can hold.
        if item in _SCALARS:
            smallest = struct.calcsize(_SCALARS[item][0])
        elif item == _STRING:
            smallest = 8
        elif item == _ARRAY:
            smallest = 12
        else:
            raise LoadError(self.path, f"{what} is an array of unknown value type {item}")
        if count > MAX_ARRAY or count * smallest > self.remaining():
            raise LoadError(
                self.path,
                f"{what} claims {count:,} elements, more than the {self.remaining():,} bytes "
                "left in the file can hold",
            )
        if item in _SCALARS:
            width = smallest * count
            if count > KEEP_ARRAY:
                self.skip(width, what)
                return ArrayValue(item, count)
            values = np.frombuffer(self.raw(width, what), _NUMPY[item]).tolist()
            if item == 7:
                values = [bool(v) for v in values]
            return ArrayValue(item, count, values)
        for _ in range(count):
            self.tick(what)
            if item == _STRING:
                length = self.unpack("<Q", f"string length in {what}")
                self.skip(length, f"string in {what}")
            else:
                self.array(what, depth + 1)
        return ArrayValue(item, count)


def read_header(path: Path, ledger: budget.Ledger) -> Header:
    """Parse and check the header of the GGUF file at ``path``; reads no tensor data."""
    size = file_size(path)
    if size < 24:
        raise LoadError(path, f"is {size} bytes long, too short for a GGUF header")
    with open(path, "rb") as handle, mmap.mmap(handle.fileno(), 0, access=mmap.ACCESS_READ) as view:
        cursor = _Cursor(path, view, size, ledger)
        if cursor.raw(4, "magic") != MAGIC:
            raise LoadError(path, "does not start with the GGUF magic")
        version = cursor.unpack("<I", "version")
        if version not in VERSIONS:
            swapped = struct.unpack("<I", struct.pack(">I", version))[0]
            if swapped in VERSIONS:
                raise LoadError(path, f"is a big-endian GGUF v{swapped} file, which is not read")
            if version == 1:
                raise LoadError(path, "is GGUF version 1 (32-bit counts), which is not read")
            raise LoadError(path, f"has GGUF version {version}; versions 2 and 3 are read")
        tensor_count = cursor.unpack("<Q", "tensor count")
        pair_count = cursor.unpack("<Q", "metadata count")
        # A tensor info takes at least 24 bytes and a key/value pair at least 13.
        if tensor_count > MAX_TENSORS or tensor_count * 24 > cursor.remaining():
            raise LoadError(path, f"claims {tensor_count:,} tensors, more than the file can hold")
        if pair_count > MAX_PAIRS or pair_count * 13 > cursor.remaining():
            raise LoadError(
                path, f"claims {pair_count:,} metadata pairs, more than the file can hold"
            )
        metadata: dict[str, Any] = {}
        types: dict[str, int] = {}
        for index in range(pair_count):
            cursor.tick("the GGUF metadata")
            key = cursor.name(f"metadata key #{index}")
            if key in metadata:
                raise LoadError(path, f"metadata key {key!r} appears twice")
            type_id = cursor.unpack("<I", f"type of metadata {key!r}")
            metadata[key] = cursor.value(type_id, f"metadata {key!r}")
            types[key] = type_id
        header = Header(version=version, metadata=metadata, file_size=size)
        header.alignment = _alignment(path, metadata, types)
        header.tensors = _tensor_infos(cursor, tensor_count)
    _place(path, header, cursor.pos)
    return header


def _alignment(path: Path, metadata: dict[str, Any], types: dict[str, int]) -> int:
    if "general.alignment" not in metadata:
        return DEFAULT_ALIGNMENT
    value = metadata["general.alignment"]
    if types["general.alignment"] not in (0, 2, 4, 10) or not isinstance(value, int):
        raise LoadError(path, "general.alignment is not an unsigned integer")
    # A power of two, as ggml requires (its padding is a bit mask).
    if value < 1 or value > 2**30 or value & (value - 1):
        raise LoadError(path, f"general.alignment {value} is not a power of two up to 2**30")
    return value


def _tensor_infos(cursor: _Cursor, count: int) -> list[TensorInfo]:
    # Imported here: the package is optional and needed only once a GGUF file is read.
    from gguf.constants import GGML_QUANT_SIZES, GGMLQuantizationType

    path = cursor.path
    infos: list[TensorInfo] = []
    seen: set[str] = set()
    for index in range(count):
        cursor.tick("the GGUF tensor infos")
        name = cursor.name(f"tensor name #{index}")
        if name in seen:
            raise LoadError(path, f"tensor {name!r} appears twice")
        seen.add(name)
        n_dims = cursor.unpack("<I", f"dimension count of {name!r}")
        if not 1 <= n_dims <= MAX_DIMS:
            raise LoadError(path, f"tensor {name!r} has {n_dims} dimensions; 1 to {MAX_DIMS} are valid")
        dims = tuple(cursor.unpack("<Q", f"dimensions of {name!r}") for _ in range(n_dims))
        type_id = cursor.unpack("<I", f"type of {name!r}")
        offset = cursor.unpack("<Q", f"offset of {name!r}")
        try:
            kind = GGMLQuantizationType(type_id)
            block, type_size = GGML_QUANT_SIZES[kind]
        except (ValueError, KeyError):
            raise LoadError(path, f"tensor {name!r} has unknown ggml type {type_id}") from None
        elements = budget.check_elements(path, tuple(reversed(dims)), f"tensor {name!r}")
        if dims[0] % block:
            raise LoadError(
                path,
                f"tensor {name!r}: rows of {dims[0]:,} elements are not whole {kind.name} "
                f"blocks of {block}",
            )
        infos.append(TensorInfo(name, dims, type_id, offset, elements // block * type_size, elements))
    return infos


def _place(path: Path, header: Header, end_of_infos: int) -> None:
    """Check every tensor's bytes lie inside the file, aligned, without overlapping."""
    align = header.alignment
    header.data_start = -(-end_of_infos // align) * align
    if header.tensors and header.data_start > header.file_size:
        raise LoadError(path, "ends before its tensor data starts (truncated?)")
    available = header.file_size - header.data_start
    for info in header.tensors:
        if info.offset % align:
            raise LoadError(
                path, f"tensor {info.name!r}: offset {info.offset:,} is not a multiple of {align}"
            )
        if info.offset + info.nbytes > available:
            raise LoadError(
                path,
                f"tensor {info.name!r}: bytes [{info.offset:,}, {info.offset + info.nbytes:,}) "
                f"fall outside the {available:,} data bytes (truncated or lying header)",
            )
    end = 0
    previous = ""
    for info in sorted(header.tensors, key=lambda t: (t.offset, t.nbytes)):
        if info.nbytes and info.offset < end:
            raise LoadError(path, f"tensor {info.name!r} overlaps the data of {previous!r}")
        if info.nbytes:
            end, previous = info.offset + info.nbytes, info.name
