"""Storage bytes and the lazy tensors that view them, for every PyTorch archive kind.

A :class:`StorageSource` knows where each storage's bytes are (a span of the file, mapped, or a
compressed zip member); a :class:`StorageTable` resolves the pickle's persistent ids to checked
:class:`StorageRef` records; :func:`make_tensor` checks a tensor's view against its storage and
returns a :class:`~steelyard.graph.Tensor` whose reader views the storage bytes in place.

Budgets (:mod:`steelyard.budget`) are checked from what the file claims, before anything is
allocated or inflated: a compressed storage's uncompressed size (per object, and summed per
checkpoint in a :class:`~steelyard.budget.Ledger`) when a tensor first refers to it; a view's
elements and bytes against its storage's bytes; a zero-element tensor's dimensions. A
compressed storage is inflated at most once per run, streamed into the run's spill folder and
memory-mapped from there (:func:`steelyard.loaders.base.spill_member`), so memory stays
bounded by what a read touches, not by what was inflated.
"""

from __future__ import annotations

import math
import mmap
import struct
import sys
import zipfile
import zlib
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Any, BinaryIO

import numpy as np

from steelyard import budget
from steelyard.dtypes import ALL_DTYPES, is_float_name
from steelyard.errors import LoadError
from steelyard.graph import Tensor, TensorRole
from steelyard.loaders.base import (
    file_size,
    member_expansion,
    read_exactly,
    read_zip_member,
    spill_member,
)
from steelyard.loaders.conventions import role_for
from steelyard.loaders.pytorch.stand_ins import StorageRef, TensorRef, Unsupported
from steelyard.loaders.pytorch.unpickler import parse_storage_id
from steelyard.loaders.signatures import ZIP_MAGIC

#: The advice given with every format steelyard cannot read directly.
REREAD = "re-save it with a current torch (torch.save(obj, path) writes the zip format since 1.6)"


class StorageSource:
    """Where each storage's bytes are: spans of the file (mapped) or compressed zip members."""

    def __init__(self, path: Path, ledger: budget.Ledger) -> None:
        self.path = path
        self.ledger = ledger
        self.size = file_size(path)
        self.spans: dict[str, tuple[int, int]] = {}
        """key → (file offset, byte length) for bytes stored as-is."""
        self.members: dict[str, zipfile.ZipInfo] = {}
        """key → compressed zip member (read whole on demand)."""
        self._map: mmap.mmap | None = None
        self._charged: set[str] = set()

    def charge(self, key: str) -> None:
        """Budget a compressed storage's inflated size once, when a tensor first uses it:
        refused here, before any byte is inflated, above the per-object or checkpoint budget."""
        info = self.members.get(key)
        if info is None or key in self._charged:
            return
        self.ledger.charge(member_expansion(self.path, info), f"archive member {info.filename!r}")
        self._charged.add(key)

    def nbytes(self, key: str) -> int | None:
        if key in self.spans:
            return self.spans[key][1]
        if key in self.members:
            return int(self.members[key].file_size)
        return None

    def stored_as_is(self, key: str) -> bool:
        """Whether the storage's bytes are a span of the file (not a compressed member)."""
        return key in self.spans

    def read_into(self, key: str, start: int, out: np.ndarray) -> None:
        """Fill the C-contiguous ``out`` with the bytes from ``start`` of a storage stored as
        a span of the file, by a positioned read into it (not the memory map, whose touched
        pages stay in the resident set: :func:`steelyard.loaders.base.read_exactly`)."""
        offset, length = self.spans[key]
        if start < 0 or start + out.nbytes > length:
            raise LoadError(self.path, f"a read of storage {key!r} would leave the storage")
        try:
            short = f"storage {key!r} now lies past the end of the file"
            read_exactly(self.path, offset + start, out, short)
        except OSError as exc:
            raise LoadError(self.path, f"cannot be read ({exc})") from None

    def buffer(self, key: str) -> tuple[Any, int]:
        """A buffer holding the storage and the offset of its first byte in it."""
        if key in self.spans:
            offset, length = self.spans[key]
            if length == 0:
                return b"", 0
            if self._map is None:
                try:
                    with open(self.path, "rb") as handle:
                        self._map = mmap.mmap(handle.fileno(), 0, access=mmap.ACCESS_READ)
                except (OSError, ValueError) as exc:
                    raise LoadError(self.path, f"cannot be memory-mapped ({exc})") from None
            if offset + length > len(self._map):
                raise LoadError(self.path, f"storage {key!r} now lies past the end of the file")
            return self._map, offset
        info = self.members[key]
        if info.file_size == 0:
            return b"", 0
        self.charge(key)
        # Inflated once per run into the spill folder, then mapped: a later read (another view
        # of the same storage, a second rule) costs a mapping, not another inflation.
        spilled = spill_member(self.path, info)
        try:
            with open(spilled, "rb") as handle:
                mapped = mmap.mmap(handle.fileno(), 0, access=mmap.ACCESS_READ)
        except (OSError, ValueError) as exc:
            raise LoadError(self.path, f"cannot map inflated {info.filename!r} ({exc})") from None
        if len(mapped) != info.file_size:
            raise LoadError(
                self.path, f"storage record {info.filename!r} is shorter than it claims"
            )
        return mapped, 0


