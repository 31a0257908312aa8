"""What every loader is, and the safety helpers they share.

A loader recognises its format from the file's content and turns the file into a
:class:`~steelyard.graph.Checkpoint`. It reads tensors lazily and knows nothing of rules.
Every failure is a :class:`~steelyard.errors.LoadError` naming the file.
"""

from __future__ import annotations

import json
import os
import zipfile
import zlib
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any, Protocol

import numpy as np

from steelyard import budget
from steelyard.errors import LoadError
from steelyard.graph import Checkpoint, Format, Layer, OptimizerState, Tensor, TensorRole
from steelyard.loaders.spill import spilled

#: Largest JSON/pickle/config blob any loader will parse (bounded memory on hostile input).
MAX_METADATA_BYTES = 100_000_000


class Loader(Protocol):
    """One checkpoint format."""

    format: Format

    def sniff(self, path: Path, head: bytes) -> bool:
        """True when the file at ``path`` (whose first bytes are ``head``) is this format."""
        ...

    def load(self, path: Path) -> Checkpoint:
        """Read the file's structure (not its tensors) into a checkpoint."""
        ...


#: What a loader read from a file: tensors by name, layers, optimizer state, its notes.
Reading = tuple[dict[str, Tensor], tuple[Layer, ...], OptimizerState | None, list[str]]


def checkpoint_from(
    path: Path,
    format: Format,
    size: int,
    read: Reading,
    files: Sequence[Path],
    notes: Sequence[str] = (),
) -> Checkpoint:
    """The checkpoint of ``path`` from what its loader read; ``files`` are every file read
    (the main one first) and ``notes`` come before the reading's own."""
    tensors, layers, optimizer, more = read
    return Checkpoint(
        path=str(path),
        format=format,
        tensors=tensors,
        layers=layers,
        file_size=size,
        files=tuple(str(f) for f in files),
        optimizer=optimizer,
        notes=(*notes, *more),
    )


def float32_tensor(
    name: str,
    shape: tuple[int, ...],
    role: TensorRole,
    reader: Callable[[], np.ndarray],
    read_span: Callable[[int, int], np.ndarray] | None,
    stored_type: str | None = None,
    fill_span: Callable[[int, int, np.ndarray], None] | None = None,
    factors: Callable[[], tuple[np.ndarray, np.ndarray]] | None = None,
) -> Tensor:
    """A tensor computed as float32 when read (a dequantized GGUF block or packed weight, an
    adapter's update): ``f32`` whatever lies beneath it, which ``stored_type`` names;
    ``factors`` when it is a low-rank product (see :attr:`Tensor.factors`)."""
    return Tensor(
        name=name,
        shape=shape,
        dtype="f32",
        role=role,
        reader=reader,
        read_span=read_span,
        stored_type=stored_type,
        fill_span=fill_span,
        factors=factors,
    )


def read_exactly(path: Path, offset: int, out: np.ndarray, short: str) -> None:
    """Fill the C-contiguous ``out`` with the bytes at ``offset`` of ``path``; a file that
    ends first raises ``LoadError(path, short)``.

    Positioned reads into the caller's array rather than a memory map: mapped pages that were
    read stay in the process's resident set until the kernel needs them back, so a map of a
    3 GB checkpoint ends up counted as 3 GB however carefully it is streamed. A private file
    object per call keeps concurrent reads from several threads safe."""
    view = out.reshape(-1).view(np.uint8).data
    with open(path, "rb", buffering=0) as handle:
        handle.seek(offset)
        done = 0
        while done < view.nbytes:
            got = handle.readinto(view[done:])
            if not got:
                raise LoadError(path, short)
            done += got


def inside(folder: Path, relative: str, source: Path) -> Path:
    """Resolve ``relative`` strictly inside ``folder``, or refuse.

    Absolute paths, ``..`` components, links, FIFOs, devices and paths that escape are all
    refused, because a checkpoint must never make steelyard read a file outside the model's
    folder (one rule for every reader: :func:`steelyard.safepath.confined`).
    """
    from steelyard.safepath import confined

    return confined(folder, relative, source)


def safe_zip_names(archive: zipfile.ZipFile, path: Path) -> dict[str, zipfile.ZipInfo]:
    """Member names of a zip, refusing traversal names and duplicate members."""
    members: dict[str, zipfile.ZipInfo] = {}
    for info in archive.infolist():
        name = info.filename
        parts = name.replace("\\", "/").split("/")
        if name.startswith(("/", "\\")) or ".." in parts or (parts and ":" in parts[0]):
            raise LoadError(path, f"archive member {name!r} has a path-traversal name")
        if name in members:
            raise LoadError(path, f"archive member {name!r} appears twice")
        if (
            info.compress_type != zipfile.ZIP_STORED
            and info.file_size > 1100 * info.compress_size + 4096
        ):
            # Deflate cannot expand more than ~1032:1; a larger claim is a zip bomb or a lie.
            raise LoadError(path, f"archive member {name!r} claims an impossible compression ratio")
        members[name] = info
    return members


