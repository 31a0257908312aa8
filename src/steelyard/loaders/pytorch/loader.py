"""PyTorch checkpoints (``torch.save`` zip and legacy files, ``torch.jit.save`` archives).

Nothing in the file is executed and torch is not imported: pickles go through
:mod:`steelyard.loaders.pytorch.unpickler`, which turns tensors into :class:`TensorRef` records;
this module checks each record against its storage (``data/<key>``) and builds lazy readers
that view the storage bytes in place (memory-mapped when the zip member is stored).

Budgets (:mod:`steelyard.budget`) are checked from what the file claims, before anything is
allocated or inflated: a compressed storage's uncompressed size (per object, and summed per
checkpoint in a :class:`~steelyard.budget.Ledger`) when a tensor first refers to it; a view's
elements and bytes against its storage's bytes; a zero-element tensor's dimensions. A
compressed storage is inflated at most once per run, streamed into the run's spill folder and
memory-mapped from there (:func:`steelyard.loaders.base.spill_member`), so memory stays
bounded by what a read touches, not by what was inflated. Walks over the unpickled structure
visit each container once, however often the pickle's memo refers to it.
"""

from __future__ import annotations

import io
import math
import mmap
import re
import struct
import sys
import zipfile
import zlib
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any, BinaryIO

import numpy as np

from steelyard import budget
from steelyard.dtypes import ALL_DTYPES, is_float_name
from steelyard.errors import LoadError
from steelyard.graph import (
    Checkpoint,
    Format,
    OptimizerSlots,
    OptimizerState,
    Tensor,
    TensorRole,
)
from steelyard.loaders.base import (
    file_size,
    member_expansion,
    open_zip,
    read_zip_member,
    safe_zip_names,
    spill_member,
)
from steelyard.loaders.conventions import inferred_checkpoint, role_for
from steelyard.loaders.pytorch.unpickler import (
    MAX_PICKLE_BYTES,
    ScriptObject,
    StorageRef,
    TensorRef,
    Unsupported,
    parse_storage_id,
    restricted_load,
)

#: ``torch.serialization.MAGIC_NUMBER`` pickled with protocol 2 (legacy, pre-1.6 format).
_LEGACY_MAGIC = b"\x80\x02\x8a\x0a" + (0x1950A86A20F9469CFC6C).to_bytes(10, "little") + b"."
_LEGACY_PROTOCOL = 1001
_ZIP_MAGIC = b"PK\x03\x04"
#: Walks over pickled containers stop here (a state dict is a few levels deep).
_MAX_WALK_DEPTH = 100
_REREAD = "re-save it with a current torch (torch.save(obj, path) writes the zip format since 1.6)"

_MODEL_KEYS = (
    "state_dict",
    "model_state_dict",
    "model_state",
    "model",
    "module",
    "net",
    "network",
    "weights",
    "params",
    "model_weights",
)
_EMA_KEYS = ("ema", "model_ema", "ema_model", "state_dict_ema", "ema_state_dict", "params_ema")
_OPTIMIZER_KEYS = (
    "optimizer",
    "optimizer_state_dict",
    "optimizer_state",
    "optim",
    "optim_state_dict",
    "optim_state",
    "opt",
    "opt_state",
    "optimizer_states",
    "optimizers",
)
_PREFIXES = ("module.", "_orig_mod.")
_BUFFER_LEAVES = {"running_mean", "running_var", "num_batches_tracked"}


# --------------------------------------------------------------------------- storage bytes


class _Source:
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


def _member(archive: zipfile.ZipFile, info: zipfile.ZipInfo, path: Path, limit: int) -> bytes:
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
    if len(header) != 30 or header[:4] != _ZIP_MAGIC:
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


# --------------------------------------------------------------------------- storage table


class _Storages:
    """Resolves persistent ids to checked :class:`StorageRef` records."""

    def __init__(self, path: Path, source: _Source, deferred: bool = False) -> None:
        self.path = path
        self.source = source
        self.refs: dict[str, StorageRef] = {}
        # Legacy files list storage bytes after the pickle: sizes are checked afterwards.
        self.deferred = deferred

    def persistent_load(self, pid: object) -> StorageRef:
        kind, key, location, numel, view = parse_storage_id(pid)
        if view is not None:
            raise Unsupported(f"uses pre-1.6 storage views; {_REREAD}")
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