def zip_member(archive: zipfile.ZipFile, info: zipfile.ZipInfo, path: Path, limit: int) -> bytes:
    """``read_zip_member``, also refusing encrypted members and corrupt deflate streams."""
    if info.flag_bits & 0x1:
        raise LoadError(path, f"archive member {info.filename!r} is encrypted")
    try:
        return read_zip_member(archive, info, path, limit=limit)
    except zlib.error as exc:
        raise LoadError(path, f"archive member {info.filename!r} is corrupt ({exc})") from None


def _local_data_offset(path: Path, handle: BinaryIO, info: zipfile.ZipInfo, size: int) -> int:
    """Offset of a stored member's bytes, from its local header (checked against the central)."""
    if not 0 <= info.header_offset <= size - 30:
        raise LoadError(path, f"archive member {info.filename!r} has no local header")
    handle.seek(info.header_offset)
    header = handle.read(30)
    if len(header) != 30 or header[:4] != ZIP_MAGIC:
        raise LoadError(path, f"archive member {info.filename!r} has no local header")
    name_length, extra_length = struct.unpack("<HH", header[26:30])
    raw_name = handle.read(name_length)
    expected = info.orig_filename.encode("utf-8" if info.flag_bits & 0x800 else "cp437", "replace")
    if raw_name != expected:
        raise LoadError(
            path,
            f"archive member {info.filename!r}: local header names "
            f"{raw_name[:60]!r} (central directory disagrees)",
        )
    start: int = info.header_offset + 30 + int(name_length) + int(extra_length)
    if start + info.compress_size > size:
        raise LoadError(path, f"archive member {info.filename!r} runs past the end of the file")
    return start


class StorageTable:
    """Resolves persistent ids to checked :class:`StorageRef` records."""

    def __init__(self, path: Path, source: StorageSource, deferred: bool = False) -> None:
        self.path = path
        self.source = source
        self.refs: dict[str, StorageRef] = {}
        # Legacy files list storage bytes after the pickle: sizes are checked afterwards.
        self.deferred = deferred

    def persistent_load(self, pid: object) -> StorageRef:
        kind, key, location, numel, view = parse_storage_id(pid)
        if view is not None:
            raise Unsupported(f"uses pre-1.6 storage views; {REREAD}")
        known = self.refs.get(key)
        if known is not None:
            if known.kind != kind or known.numel != numel:
                raise LoadError(self.path, f"storage {key!r} is described twice, differently")
            return known
        ref = StorageRef(kind=kind, key=key, location=location, numel=numel)
        if not self.deferred:
            self.check(ref)
            self.source.charge(key)
        self.refs[key] = ref
        return ref

    def check(self, ref: StorageRef) -> None:
        have = self.source.nbytes(ref.key)
        if have is None:
            raise LoadError(self.path, f"refers to storage {ref.key!r}, which the file lacks")
        if ref.kind.untyped:
            need = ref.numel
        elif ref.kind.dtype is None:
            return  # undecodable dtype: refused if a tensor we read uses it
        else:
            need = ref.numel * ALL_DTYPES[ref.kind.dtype].itemsize
        if need != have:
            raise LoadError(
                self.path,
                f"storage {ref.key!r} claims {ref.numel} elements of {ref.kind.torch_name} "
                f"({need} bytes) but its record holds {have} bytes",
            )


