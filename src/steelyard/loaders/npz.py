"""NumPy ``.npz`` archives: a zip of ``.npy`` members, parsed without ``allow_pickle``.

We parse each member's ``.npy`` header ourselves (it is a literal dict) so that an object
array is recognised at open time, a stored member is memory-mapped, and nothing is unpickled.
A compressed member (``savez_compressed``) is checked against the expansion budget when the
archive is opened (its claimed size against its compressed size, summed over the archive in
a :class:`~steelyard.budget.Ledger`), inflated at most once per run into the spill folder
(:mod:`steelyard.loaders.spill`) and memory-mapped from there.

Members that are no tensor (strings such as a ``<U..`` vocabulary, structured or void
records, datetimes, complex numbers, and object arrays, which would need pickle) are skipped
and named in the checkpoint's notes; their bytes are never read. Booleans are kept as
bookkeeping tensors (flags and masks, not parameters).
"""

from __future__ import annotations

import ast
import math
import mmap
import struct
import zipfile
import zlib
from collections.abc import Callable
from pathlib import Path
from typing import Literal

import numpy as np

from steelyard import budget
from steelyard.dtypes import FLOAT_DTYPES, name_of
from steelyard.errors import LoadError
from steelyard.graph import Checkpoint, Format, Tensor
from steelyard.loaders.base import (
    file_size,
    member_expansion,
    open_zip,
    safe_zip_names,
    spill_member,
    zip_names_for_sniff,
)
from steelyard.loaders.conventions import inferred_checkpoint, role_for
from steelyard.loaders.signatures import ZIP_MAGIC

_MAGIC = b"\x93NUMPY"
_MAX_HEADER = 65_536
_LOCAL_HEADER = struct.Struct("<4sHHHHHIIIHH")


class _NotATensor(Exception):
    """A well-formed member that holds no tensor; the message says what it holds."""


def _parse_header(
    raw: bytes, path: Path, member: str
) -> tuple[np.dtype[np.generic], tuple[int, ...], bool, int]:
    """dtype, shape, fortran_order and header length of one ``.npy`` member.

    Raises :class:`_NotATensor` for a well-formed member that is no tensor (skipped) and
    :class:`LoadError` for a malformed one (the file is refused)."""
    if raw[:6] != _MAGIC or len(raw) < 10:
        raise LoadError(path, f"member {member!r} is not a .npy array")
    major = raw[6]
    if major == 1:
        (length,) = struct.unpack("<H", raw[8:10])
        start = 10
    elif major in (2, 3):
        (length,) = struct.unpack("<I", raw[8:12])
        start = 12
    else:
        raise LoadError(path, f"member {member!r} has unknown .npy version {major}")
    if length > _MAX_HEADER or start + length > len(raw):
        raise LoadError(path, f"member {member!r} has a truncated or oversized .npy header")
    text = raw[start : start + length].decode("latin1")
    try:
        header = ast.literal_eval(text)
    except (ValueError, SyntaxError, MemoryError, RecursionError):
        raise LoadError(path, f"member {member!r} has a malformed .npy header") from None
    if not isinstance(header, dict) or set(header) != {"descr", "fortran_order", "shape"}:
        raise LoadError(path, f"member {member!r} has a malformed .npy header")
    descr, fortran, shape = header["descr"], header["fortran_order"], header["shape"]
    if not isinstance(shape, tuple) or not all(isinstance(d, int) and d >= 0 for d in shape):
        raise LoadError(path, f"member {member!r} has an invalid shape {shape!r}")
    if not isinstance(fortran, bool):
        raise LoadError(path, f"member {member!r} has a malformed .npy header")
    if isinstance(descr, list):
        # numpy writes a structured dtype as a list of fields; it may hold objects, so it is
        # never turned into a dtype here.
        raise _NotATensor("structured records")
    if not isinstance(descr, str):
        raise LoadError(path, f"member {member!r} has a malformed .npy header")
    if descr.lstrip("<>|=").startswith("O"):
        raise _NotATensor("Python objects, which would need pickle: never loaded")
    try:
        dtype = np.dtype(descr)
    except TypeError:
        raise LoadError(path, f"member {member!r} has an unknown dtype {descr!r}") from None
    if dtype.hasobject:
        raise _NotATensor("Python objects, which would need pickle: never loaded")
    if dtype.kind == "V" and dtype.itemsize == 2:
        # ml_dtypes bfloat16 arrays are saved as anonymous 2-byte voids.
        dtype = FLOAT_DTYPES["bf16"]
    elif dtype.kind not in "biuf":
        kinds = {"U": "text", "S": "bytes", "V": "raw records", "M": "dates", "m": "durations"}
        raise _NotATensor(f"{kinds.get(dtype.kind, 'values')} of dtype {descr!r}")
    return dtype, tuple(shape), bool(fortran), start + length