def _make_tensor(
    ref: TensorRef, name: str, role: TensorRole | None, source: _Source, order: str
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
    return Tensor(
        name=name,
        shape=ref.size,
        dtype=ref.dtype,
        role=role if role is not None else role_for(name, is_float),
        reader=_reader(ref, dtype, total, source, order),
    )


def _reader(
    ref: TensorRef, dtype: np.dtype[Any], total: int, source: _Source, order: str
) -> Callable[[], np.ndarray]:
    itemsize = dtype.itemsize
    native = order == sys.byteorder or itemsize == 1
    # Strides are applied to unsigned integers of the element size, then reinterpreted:
    # as_strided cannot handle ml_dtypes types, and a foreign byte order is swapped as ints.
    raw = np.dtype(f"{'<' if order == 'little' else '>'}u{itemsize}")

    def read() -> np.ndarray:
        if math.prod(ref.size) == 0:
            return np.zeros(ref.size, dtype=dtype)
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


# --------------------------------------------------------------------------- the loader


class PytorchLoader:
    """``torch.save`` zip archives (any record name), TorchScript archives, legacy files."""

    format = Format.PYTORCH

    def sniff(self, path: Path, head: bytes) -> bool:
        if head.startswith(_LEGACY_MAGIC) or _is_tar_checkpoint(head):
            return True
        if not head.startswith(_ZIP_MAGIC):
            return False
        try:
            with zipfile.ZipFile(path) as archive:
                names = archive.namelist()
        except (zipfile.BadZipFile, OSError, ValueError, EOFError, NotImplementedError):
            return False
        return any(_is_record(name) for name in names)

    def load(self, path: Path) -> Checkpoint:
        with open(path, "rb") as handle:
            head = handle.read(512)
        if _is_tar_checkpoint(head):
            raise LoadError(path, f"is a pre-0.4 PyTorch tar checkpoint; {_REREAD}")
        if head.startswith(_LEGACY_MAGIC):
            root, storages, order = _read_legacy(path)
            return _checkpoint(path, root, storages, order, [])
        return _read_zip(path)


def _is_tar_checkpoint(head: bytes) -> bool:
    # torch < 0.4 wrote a tar whose first member is "sys_info" (ustar magic at byte 257).
    return head[:9] == b"sys_info\x00" and head[257:262] == b"ustar"


def _is_record(name: str) -> bool:
    return name.endswith("/data.pkl") and name.count("/") == 1


def _pickle_member(archive: zipfile.ZipFile, info: zipfile.ZipInfo, path: Path, what: str) -> bytes:
    """A pickle member, refused from its claimed size before it is inflated."""
    if info.file_size > MAX_PICKLE_BYTES:
        raise LoadError(
            path,
            f"{what} claims {info.file_size:,} bytes, more than the {MAX_PICKLE_BYTES:,} byte "
            "cap for a pickle (torch writes ~120 bytes per tensor of a state dict)",
        )
    return _member(archive, info, path, info.file_size)


def _read_zip(path: Path) -> Checkpoint:
    size = file_size(path)
    ledger = budget.Ledger(path)
    with open_zip(path) as archive:
        members = safe_zip_names(archive, path)
        records = [name for name in members if _is_record(name)]
        if len(records) != 1:
            raise LoadError(path, f"holds {len(records)} PyTorch records (*/data.pkl), not one")
        prefix = records[0][: -len("data.pkl")]
        order = "little"
        if f"{prefix}byteorder" in members:
            text = _member(archive, members[f"{prefix}byteorder"], path, 16)
            if text not in (b"little", b"big"):
                raise LoadError(path, f"byteorder record says {text[:16]!r}")
            order = text.decode()
        script = f"{prefix}constants.pkl" in members or any(
            name.startswith(f"{prefix}code/") for name in members
        )
        sources = {
            folder: _zip_source(path, members, f"{prefix}{folder}/", size, ledger)
            for folder in ("data", "constants")
        }
        pickled = _pickle_member(archive, members[records[0]], path, "data.pkl")
        storages = _Storages(path, sources["data"])
        root = restricted_load(pickled, path, "data.pkl", storages.persistent_load, script, ledger)
        notes: list[str] = []
        if script or isinstance(root, ScriptObject):
            code = _script_code(archive, members, prefix, path)
            constants: Any = ()
            constant_storages = _Storages(path, sources["constants"])
            if f"{prefix}constants.pkl" in members:
                blob = _pickle_member(
                    archive, members[f"{prefix}constants.pkl"], path, "constants.pkl"
                )
                constants = restricted_load(
                    blob, path, "constants.pkl", constant_storages.persistent_load, True, ledger
                )
            return _script_checkpoint(
                path, root, constants, (storages, constant_storages), order, code
            )
    return _checkpoint(path, root, storages, order, notes)


def _zip_source(
    path: Path,
    members: Mapping[str, zipfile.ZipInfo],
    folder: str,
    size: int,
    ledger: budget.Ledger,
) -> _Source:
    source = _Source(path, ledger)
    with open(path, "rb") as handle:
        for name, info in members.items():
            if name.startswith(folder) and not name.endswith("/"):
                _add_member(source, path, handle, name[len(folder) :], info, size)
    return source


def _add_member(
    source: _Source, path: Path, handle: BinaryIO, key: str, info: zipfile.ZipInfo, size: int
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


# --------------------------------------------------------------------------- legacy format


def _read_legacy(path: Path) -> tuple[Any, _Storages, str]:
    """magic, protocol, sys_info, main pickle, storage keys, then ``numel + bytes`` per key."""
    size = file_size(path)
    window = min(size, 1 << 20)
    while True:
        with open(path, "rb") as handle:
            blob = io.BytesIO(handle.read(window))
        try:
            return _parse_legacy(path, blob, size, whole=window == size)
        except _NeedMore:
            if window >= min(size, MAX_PICKLE_BYTES):
                if size > MAX_PICKLE_BYTES:
                    raise LoadError(
                        path, f"pickles exceed the {MAX_PICKLE_BYTES} byte cap"
                    ) from None
                raise LoadError(path, "ends inside its pickles (truncated)") from None
            window = min(size, MAX_PICKLE_BYTES, window * 8)


class _NeedMore(Exception):
    """The window read so far ends inside a pickle."""


def _legacy_pickle(
    path: Path,
    blob: io.BytesIO,
    what: str,
    whole: bool,
    persistent: Callable[[object], object] | None = None,
) -> Any:
    try:
        return restricted_load(blob, path, what, persistent)
    except LoadError:
        # A pickle cut short by the window fails once it has read to the window's end.
        if not whole and blob.tell() >= len(blob.getbuffer()):
            raise _NeedMore() from None
        raise


def _parse_legacy(
    path: Path, blob: io.BytesIO, size: int, whole: bool
) -> tuple[Any, _Storages, str]:
    if _legacy_pickle(path, blob, "magic number", whole) != 0x1950A86A20F9469CFC6C:
        raise LoadError(path, "has a wrong magic number")
    protocol = _legacy_pickle(path, blob, "protocol record", whole)
    if protocol != _LEGACY_PROTOCOL:
        raise LoadError(path, f"uses legacy protocol {_brief(protocol)}; {_REREAD}")
    info = _legacy_pickle(path, blob, "sys_info record", whole)
    if not isinstance(info, dict) or not isinstance(info.get("little_endian"), bool):
        raise LoadError(path, "has a malformed sys_info record")
    order = "little" if info["little_endian"] else "big"
    source = _Source(path, budget.Ledger(path))
    storages = _Storages(path, source, deferred=True)
    root = _legacy_pickle(path, blob, "main pickle", whole, storages.persistent_load)
    keys = _legacy_pickle(path, blob, "storage key list", whole)
    if not isinstance(keys, list) or not all(isinstance(k, str) for k in keys):
        raise LoadError(path, "has a malformed storage key list")
    offset = blob.tell()
    with open(path, "rb") as handle:
        for key in keys:
            ref = storages.refs.get(key)
            if ref is None or key in source.spans:
                raise LoadError(path, f"lists storage {key!r}, which its pickle never uses")
            handle.seek(offset)
            count_bytes = handle.read(8)
            if len(count_bytes) != 8:
                raise LoadError(path, f"ends before storage {key!r} (truncated)")
            numel = int.from_bytes(
                count_bytes, "little" if order == "little" else "big", signed=True
            )
            if ref.kind.untyped or ref.kind.dtype is None:
                raise LoadError(
                    path,
                    f"storage {key!r} has type {ref.kind.torch_name}, which "
                    f"the legacy format cannot size; {_REREAD}",
                )
            itemsize = ALL_DTYPES[ref.kind.dtype].itemsize
            if numel != ref.numel:
                raise LoadError(
                    path,
                    f"storage {key!r} claims {ref.numel} elements but its record holds {numel}",
                )
            start = offset + 8
            offset = start + numel * itemsize
            if offset > size:
                raise LoadError(path, f"storage {key!r} runs past the end of the file")
            source.spans[key] = (start, numel * itemsize)
    missing = [key for key in storages.refs if key not in source.spans]
    if missing:
        raise LoadError(path, f"refers to storage {missing[0]!r}, which the file lacks")
    return root, storages, order


# --------------------------------------------------------------------------- finding weights


@dataclass
class _Found:
    tensors: dict[str, TensorRef]
    where: str | None
    """The key path of the state dict inside the checkpoint (None: the top level)."""
    container: Mapping[Any, Any] | None
    """The dict that held the state dict (where the optimizer would be), if any."""
    stripped: tuple[str, ...]
    skipped: list[str]
    parts: tuple[str, ...] = ()
    """The entries of the container whose tensors were used (one, or several gathered)."""


def _brief(value: object) -> str:
    if isinstance(value, int) and not isinstance(value, bool) and value.bit_length() > 128:
        # repr() of an integer of thousands of digits raises (sys.int_max_str_digits).
        return f"an integer of {value.bit_length():,} bits"
    if isinstance(value, str):
        text = repr(value[:40])
    else:
        text = repr(value) if isinstance(value, (int, float, bool)) else type(value).__name__
    return text if len(text) <= 40 else text[:37] + "..."


def _is_state_dict(value: object) -> bool:
    if not isinstance(value, Mapping) or not value:
        return False
    tensors = sum(1 for k, v in value.items() if isinstance(k, str) and isinstance(v, TensorRef))
    return tensors > 0 and 2 * tensors >= len(value)


class _Walk:
    """One walk over the unpickled structure: each container is judged and flattened once,
    however many memo references lead to it (a pickle can make a dict reachable along 2^n
    paths with n references)."""

    def __init__(self, path: Path) -> None:
        self.path = path
        self.ledger = budget.Ledger(path)
        self.flattened: set[int] = set()
        self.repeated = 0
        """Containers reached again (named once, by the first path that reached them)."""
        self._judged: dict[int, tuple[object, bool]] = {}

    def is_state_dict(self, value: object) -> bool:
        known = self._judged.get(id(value))
        if known is None:
            known = (value, _is_state_dict(value))  # keeps value alive: its id stays its own
            self._judged[id(value)] = known
        return known[1]

    def holds_tensors(self, value: Mapping[Any, Any]) -> bool:
        known = self._judged.get(~id(value))
        if known is None:
            known = (
                value,
                any(isinstance(k, str) and isinstance(v, TensorRef) for k, v in value.items()),
            )
            self._judged[~id(value)] = known
        return known[1]


def _find_weights(root: object, path: Path) -> _Found:
    walk = _Walk(path)
    found = _find_in(root, path, walk)
    if walk.repeated:
        found.skipped.append(
            f"{walk.repeated} references to a dict already read (each dict is read once)"
        )
    return found


def _find_in(root: object, path: Path, walk: _Walk) -> _Found:
    if isinstance(root, TensorRef):
        return _Found({"tensor": root}, None, None, (), [], ())
    if not isinstance(root, Mapping):
        raise LoadError(
            path, f"holds a pickled {type(root).__name__}, not a state dict or a checkpoint dict"
        )
    container: Mapping[Any, Any] = root
    where: list[str] = []
    for _depth in range(3):
        key = _model_key(container)
        if key is None:
            break
        value = container[key]
        if walk.is_state_dict(value):
            return _finish(_flatten(value, walk), ".".join([*where, key]), container, (key,))
        if not isinstance(value, Mapping):
            break
        where.append(key)
        container = value
    if walk.is_state_dict(root):
        return _finish(_flatten(root, walk), None, None)
    # No known key: gather every entry that is a state dict, except optimizer entries.
    parts = [
        k
        for k, v in root.items()
        if isinstance(k, str) and k not in _OPTIMIZER_KEYS and walk.is_state_dict(v)
    ]
    if len(parts) == 1:
        return _finish(_flatten(root[parts[0]], walk), parts[0], root, (parts[0],))
    if parts:
        merged: dict[str, Any] = {}
        for part in parts:
            # A part that is the very dict of an earlier part (memo-shared) is not read again.
            for name, ref in _flatten(root[part], walk)[0].items():
                merged[f"{part}.{name}"] = ref
        return _finish((merged, []), None, root, tuple(parts))
    if walk.holds_tensors(root):
        # Tensors beside other values, under no known key: the top level is the state dict.
        return _finish(_flatten(root, walk), None, None)
    keys = ", ".join(_brief(k) for k in list(root)[:8])
    raise LoadError(
        path,
        f"holds no state dict of tensors steelyard can find (top-level keys: {keys or 'none'})",
    )


def _model_key(container: Mapping[Any, Any]) -> str | None:
    for key in (*_MODEL_KEYS, *_EMA_KEYS):
        if key in container and isinstance(container[key], Mapping):
            return key
    return None


def _flatten(mapping: Mapping[Any, Any], walk: _Walk) -> tuple[dict[str, Any], list[str]]:
    """Tensors of a state dict; nested dicts of tensors get dotted names. Each dict is read
    once (by the first path reaching it), so the walk is linear in the pickle's size."""
    path = walk.path
    out: dict[str, Any] = {}
    skipped: list[str] = []
    if id(mapping) in walk.flattened:
        walk.repeated += 1
        return out, skipped
    walk.flattened.add(id(mapping))
    stack: list[tuple[str, Mapping[Any, Any], int]] = [("", mapping, 0)]
    while stack:
        prefix, current, depth = stack.pop()
        if depth > _MAX_WALK_DEPTH:
            raise LoadError(path, "nests its state dict too deeply")
        walk.ledger.check_time("the state dict")
        nested: list[tuple[str, Mapping[Any, Any], int]] = []
        for key, value in current.items():
            name = f"{prefix}{key}" if isinstance(key, str) else None
            if name is not None and isinstance(value, TensorRef):
                out[name] = value
            elif name is not None and isinstance(value, Mapping) and walk.holds_tensors(value):
                if id(value) in walk.flattened:
                    walk.repeated += 1
                    continue
                walk.flattened.add(id(value))
                nested.append((f"{name}.", value, depth + 1))
            else:
                skipped.append(name if name is not None else _brief(key))
        stack.extend(reversed(nested))
    return out, skipped


def _finish(
    flat: tuple[dict[str, Any], list[str]],
    where: str | None,
    container: Mapping[Any, Any] | None,
    parts: tuple[str, ...] = (),
) -> _Found:
    tensors, skipped = flat
    stripped: list[str] = []
    # Prefixes are matched at a moving offset and cut once at the end: a name repeating
    # "module." a million times costs one pass over its characters, not a copy per prefix.
    start = 0
    changed = True
    while changed and tensors:
        changed = False
        for prefix in _PREFIXES:
            if all(name.startswith(prefix, start) for name in tensors):
                start += len(prefix)
                stripped.append(prefix)
                changed = True
    if start:
        tensors = {name[start:]: ref for name, ref in tensors.items()}
    return _Found(tensors, where, container, tuple(stripped), skipped, parts)


def _strip(name: str, prefixes: tuple[str, ...]) -> str:
    start = 0
    for prefix in prefixes:
        if name.startswith(prefix, start):
            start += len(prefix)
    return name[start:]


def _stripped_notes(prefixes: tuple[str, ...]) -> list[str]:
    """One note per run of the same prefix (a hostile name may repeat one endlessly)."""
    notes: list[str] = []
    run = 0
    for index, prefix in enumerate(prefixes):
        run += 1
        if index + 1 < len(prefixes) and prefixes[index + 1] == prefix:
            continue
        times = "" if run == 1 else f" ({run:,} times)"
        notes.append(f"the {prefix!r} prefix was stripped from every tensor name{times}")
        run = 0
    return notes


def _checkpoint(
    path: Path, root: object, storages: _Storages, order: str, notes: list[str]
) -> Checkpoint:
    found = _find_weights(root, path)
    source = storages.source
    tensors = {
        name: _make_tensor(ref, name, None, source, order) for name, ref in found.tensors.items()
    }
    if found.where is not None:
        notes.append(f"weights read from checkpoint entry {found.where!r}")
    elif len(found.parts) > 1:
        entries = ", ".join(repr(p) for p in found.parts)
        notes.append(f"weights gathered from checkpoint entries {entries}, named <entry>.<name>")
    notes.extend(_stripped_notes(found.stripped))
    if found.skipped:
        notes.append(
            f"{len(found.skipped)} non-tensor entries of the state dict were not read "
            f"(e.g. {found.skipped[0]!r})"
        )
    optimizer = None
    container = found.container
    if container is not None:
        optimizer = _optimizer_state(path, container, found, source, order, notes)
        ema = [k for k in _EMA_KEYS if k in container and k not in found.parts]
        if ema and not set(found.parts) & set(_EMA_KEYS):
            notes.append(f"the checkpoint also holds averaged weights under {ema[0]!r} (not read)")
        others = [
            _brief(k)
            for k in container
            if k not in found.parts
            and k not in _OPTIMIZER_KEYS
            and k not in _EMA_KEYS
            and not isinstance(container[k], TensorRef)
        ]
        if others:
            notes.append(f"other checkpoint entries (not weights): {', '.join(others[:8])}")
    return _units_checked(
        inferred_checkpoint(
            path, Format.PYTORCH, tensors, (path,), file_size(path), notes, optimizer
        )
    )


def _units_checked(checkpoint: Checkpoint) -> Checkpoint:
    """Refuse a layer claiming more units than the budget (rules keep numbers per unit)."""
    for layer in checkpoint.layers:
        budget.check_units(checkpoint.path, layer.units, f"layer {layer.name!r}")
    return checkpoint


# --------------------------------------------------------------------------- optimizer state


class _Ambiguous(Exception):
    """The optimizer state cannot be tied to tensor names without guessing."""


def _optimizer_state(
    path: Path,
    container: Mapping[Any, Any],
    found: _Found,
    source: _Source,
    order: str,
    notes: list[str],
) -> OptimizerState | None:
    keys = [k for k in _OPTIMIZER_KEYS if k in container]
    if not keys:
        return None
    key = keys[0]
    value = container[key]
    if isinstance(value, list):
        if len(value) != 1:
            notes.append(f"{key!r} holds {len(value)} optimizers; their state was not mapped")
            return None
        value = value[0]
    if not (
        isinstance(value, Mapping)
        and isinstance(value.get("state"), Mapping)
        and isinstance(value.get("param_groups"), list)
    ):
        notes.append(f"{key!r} is not a torch optimizer state dict; it was not read")
        return None
    try:
        return _map_optimizer(path, key, value, found, source, order, notes)
    except _Ambiguous as exc:
        notes.append(
            f"the optimizer state in {key!r} could not be mapped to tensor names "
            f"unambiguously ({exc}); it was not used"
        )
        return None


def _plain(value: object) -> bool:
    """A hyper-parameter value cheap to compare: a scalar or a short flat tuple/list of them.
    Anything else is never compared (two separately built memo-shared lists of depth n take
    2^n steps to compare)."""
    scalar = (int, float, str, bool, type(None))
    if isinstance(value, str):
        return len(value) <= 256
    if isinstance(value, int) and not isinstance(value, bool):
        return value.bit_length() <= 128
    if isinstance(value, scalar):
        return True
    return (
        isinstance(value, (tuple, list))
        and len(value) <= 16
        and all(
            isinstance(v, (float, bool)) or (type(v) is int and v.bit_length() <= 128)
            for v in value
        )
    )


def _group_value(groups: list[Mapping[str, Any]], name: str, notes: list[str]) -> Any:
    values = [g.get(name) for g in groups if name in g]
    if not values:
        return None
    if not all(_plain(v) for v in values):
        notes.append(f"param groups hold a structured {name}; it was not read")
        return None
    first = values[0]
    if any(v != first for v in values[1:]):
        numbers = [v for v in values if isinstance(v, (int, float)) and not isinstance(v, bool)]
        if name == "weight_decay" and numbers:
            notes.append(
                f"param groups use different weight decay ({sorted(set(numbers))}); "
                "the largest is reported"
            )
            return max(numbers)
        notes.append(f"param groups disagree on {name}; the first group's value is reported")
    return first


def _number(value: object) -> float | None:
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        return float(value)
    return None


def _map_optimizer(
    path: Path,
    key: str,
    value: Mapping[Any, Any],
    found: _Found,
    source: _Source,
    order: str,
    notes: list[str],
) -> OptimizerState:
    state: Mapping[Any, Any] = value["state"]
    groups = value["param_groups"]
    if not groups or not all(isinstance(g, Mapping) for g in groups):
        raise _Ambiguous("its param_groups are malformed")
    ids: list[int] = []
    for group in groups:
        params = group.get("params")
        if not isinstance(params, list) or not all(
            isinstance(p, int) and not isinstance(p, bool) for p in params
        ):
            raise _Ambiguous("a param group does not list integer parameter ids")
        ids.extend(params)
    if len(set(ids)) != len(ids):
        raise _Ambiguous("a parameter id appears twice")
    names = _names_for(ids, groups, found)
    positions = dict(zip(ids, names, strict=True))
    model = found.tensors

    kind_slots: set[str] = set()
    distinct = {id(entry): entry for entry in state.values() if isinstance(entry, Mapping)}
    for entry in distinct.values():  # entries shared through the memo are read once
        kind_slots.update(k for k in entry if isinstance(k, str))
    decoupled_flag = _group_value(groups, "decoupled_weight_decay", notes)
    decoupled: bool | None = decoupled_flag if isinstance(decoupled_flag, bool) else None
    if {"exp_avg", "exp_avg_sq"} <= kind_slots:
        kind = "adamw" if decoupled else "adam"
        first, second = "exp_avg", "exp_avg_sq"
        if decoupled is None:
            notes.append(
                "the optimizer state does not say whether its weight decay was "
                "decoupled (AdamW) or added to the gradient (Adam)"
            )
    elif "square_avg" in kind_slots:
        kind, first, second = "rmsprop", "grad_avg", "square_avg"
        decoupled = False
    elif "momentum_buffer" in kind_slots or (not kind_slots and "momentum" in groups[0]):
        kind, first, second = "sgd", "momentum_buffer", ""
        decoupled = False
    else:
        kind, first, second = "unknown", "", ""

    slots: dict[str, OptimizerSlots] = {}
    steps: list[float] = []
    for pid, entry in state.items():
        name = _state_name(pid, positions)
        if not isinstance(entry, Mapping):
            raise _Ambiguous(f"the state of parameter {_brief(pid)} is not a dict")
        moments: list[Tensor | None] = []
        for slot in (first, second):
            ref = entry.get(slot) if slot else None
            if ref is None:
                moments.append(None)
                continue
            if not isinstance(ref, TensorRef) or ref.size != model[name].size:
                raise _Ambiguous(
                    f"the {slot} of parameter {_brief(pid)} does not have the "
                    f"shape of {name!r} {list(model[name].size)}"
                )
            moments.append(
                _make_tensor(ref, f"{key}.state.{pid}.{slot}", TensorRole.OPTIMIZER, source, order)
            )
        for slot in ("exp_avg", "exp_avg_sq", "momentum_buffer", "square_avg"):
            other = entry.get(slot)
            if isinstance(other, TensorRef) and other.size != model[name].size:
                raise _Ambiguous(
                    f"the {slot} of parameter {_brief(pid)} does not have the shape of {name!r}"
                )
        step = _step_value(entry.get("step"), f"{key}.state.{pid}.step", source, order)
        if step is not None:
            steps.append(step)
        slots[name] = OptimizerSlots(first_moment=moments[0], second_moment=moments[1])

    betas = _group_value(groups, "betas", notes)
    beta1 = beta2 = None
    if isinstance(betas, (tuple, list)) and len(betas) == 2:
        beta1, beta2 = _number(betas[0]), _number(betas[1])
    elif kind == "rmsprop":
        beta2 = _number(_group_value(groups, "alpha", notes))
    if kind == "sgd":
        beta1 = _number(_group_value(groups, "momentum", notes))
    where = (
        key
        if found.where is None or "." not in found.where
        else (f"{found.where.rsplit('.', 1)[0]}.{key}")
    )
    return OptimizerState(
        kind=kind,
        slots=slots,
        step=int(max(steps)) if steps else None,
        beta1=beta1,
        beta2=beta2,
        eps=_number(_group_value(groups, "eps", notes)),
        weight_decay=_number(_group_value(groups, "weight_decay", notes)),
        decoupled=decoupled,
        source=f"{where} in {path.name}",
    )


def _names_for(ids: list[int], groups: list[Mapping[str, Any]], found: _Found) -> list[str]:
    """Model tensor name of each parameter id, in id order, or raise _Ambiguous."""
    model = found.tensors
    if all("param_names" in g for g in groups):
        names: list[str] = []
        for group in groups:
            listed = group["param_names"]
            if (
                not isinstance(listed, list)
                or len(listed) != len(group["params"])
                or not all(isinstance(n, str) for n in listed)
            ):
                raise _Ambiguous("param_names does not match params")
            names.extend(_strip(n, found.stripped) for n in listed)
        unknown = [n for n in names if n not in model]
        if unknown:
            raise _Ambiguous(f"param_names lists {unknown[0]!r}, which the state dict lacks")
        return names
    trainable: list[str] = []
    seen: set[tuple[str, int, tuple[int, ...], tuple[int, ...]]] = set()
    for name, ref in model.items():
        leaf = name.rsplit(".", 1)[-1]
        if leaf in _BUFFER_LEAVES or ref.dtype is None or not is_float_name(ref.dtype):
            continue
        if ref.identity in seen:
            continue  # a tied copy: named_parameters() lists it once
        seen.add(ref.identity)
        trainable.append(name)
    if len(trainable) != len(ids):
        raise _Ambiguous(
            f"it lists {len(ids)} parameters but the state dict has "
            f"{len(trainable)} trainable tensors"
        )
    return trainable


def _state_name(pid: object, positions: Mapping[int, str]) -> str:
    if isinstance(pid, int) and not isinstance(pid, bool) and pid in positions:
        return positions[pid]
    raise _Ambiguous(f"it holds state for parameter {_brief(pid)}, which no param group lists")


def _step_value(value: object, name: str, source: _Source, order: str) -> float | None:
    if isinstance(value, TensorRef):
        if value.size != () or value.dtype is None:
            return None
        array = _make_tensor(value, name, TensorRole.OPTIMIZER, source, order).read()
        number = float(np.asarray(array, dtype=np.float64).reshape(()))
        return number if math.isfinite(number) and number >= 0 else None
    scalar = _number(value)
    return scalar if scalar is not None and math.isfinite(scalar) and scalar >= 0 else None


# --------------------------------------------------------------------------- TorchScript

_CLASS_LINE = re.compile(r"^class\s+([A-Za-z_]\w*)\s*\(")
_LIST_LINE = re.compile(r"^\s+(__parameters__|__buffers__)\s*=\s*\[(.*)\]\s*$")
_MAX_CODE_BYTES = 10_000_000


@dataclass
class _Declared:
    """What a TorchScript class's code declares as module state."""

    parameters: set[str]
    buffers: set[str]

    @property
    def state(self) -> set[str]:
        """Attributes ``state_dict()`` lists: parameters and buffers."""
        return self.parameters | self.buffers


def _script_code(
    archive: zipfile.ZipFile, members: Mapping[str, zipfile.ZipInfo], prefix: str, path: Path
) -> dict[str, _Declared]:
    """Class qualname → its declared parameters and buffers, read from code/*.py as text
    (never run)."""
    declared: dict[str, _Declared] = {}
    budget = _MAX_CODE_BYTES
    folder = f"{prefix}code/"
    for name, info in members.items():
        if not name.startswith(folder) or not name.endswith(".py"):
            continue
        if info.file_size > budget:
            break
        budget -= info.file_size
        text = _member(archive, info, path, info.file_size).decode("utf-8", "replace")
        module = name[len(folder) : -3].replace("/", ".")
        current: str | None = None
        for line in text.splitlines():
            match = _CLASS_LINE.match(line)
            if match:
                current = f"{module}.{match.group(1)}"
                declared.setdefault(current, _Declared(set(), set()))
                continue
            listed = _LIST_LINE.match(line)
            if current is not None and listed:
                names = set(re.findall(r'"([^"]+)"', listed.group(2)))
                entry = declared[current]
                (entry.parameters if listed.group(1) == "__parameters__" else entry.buffers).update(
                    names
                )
    return declared


def _script_checkpoint(
    path: Path,
    root: object,
    constants: object,
    storages: tuple[_Storages, _Storages],
    order: str,
    declared: Mapping[str, _Declared],
) -> Checkpoint:
    """The module state of a TorchScript archive, named as ``state_dict()`` names it.

    Only parameters and buffers are state. Tensors of the code (``constants.pkl``, which the
    code calls ``CONSTANTS.c<i>``) and plain tensor attributes are not: ``state_dict()`` leaves
    them out, and so does the checkpoint (its notes say how many there were).
    """
    walked = _walk_script(root, declared)
    tensors = {
        name: _make_tensor(ref, name, None, storages[0].source, order)
        for name, ref in walked.named.items()
    }
    notes = ["TorchScript archive: tensors named from its module tree (its code was not run)"]
    code_tensors = (
        [v for v in constants if isinstance(v, TensorRef)] if isinstance(constants, tuple) else []
    )
    for index, ref in enumerate(code_tensors):
        # Checked like any tensor (a view outside its storage is a malformed file), never read.
        _make_tensor(ref, f"CONSTANTS.c{index}", TensorRole.BOOKKEEPING, storages[1].source, order)
    elements = sum(math.prod(ref.size) for ref in code_tensors)
    if code_tensors:
        notes.append(
            f"{_count(len(code_tensors), 'tensor')} ({_count(elements, 'value')}) in "
            "constants.pkl: constants of the archive's code, not module state, not counted"
        )
    if walked.lists:
        notes.append(f"{walked.lists} tensors held only in lists were named <attribute>.<index>")
    if walked.attributes:
        notes.append(
            f"{_count(len(walked.attributes), 'tensor attribute')} neither parameter nor "
            f"buffer (e.g. {walked.attributes[0]!r}): not module state, not counted"
        )
    if walked.unread:
        notes.append(
            f"{walked.unread} objects of custom TorchScript classes (e.g. packed weights) "
            "could not be read"
        )
    if walked.missing:
        notes.append(
            f"{len(walked.missing)} declared parameters were not found in the module tree "
            f"(e.g. {walked.missing[0]!r})"
        )
    if not tensors:
        if code_tensors:
            raise LoadError(
                path,
                f"is a TorchScript archive whose only tensors are "
                f"{_count(len(code_tensors), 'constant')} of its code "
                f"({_count(elements, 'value')}), not module state (a torch.jit.freeze output?); "
                "save the module before freezing it",
            )
        raise LoadError(path, "is a TorchScript archive with no tensors steelyard can find")
    return _units_checked(
        inferred_checkpoint(path, Format.PYTORCH, tensors, (path,), file_size(path), notes)
    )


def _count(number: int, noun: str) -> str:
    return f"{number:,} {noun}{'' if number == 1 else 's'}"


@dataclass
class _Walked:
    named: dict[str, TensorRef]
    """Module state by ``state_dict()`` name."""
    unread: int
    lists: int
    missing: list[str]
    attributes: list[str]
    """Tensor attributes of declared classes that are neither parameters nor buffers."""


def _walk_script(root: object, declared: Mapping[str, _Declared]) -> _Walked:
    named: dict[str, TensorRef] = {}
    seen: set[tuple[str, int, tuple[int, ...], tuple[int, ...]]] = set()
    unread = lists = 0
    missing: list[str] = []
    attributes: list[str] = []
    visited: set[int] = set()

    def objects() -> Iterator[tuple[str, ScriptObject, int]]:
        stack: list[tuple[str, object, int]] = [("", root, 0)]
        while stack:
            prefix, obj, depth = stack.pop()
            if isinstance(obj, ScriptObject) and id(obj) not in visited and depth <= 100:
                visited.add(id(obj))
                yield prefix, obj, depth
                if isinstance(obj.state, dict):
                    children = [
                        (f"{prefix}{k}.", v, depth + 1)
                        for k, v in obj.state.items()
                        if isinstance(k, str) and isinstance(v, ScriptObject)
                    ]
                    stack.extend(reversed(children))

    found = list(objects())
    for prefix, obj, _depth in found:
        if not isinstance(obj.state, dict):
            unread += 1
            continue
        # The class's code says which attributes are state; without code, every tensor is.
        known = declared.get(obj.qualname)
        for key, value in obj.state.items():
            if isinstance(key, str) and isinstance(value, TensorRef):
                if known is not None and key not in known.state:
                    attributes.append(f"{prefix}{key}")
                    continue
                named[f"{prefix}{key}"] = value
                seen.add(value.identity)
    # Lists (an LSTM's _flat_weights) mostly repeat named tensors: keep only the new ones, and
    # only for classes whose code is missing (for the others a list attribute is not state).
    for prefix, obj, _depth in found:
        if not isinstance(obj.state, dict):
            continue
        known = declared.get(obj.qualname)
        for key, value in obj.state.items():
            if not isinstance(key, str) or not isinstance(value, list):
                continue
            for index, item in enumerate(value):
                if isinstance(item, TensorRef) and item.identity not in seen:
                    if known is not None:
                        attributes.append(f"{prefix}{key}.{index}")
                        continue
                    named[f"{prefix}{key}.{index}"] = item
                    seen.add(item.identity)
                    lists += 1
        if known is not None:
            # Over the object's own attributes, not every declared parameter: many objects of
            # a class declaring many parameters would otherwise cost objects x parameters.
            missing.extend(
                sorted(
                    f"{prefix}{key}"
                    for key, value in obj.state.items()
                    if isinstance(key, str)
                    and key in known.parameters
                    and value is not None
                    and f"{prefix}{key}" not in named
                )
            )
    return _Walked(named, unread, lists, missing, attributes)