def _storage_elements(ref: TensorRef, path: Path, name: str) -> int:
    if ref.dtype is None:
        raise LoadError(
            path, f"tensor {name!r} has dtype {ref.dtype_name}, which steelyard cannot decode"
        )
    itemsize = ALL_DTYPES[ref.dtype].itemsize
    if ref.storage.kind.untyped:
        if ref.storage.numel % itemsize:
            raise LoadError(
                path,
                f"tensor {name!r}: its storage of {ref.storage.numel} bytes "
                f"is not a whole number of {ref.dtype_name} elements",
            )
        return ref.storage.numel // itemsize
    return ref.storage.numel


def make_tensor(
    ref: TensorRef, name: str, role: TensorRole | None, source: StorageSource, order: str
) -> Tensor:
    """A lazily read tensor over its storage, after checking the view stays inside it."""
    path = source.path
    total = _storage_elements(ref, path, name)
    assert ref.dtype is not None
    what = f"tensor {name!r}"
    count = budget.check_elements(path, ref.size, what)
    if count == 0 and ref.size:
        # Holds nothing, so its dimensions cost nothing to store, but a layer built on it
        # would have that many units: refuse absurd ones here.
        budget.check_units(path, max(ref.size), f"{what} (zero elements, shape {list(ref.size)})")
    itemsize = ALL_DTYPES[ref.dtype].itemsize
    # A view may claim more bytes than its storage holds (stride 0, overlapping rows): those
    # bytes exist only once steelyard materialises the view, so they are expansion.
    claimed, stored = count * itemsize, total * itemsize
    budget.check_expansion(path, claimed, stored, f"{what} (a view of a {stored:,} byte storage)")
    if claimed > stored:
        source.ledger.charge(claimed - stored, what)
    if any(s == 0 for s in ref.size):
        if ref.offset > total:
            raise LoadError(
                path,
                f"tensor {name!r}: storage offset {ref.offset} is past its "
                f"storage of {total} elements",
            )
    else:
        last = ref.offset + sum((s - 1) * st for s, st in zip(ref.size, ref.stride, strict=False))
        if last >= total:
            raise LoadError(
                path,
                f"tensor {name!r}: offset {ref.offset}, size {list(ref.size)} and stride "
                f"{list(ref.stride)} reach element {last} but its storage holds {total}",
            )
    dtype = ALL_DTYPES[ref.dtype]
    is_float = is_float_name(ref.dtype)
    spans = _spans(ref, dtype, count, source, order) if _contiguous(ref, source) else None
    return Tensor(
        name=name,
        shape=ref.size,
        dtype=ref.dtype,
        role=role if role is not None else role_for(name, is_float),
        reader=_reader(ref, dtype, total, source, order, None if spans is None else spans[0]),
        read_span=None if spans is None else spans[0],
        fill_span=None if spans is None else spans[1],
    )


def _contiguous(ref: TensorRef, source: StorageSource) -> bool:
    """Whether the tensor is a C-ordered run of a storage stored as a span of the file (what
    ``torch.save`` writes for an ordinary parameter), so any run of its elements can be read
    by offset."""
    if not source.stored_as_is(ref.storage.key) or math.prod(ref.size) == 0:
        return False
    expected = 1
    for size, stride in zip(reversed(ref.size), reversed(ref.stride), strict=False):
        if size != 1 and stride != expected:
            return False
        expected *= size
    return len(ref.stride) == len(ref.size)


