"""PyTorch checkpoints (``torch.save`` zip and legacy files, ``torch.jit.save`` archives).

Nothing in the file is executed and torch is not imported: pickles go through
:mod:`~steelyard.loaders.pytorch.unpickler`, which turns tensors into
:class:`~steelyard.loaders.pytorch.stand_ins.TensorRef` records. This module tells the archive
kinds apart and puts a checkpoint together from the parts that read them:
:mod:`~steelyard.loaders.pytorch.storages` (storage bytes, lazy tensors, budgets),
:mod:`~steelyard.loaders.pytorch.legacy` (the pre-1.6 format),
:mod:`~steelyard.loaders.pytorch.state_dict` (where the weights are in the unpickled tree),
:mod:`~steelyard.loaders.pytorch.optimizer` (optimizer state by tensor name) and
:mod:`~steelyard.loaders.pytorch.torchscript` (TorchScript module state).
"""

from __future__ import annotations

import zipfile
from pathlib import Path
from typing import Any

from steelyard import budget
from steelyard.errors import LoadError
from steelyard.graph import Checkpoint, Format
from steelyard.loaders.base import file_size, open_zip, safe_zip_names
from steelyard.loaders.conventions import inferred_checkpoint
from steelyard.loaders.pytorch.legacy import read_legacy
from steelyard.loaders.pytorch.optimizer import optimizer_state
from steelyard.loaders.pytorch.stand_ins import ScriptObject, TensorRef
from steelyard.loaders.pytorch.state_dict import (
    EMA_KEYS,
    OPTIMIZER_KEYS,
    brief,
    find_weights,
    stripped_notes,
)
from steelyard.loaders.pytorch.storages import (
    REREAD,
    StorageTable,
    make_tensor,
    zip_member,
    zip_source,
)
from steelyard.loaders.pytorch.torchscript import script_checkpoint, script_code
from steelyard.loaders.pytorch.unpickler import MAX_PICKLE_BYTES, restricted_load
from steelyard.loaders.signatures import TORCH_LEGACY_MAGIC, ZIP_MAGIC, torch_tar


class PytorchLoader:
    """``torch.save`` zip archives (any record name), TorchScript archives, legacy files."""

    format = Format.PYTORCH

    def sniff(self, path: Path, head: bytes) -> bool:
        if head.startswith(TORCH_LEGACY_MAGIC) or torch_tar(head):
            return True
        if not head.startswith(ZIP_MAGIC):
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
        if torch_tar(head):
            raise LoadError(path, f"is a pre-0.4 PyTorch tar checkpoint; {REREAD}")
        if head.startswith(TORCH_LEGACY_MAGIC):
            root, storages, order = read_legacy(path)
            return _checkpoint(path, root, storages, order, [])
        return _read_zip(path)


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
    return zip_member(archive, info, path, info.file_size)


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
            text = zip_member(archive, members[f"{prefix}byteorder"], path, 16)
            if text not in (b"little", b"big"):
                raise LoadError(path, f"byteorder record says {text[:16]!r}")
            order = text.decode()
        script = f"{prefix}constants.pkl" in members or any(
            name.startswith(f"{prefix}code/") for name in members
        )
        sources = {
            folder: zip_source(path, members, f"{prefix}{folder}/", size, ledger)
            for folder in ("data", "constants")
        }
        pickled = _pickle_member(archive, members[records[0]], path, "data.pkl")
        storages = StorageTable(path, sources["data"])
        root = restricted_load(pickled, path, "data.pkl", storages.persistent_load, script, ledger)
        notes: list[str] = []
        if script or isinstance(root, ScriptObject):
            code = script_code(archive, members, prefix, path)
            constants: Any = ()
            constant_storages = StorageTable(path, sources["constants"])
            if f"{prefix}constants.pkl" in members:
                blob = _pickle_member(
                    archive, members[f"{prefix}constants.pkl"], path, "constants.pkl"
                )
                constants = restricted_load(
                    blob, path, "constants.pkl", constant_storages.persistent_load, True, ledger
                )
            return _units_checked(
                script_checkpoint(path, root, constants, (storages, constant_storages), order, code)
            )
    return _checkpoint(path, root, storages, order, notes)


def _checkpoint(
    path: Path, root: object, storages: StorageTable, order: str, notes: list[str]
) -> Checkpoint:
    found = find_weights(root, path)
    source = storages.source
    tensors = {
        name: make_tensor(ref, name, None, source, order) for name, ref in found.tensors.items()
    }
    if found.where is not None:
        notes.append(f"weights read from checkpoint entry {found.where!r}")
    elif len(found.parts) > 1:
        entries = ", ".join(repr(p) for p in found.parts)
        notes.append(f"weights gathered from checkpoint entries {entries}, named <entry>.<name>")
    notes.extend(stripped_notes(found.stripped))
    if found.skipped:
        notes.append(
            f"{len(found.skipped)} non-tensor entries of the state dict were not read "
            f"(e.g. {found.skipped[0]!r})"
        )
    optimizer = None
    container = found.container
    if container is not None:
        optimizer = optimizer_state(path, container, found, source, order, notes)
        ema = [k for k in EMA_KEYS if k in container and k not in found.parts]
        if ema and not set(found.parts) & set(EMA_KEYS):
            notes.append(f"the checkpoint also holds averaged weights under {ema[0]!r} (not read)")
        others = [
            brief(k)
            for k in container
            if k not in found.parts
            and k not in OPTIMIZER_KEYS
            and k not in EMA_KEYS
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