#: What reading a damaged zip member raises; always converted to LoadError.
_ZIP_ERRORS = (zipfile.BadZipFile, OSError, EOFError, ValueError, NotImplementedError, zlib.error)


def read_zip_member(
    archive: zipfile.ZipFile, info: zipfile.ZipInfo, path: Path, limit: int = MAX_METADATA_BYTES
) -> bytes:
    """Read one (small) zip member, refusing members larger than ``limit``."""
    if info.file_size > limit:
        raise LoadError(path, f"archive member {info.filename!r} claims {info.file_size} bytes")
    try:
        with archive.open(info) as stream:
            data = stream.read(limit + 1)
    except _ZIP_ERRORS as exc:
        raise LoadError(path, f"archive member {info.filename!r} is unreadable ({exc})") from None
    if len(data) > limit:
        raise LoadError(path, f"archive member {info.filename!r} is larger than it claims")
    return data


def member_expansion(path: Path, info: zipfile.ZipInfo) -> int:
    """Bytes a member would add by being inflated (0 when stored), refused now when above the
    per-object expansion budget. Callers charge the result to their checkpoint's Ledger, so
    the refusal comes before any byte is inflated."""
    if info.compress_type == zipfile.ZIP_STORED:
        return 0
    what = f"archive member {info.filename!r}"
    budget.check_expansion(path, info.file_size, info.compress_size, what)
    return max(0, info.file_size - info.compress_size)


def inflate_member(path: Path, info: zipfile.ZipInfo, target: Path) -> None:
    """Stream one member into the file ``target`` in 1 MiB pieces (memory stays bounded),
    refusing a member that inflates to more or fewer bytes than it claims or fails its CRC."""
    if info.flag_bits & 0x1:
        raise LoadError(path, f"archive member {info.filename!r} is encrypted")
    written = 0
    try:
        with (
            zipfile.ZipFile(path) as archive,
            archive.open(info) as stream,
            open(target, "wb") as out,
        ):
            while piece := stream.read(1 << 20):
                written += len(piece)
                if written > info.file_size:
                    raise LoadError(
                        path, f"archive member {info.filename!r} is larger than it claims"
                    )
                out.write(piece)
    except LoadError:
        raise
    except _ZIP_ERRORS as exc:
        raise LoadError(path, f"archive member {info.filename!r} is unreadable ({exc})") from None
    if written != info.file_size:
        raise LoadError(path, f"archive member {info.filename!r} is shorter than it claims")


def spill_member(path: Path, info: zipfile.ZipInfo) -> Path:
    """A file holding the inflated bytes of ``info``: inflated the first time it is asked for
    in this run, the same file afterwards (see :mod:`steelyard.loaders.spill`)."""
    stat = os.stat(path)
    key = ("zip", str(path.resolve()), stat.st_size, stat.st_mtime_ns, info.header_offset)
    return spilled(key, lambda target: inflate_member(path, info, target))


#: What opening a file that is not, or not quite, a zip archive raises.
_ZIP_OPEN_ERRORS = (zipfile.BadZipFile, OSError, ValueError, EOFError, NotImplementedError)


def open_zip(path: Path) -> zipfile.ZipFile:
    """Open a zip archive or raise a clean error."""
    try:
        return zipfile.ZipFile(path)
    except _ZIP_OPEN_ERRORS as exc:
        raise LoadError(path, f"is not a readable zip archive ({exc})") from None


def zip_names_for_sniff(path: Path) -> list[str] | None:
    """Member names from a zip's central directory (nothing inflated), for a loader's
    ``sniff``; None when the file does not open as a zip archive."""
    try:
        with zipfile.ZipFile(path) as archive:
            return archive.namelist()
    except _ZIP_OPEN_ERRORS:
        return None


def _no_duplicates(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for key, value in pairs:
        if key in out:
            raise ValueError(f"duplicate key {key!r}")
        out[key] = value
    return out


def parse_json(raw: bytes | str, source: Path, what: str) -> Any:
    """Parse a JSON blob from the file, refusing oversized blobs and duplicate keys.

    Every loader's JSON (safetensors headers and indexes, Keras configs) comes through here,
    so hostile metadata is refused the same way, with the same message, in every format.
    """
    if len(raw) > MAX_METADATA_BYTES:
        raise LoadError(source, f"{what} is larger than the 100 MB cap")
    try:
        text = raw.decode("utf-8") if isinstance(raw, bytes) else raw
        return json.loads(text, object_pairs_hook=_no_duplicates)
    except (UnicodeDecodeError, ValueError, RecursionError) as exc:
        raise LoadError(source, f"{what} is not valid JSON ({exc})") from None


def file_size(path: Path) -> int:
    """Size in bytes of a regular file."""
    return os.stat(path).st_size