def _spans(
    ref: TensorRef, dtype: np.dtype[Any], count: int, source: StorageSource, order: str
) -> tuple[Callable[[int, int], np.ndarray], Callable[[int, int, np.ndarray], None] | None]:
    """(read_span, fill_span) of a contiguous tensor: elements ``[start, stop)`` by positioned
    reads; fill_span for float32 stored in the host's byte order."""
    itemsize = dtype.itemsize
    native = order == sys.byteorder or itemsize == 1
    raw = np.dtype(f"{'<' if order == 'little' else '>'}u{itemsize}")
    key = ref.storage.key

    def read_span(start: int, stop: int) -> np.ndarray:
        start, stop = max(0, start), min(count, stop)
        out = np.empty(max(0, stop - start), dtype=raw)
        if out.size:
            source.read_into(key, (ref.offset + start) * itemsize, out)
        if not native:
            out = out.astype(raw.newbyteorder("="))
        return out.view(dtype)

    def fill_span(start: int, stop: int, out: np.ndarray) -> None:
        start, stop = max(0, start), min(count, stop)
        if stop > start:
            source.read_into(key, (ref.offset + start) * itemsize, out.reshape(-1)[: stop - start])

    float32 = dtype == np.dtype(np.float32) and native
    return read_span, (fill_span if float32 else None)


def _reader(
    ref: TensorRef,
    dtype: np.dtype[Any],
    total: int,
    source: StorageSource,
    order: str,
    span: Callable[[int, int], np.ndarray] | None,
) -> Callable[[], np.ndarray]:
    """The whole tensor: through ``span`` (positioned reads) when it is a contiguous run of a
    stored storage, else viewed through the storage's buffer with its strides."""
    itemsize = dtype.itemsize
    native = order == sys.byteorder or itemsize == 1
    # Strides are applied to unsigned integers of the element size, then reinterpreted:
    # as_strided cannot handle ml_dtypes types, and a foreign byte order is swapped as ints.
    raw = np.dtype(f"{'<' if order == 'little' else '>'}u{itemsize}")

    def read() -> np.ndarray:
        if math.prod(ref.size) == 0:
            return np.zeros(ref.size, dtype=dtype)
        if span is not None:  # a fresh array, not a view through the map (see read_into)
            array = span(0, math.prod(ref.size)).reshape(ref.size)
            array.flags.writeable = False  # as the mapped views: no rule writes stored data
            return array
        buffer, start = source.buffer(ref.storage.key)
        flat = np.frombuffer(buffer, dtype=raw, count=total, offset=start)
        view = np.lib.stride_tricks.as_strided(
            flat[ref.offset :],
            shape=ref.size,
            strides=[s * itemsize for s in ref.stride],
            writeable=False,
        )
        if not native:
            view = view.astype(raw.newbyteorder("="))
        return view.view(dtype)

    return read


def zip_source(
    path: Path,
    members: Mapping[str, zipfile.ZipInfo],
    folder: str,
    size: int,
    ledger: budget.Ledger,
) -> StorageSource:
    """Where each storage under ``folder`` of a zip archive is (stored spans or compressed
    members)."""
    source = StorageSource(path, ledger)
    with open(path, "rb") as handle:
        for name, info in members.items():
            if name.startswith(folder) and not name.endswith("/"):
                _add_member(source, path, handle, name[len(folder) :], info, size)
    return source


def _add_member(
    source: StorageSource, path: Path, handle: BinaryIO, key: str, info: zipfile.ZipInfo, size: int
) -> None:
    """Record where one storage member's bytes are (stored) or how to inflate them."""
    name = info.filename
    if info.flag_bits & 0x1:
        raise LoadError(path, f"archive member {name!r} is encrypted")
    if info.compress_type == zipfile.ZIP_STORED:
        if info.compress_size != info.file_size:
            raise LoadError(path, f"archive member {name!r} is stored but its sizes differ")
        source.spans[key] = (_local_data_offset(path, handle, info, size), info.file_size)
    else:
        # Deflate expands at most ~1032:1; a larger claim is a lie about the size.
        if info.file_size > 1100 * info.compress_size + 1024:
            raise LoadError(path, f"archive member {name!r} claims an implausible size")
        source.members[key] = info
