"""The legacy (pre-1.6) ``torch.save`` format: a run of pickles (magic number, protocol,
sys_info, the main pickle, the storage keys) followed by each storage as ``numel`` + bytes.

The pickles are read through a growing window of the file (capped at the pickle byte cap);
every storage is checked against what the main pickle claims before it is mapped.
"""

from __future__ import annotations

import io
from collections.abc import Callable
from pathlib import Path
from typing import Any

from steelyard import budget
from steelyard.dtypes import ALL_DTYPES
from steelyard.errors import LoadError
from steelyard.loaders.base import file_size
from steelyard.loaders.pytorch.state_dict import brief
from steelyard.loaders.pytorch.storages import REREAD, StorageSource, StorageTable
from steelyard.loaders.pytorch.unpickler import MAX_PICKLE_BYTES, restricted_load

_LEGACY_PROTOCOL = 1001


def read_legacy(path: Path) -> tuple[Any, StorageTable, str]:
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
) -> tuple[Any, StorageTable, str]:
    if _legacy_pickle(path, blob, "magic number", whole) != 0x1950A86A20F9469CFC6C:
        raise LoadError(path, "has a wrong magic number")
    protocol = _legacy_pickle(path, blob, "protocol record", whole)
    if protocol != _LEGACY_PROTOCOL:
        raise LoadError(path, f"uses legacy protocol {brief(protocol)}; {REREAD}")
    info = _legacy_pickle(path, blob, "sys_info record", whole)
    if not isinstance(info, dict) or not isinstance(info.get("little_endian"), bool):
        raise LoadError(path, "has a malformed sys_info record")
    order = "little" if info["little_endian"] else "big"
    source = StorageSource(path, budget.Ledger(path))
    storages = StorageTable(path, source, deferred=True)
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
                    f"the legacy format cannot size; {REREAD}",
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