class NpzLoader:
    """``numpy.savez`` / ``savez_compressed`` archives, never with pickle."""

    format = Format.NPZ

    def sniff(self, path: Path, head: bytes) -> bool:
        if head[:4] != ZIP_MAGIC:
            return False
        names = zip_names_for_sniff(path)
        if names is None:  # a damaged archive named .npz is still ours, to report
            return path.suffix == ".npz"
        return bool(names) and all(n.endswith(".npy") for n in names)

    def load(self, path: Path) -> Checkpoint:
        size = file_size(path)
        tensors: dict[str, Tensor] = {}
        skipped: list[str] = []
        ledger = budget.Ledger(path)
        with open_zip(path) as archive:
            members = safe_zip_names(archive, path)
            for member, info in members.items():
                if not member.endswith(".npy"):
                    raise LoadError(path, f"member {member!r} is not a .npy array")
                # Before a byte is inflated: the member alone, then the archive's running sum.
                ledger.charge(member_expansion(path, info), f"archive member {member!r}")
            for member, info in members.items():
                name = member[: -len(".npy")]
                try:
                    with archive.open(info) as stream:
                        head = stream.read(_MAX_HEADER + 12)
                except (zipfile.BadZipFile, OSError, EOFError, ValueError, NotImplementedError):
                    raise LoadError(path, f"member {member!r} is unreadable") from None
                except zlib.error:
                    raise LoadError(path, f"member {member!r} is not a valid deflate stream") from None
                try:
                    dtype, shape, fortran, header_len = _parse_header(head, path, member)
                except _NotATensor as why:
                    skipped.append(f"{name} ({why})")
                    continue
                budget.check_elements(path, shape, f"array {name!r}")
                expected = math.prod(shape) * dtype.itemsize
                if info.file_size != header_len + expected:
                    raise LoadError(
                        path,
                        f"member {member!r}: {dtype} {list(shape)} needs {expected} bytes but "
                        f"the member holds {info.file_size - header_len}",
                    )
                short = name_of(dtype)
                tensors[name] = Tensor(
                    name=name,
                    shape=shape,
                    dtype=short,
                    role=role_for(name, short in FLOAT_DTYPES),
                    reader=self._reader(path, size, info, dtype, shape, fortran, header_len),
                )
        notes = [f"skipped arrays that are no tensors: {', '.join(skipped)}"] if skipped else []
        return inferred_checkpoint(path, self.format, tensors, (path,), size, notes)

    @staticmethod
    def _reader(
        path: Path,
        size: int,
        info: zipfile.ZipInfo,
        dtype: np.dtype[np.generic],
        shape: tuple[int, ...],
        fortran: bool,
        header_len: int,
    ) -> Callable[[], np.ndarray]:
        count = math.prod(shape)
        order: Literal["C", "F"] = "F" if fortran else "C"

        def read() -> np.ndarray:
            try:
                return decode()
            except (MemoryError, RecursionError) as exc:
                raise LoadError(
                    path, f"member {info.filename!r} is too large to read ({type(exc).__name__})"
                ) from None

        def decode() -> np.ndarray:
            if info.compress_type == zipfile.ZIP_STORED:
                with open(path, "rb") as handle:
                    handle.seek(info.header_offset)
                    raw = handle.read(_LOCAL_HEADER.size)
                    if len(raw) != _LOCAL_HEADER.size or raw[:4] != ZIP_MAGIC:
                        raise LoadError(path, f"member {info.filename!r} has a broken local header")
                    local = _LOCAL_HEADER.unpack(raw)
                    start = info.header_offset + _LOCAL_HEADER.size + local[9] + local[10]
                    if start + header_len + count * dtype.itemsize > size:
                        raise LoadError(path, f"member {info.filename!r} runs past the file end")
                    if count == 0:
                        return np.zeros(shape, dtype=dtype, order=order)
                    mapped = mmap.mmap(handle.fileno(), 0, access=mmap.ACCESS_READ)
                flat = np.frombuffer(mapped, dtype=dtype, count=count, offset=start + header_len)
            else:
                # Inflated once per run (spill folder); later reads map the same file.
                spill = spill_member(path, info)
                if count == 0:
                    return np.zeros(shape, dtype=dtype, order=order)
                with open(spill, "rb") as handle:
                    mapped = mmap.mmap(handle.fileno(), 0, access=mmap.ACCESS_READ)
                flat = np.frombuffer(mapped, dtype=dtype, count=count, offset=header_len)
            array = flat.reshape(shape, order=order)
            if array.dtype.byteorder == ">":
                array = array.astype(array.dtype.newbyteorder("="))
            return array

        return read
