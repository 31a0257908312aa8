"""Keras 3 ``.keras`` archives: a zip of ``config.json``, ``metadata.json`` and
``model.weights.h5``.

The weights member is read in place: Keras stores it uncompressed, so h5py gets a bounded
window onto the archive's bytes and tensors are byte ranges of the archive (nothing is
unpacked to disk). A compressed member is checked against the expansion budget from its
claimed size before a byte is inflated, then inflated once per run, streamed into the spill
folder (:mod:`steelyard.loaders.spill`): h5py opens that file by name in its sandbox and
tensors are byte ranges of it, so no read inflates the member again. ``config.json`` supplies
the layer classes, links, activations, constraints, regularizers and the optimizer's
hyperparameters.
"""

from __future__ import annotations

import struct
import zipfile
from dataclasses import replace
from pathlib import Path

from steelyard import budget
from steelyard.errors import LoadError
from steelyard.graph import Checkpoint, Format
from steelyard.loaders.base import (
    checkpoint_from,
    file_size,
    member_expansion,
    open_zip,
    parse_json,
    read_zip_member,
    safe_zip_names,
    spill_member,
    zip_names_for_sniff,
)
from steelyard.loaders.keras import hdf5_access as kh
from steelyard.loaders.keras import optimizer as ko
from steelyard.loaders.keras.h5_file import Location
from steelyard.loaders.keras.hdf5_access import H5Store
from steelyard.loaders.keras.model_config import parse_model
from steelyard.loaders.keras.weights_h5 import read_weights_h5
from steelyard.loaders.sandbox import isolated
from steelyard.loaders.signatures import ZIP_MAGIC

CONFIG = "config.json"
METADATA = "metadata.json"
WEIGHTS = "model.weights.h5"
NPZ_WEIGHTS = "model.weights.npz"
#: Largest compressed weights member inflated at all (to disk; the expansion budget usually
#: refuses a bomb long before).
MAX_INFLATED = 1 << 36
_LOCAL_HEADER = struct.Struct("<4s5H3L2H")


def _data_start(path: Path, info: zipfile.ZipInfo, archive_size: int) -> int:
    """Offset of a stored member's bytes, from its local header (checked against the file)."""
    with open(path, "rb") as handle:
        handle.seek(info.header_offset)
        header = handle.read(_LOCAL_HEADER.size)
    if len(header) != _LOCAL_HEADER.size:
        raise LoadError(path, f"archive member {info.filename!r} has a truncated local header")
    fields = _LOCAL_HEADER.unpack(header)
    if fields[0] != ZIP_MAGIC:
        raise LoadError(path, f"archive member {info.filename!r} has a damaged local header")
    name_length, extra_length = int(fields[-2]), int(fields[-1])
    start = info.header_offset + _LOCAL_HEADER.size + name_length + extra_length
    if start + info.compress_size > archive_size:
        raise LoadError(path, f"archive member {info.filename!r} runs past the end of the file")
    return start


class KerasArchiveLoader:
    """``.keras`` zip archives written by Keras 3."""

    format = Format.KERAS

    def sniff(self, path: Path, head: bytes) -> bool:
        """A zip whose members include ``config.json`` and the model's weights file."""
        names = zip_names_for_sniff(path) if head[:4] == ZIP_MAGIC else None
        return names is not None and CONFIG in names and (WEIGHTS in names or NPZ_WEIGHTS in names)

    def load(self, path: Path) -> Checkpoint:
        """Read the archive's structure (in a time-limited child process); tensors stay in
        the archive (or its one inflated copy) until read."""
        spill, spent = _inflate_weights(path)
        return isolated(path, load_archive, (path, spill, spent), kh.load_timeout())


def _inflate_weights(path: Path) -> tuple[Path | None, int]:
    """A compressed ``model.weights.h5``: checked against the budget from its claimed size,
    then inflated once (spill file). Returns the file and the expansion charged."""
    with open_zip(path) as archive:
        info = safe_zip_names(archive, path).get(WEIGHTS)
    if info is None or info.compress_type == zipfile.ZIP_STORED:
        return None, 0
    if info.flag_bits & 0x1:
        raise LoadError(path, f"archive member {WEIGHTS!r} is encrypted")
    if info.file_size > MAX_INFLATED:
        raise LoadError(
            path, f"archive member {WEIGHTS!r} inflates to {info.file_size} bytes, over the cap"
        )
    ledger = budget.Ledger(path)
    ledger.charge(member_expansion(path, info), f"archive member {WEIGHTS!r}")
    return spill_member(path, info), ledger.spent


def load_archive(path: Path, spill: Path | None = None, spent: int = 0) -> Checkpoint:
    """The checkpoint of one ``.keras`` archive (runs inside :func:`isolated`); ``spill`` is
    the inflated weights member when it is compressed, ``spent`` the expansion it cost."""
    size = file_size(path)
    with open_zip(path) as archive:
        members = safe_zip_names(archive, path)
        if WEIGHTS not in members:
            if NPZ_WEIGHTS in members:
                raise LoadError(
                    path,
                    f"keeps its weights in {NPZ_WEIGHTS}, which holds pickled objects (refused)",
                )
            raise LoadError(path, f"is a zip archive without {WEIGHTS}")
        if CONFIG not in members:
            raise LoadError(path, f"is a zip archive without {CONFIG}")
        config = parse_json(read_zip_member(archive, members[CONFIG], path), path, CONFIG)
        notes: list[str] = []
        if METADATA in members:
            metadata = parse_json(read_zip_member(archive, members[METADATA], path), path, METADATA)
            version = metadata.get("keras_version") if isinstance(metadata, dict) else None
            if isinstance(version, str):
                notes.append(f"saved by Keras {version[:40]}")
        info = members[WEIGHTS]
        if info.flag_bits & 0x1:
            raise LoadError(path, f"archive member {WEIGHTS!r} is encrypted")
        if info.compress_type == zipfile.ZIP_STORED:
            if info.compress_size != info.file_size:
                raise LoadError(path, f"archive member {WEIGHTS!r} has inconsistent sizes")
            location = Location(path, info.file_size, start=_data_start(path, info, size))
        else:
            if spill is None or spill.stat().st_size != info.file_size:
                raise LoadError(path, f"archive member {WEIGHTS!r} was not inflated")
            location = Location(path, info.file_size, spill=spill)
    if not isinstance(config, dict):
        raise LoadError(path, f"{CONFIG} is not a JSON object")
    graph = parse_model(config, path)
    if graph is None:
        notes.append(f"{CONFIG} does not list the model's layers (subclassed model?)")
    else:
        notes.extend(graph.notes)
    compile_config = config.get("compile_config")
    opt = ko.optimizer_config(
        compile_config.get("optimizer") if isinstance(compile_config, dict) else None
    )
    store = H5Store(path, location, spent)
    with store.open() as f:
        reading, metadata = read_weights_h5(store, f, graph, opt)
    checkpoint = checkpoint_from(path, Format.KERAS, size, reading, (path,), notes)
    return replace(checkpoint, metadata=metadata) if metadata else checkpoint
