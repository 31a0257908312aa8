"""Which files steelyard may open: confinement inside a model's folder, and side files.

Two kinds of files are opened on a user's behalf:

* files **found inside a model's folder** (a folder walk, the shards an index names, an ONNX
  model's external data, a ``config.json`` or layout file beside a checkpoint). One helper,
  :func:`entry_problem`, decides whether such a file may be opened: a regular file, reached
  without any symbolic link, that resolves inside the folder. A checkpoint received from a
  stranger must never make steelyard read, hash or audit a file outside it, and a FIFO,
  socket or device must never be read at all (a FIFO blocks forever, ``/dev/zero`` is
  endless).
* **side files** named by the user or found by name (a policy, a ``pyproject.toml`` in a
  parent folder, a baseline, a layout or config file). :func:`read_side_file` opens them with
  ``O_NONBLOCK`` (so opening a FIFO cannot block), checks with ``fstat`` on the open
  descriptor that it is a regular file (so a link to a device is refused, and the check and
  the read concern the same file), and reads at most a size cap.
"""

from __future__ import annotations

import os
import stat
from collections.abc import Callable
from pathlib import Path
from typing import BinaryIO

from steelyard.errors import LoadError, SteelyardError

#: Largest side file (policy, baseline, layout, config) read by default.
SIDE_FILE_BYTES = 64 * 2**20

_NONBLOCK = getattr(os, "O_NONBLOCK", 0)
_CLOEXEC = getattr(os, "O_CLOEXEC", 0)
_BINARY = getattr(os, "O_BINARY", 0)


#: What each kind of file is called in messages, in the order the kinds are tried.
_KINDS: tuple[tuple[Callable[[int], bool], str], ...] = (
    (stat.S_ISREG, "a regular file"),
    (stat.S_ISDIR, "a folder"),
    (stat.S_ISLNK, "a symbolic link"),
    (stat.S_ISFIFO, "a FIFO"),
    (stat.S_ISSOCK, "a socket"),
    (stat.S_ISCHR, "a character device"),
    (stat.S_ISBLK, "a block device"),
)


def kind_of(mode: int) -> str:
    """What a file of ``st_mode`` ``mode`` is, for messages ("a FIFO", "a folder", …)."""
    return next((name for is_kind, name in _KINDS if is_kind(mode)), "not a regular file")


def _within(path: Path, base: Path) -> bool:
    return path == base or base in path.parents


def _place(path: Path, base: Path) -> str:
    """Where ``path`` leads once every link is followed: ``inside`` ``base``, ``outside`` it,
    or ``unresolved`` (a link loop, a part that vanished meanwhile)."""
    try:
        resolved = path.resolve()
    except (OSError, RuntimeError):
        return "unresolved"
    return "inside" if _within(resolved, base) else "outside"


#: Why a symbolic link found in a model's folder is not followed, by where it leads.
_LINK_REFUSED = {
    "unresolved": "symbolic link that cannot be resolved, not followed",
    "outside": "symbolic link to a file outside the folder, not followed",
    "inside": "symbolic link, not followed",
}

#: Why a regular file found in a model's folder may not be opened, by where its path leads
#: (outside only through a linked parent folder); None: it may be opened.
_FILE_REFUSED: dict[str, str | None] = {
    "unresolved": "cannot be resolved",
    "outside": "resolves outside the folder (a linked parent folder), not followed",
    "inside": None,
}


def entry_problem(path: Path, folder: Path) -> str | None:
    """Why ``path``, found inside ``folder``, may not be opened; None when it may.

    Refused: a symbolic link (never followed inside a model's folder; the reason says when it
    leads outside), anything but a regular file (FIFO, socket, device, folder), and a path
    that resolves outside ``folder`` through a linked parent folder.
    """
    try:
        info = os.lstat(path)
    except OSError as exc:
        return f"cannot be examined ({exc.strerror})"
    base = folder.resolve()
    if stat.S_ISLNK(info.st_mode):
        return _LINK_REFUSED[_place(path, base)]
    if not stat.S_ISREG(info.st_mode):
        return f"{kind_of(info.st_mode)}, not a regular file"
    return _FILE_REFUSED[_place(path, base)]


def confined(folder: Path, relative: str, source: Path) -> Path:
    """The file ``relative`` names inside ``folder``, for a reference found in ``source``
    (a shard index, an ONNX model); refused with a :class:`LoadError` unless
    :func:`entry_problem` allows it.

    Absolute paths and ``..`` components are refused before anything is looked at."""
    if not relative or "\x00" in relative:
        raise LoadError(source, f"refers to an invalid file name {relative!r}")
    candidate = Path(relative)
    if candidate.is_absolute() or relative.startswith(("/", "\\")) or ":" in candidate.parts[0]:
        raise LoadError(source, f"refers to an absolute path {relative!r}, which is refused")
    if any(part == ".." for part in Path(relative.replace("\\", "/")).parts):
        raise LoadError(source, f"refers to {relative!r}, which leaves the model's folder")
    base = folder.resolve()
    target = base / candidate
    if not os.path.lexists(target):
        raise LoadError(source, f"refers to {relative!r}, which does not exist")
    problem = entry_problem(target, base)
    if problem is not None:
        raise LoadError(source, f"refers to {relative!r}, which is refused: {problem}")
    return target.resolve()


def open_regular(path: Path) -> BinaryIO:
    """Open ``path`` for reading only if it is a regular file, without ever blocking.

    ``O_NONBLOCK`` makes opening a FIFO return at once; ``fstat`` on the descriptor then
    refuses anything but a regular file (links are followed: the user named the path)."""
    try:
        descriptor = os.open(path, os.O_RDONLY | _NONBLOCK | _CLOEXEC | _BINARY)
    except OSError as exc:
        raise LoadError(path, f"cannot be opened ({exc.strerror})") from None
    try:
        info = os.fstat(descriptor)
        if not stat.S_ISREG(info.st_mode):
            raise LoadError(path, f"is {kind_of(info.st_mode)}, not a regular file")
        if _NONBLOCK:
            os.set_blocking(descriptor, True)
        return os.fdopen(descriptor, "rb")
    except BaseException:
        os.close(descriptor)
        raise


def read_side_file(
    path: Path,
    what: str,
    limit: int = SIDE_FILE_BYTES,
    error: Callable[[str], SteelyardError] | None = None,
) -> bytes:
    """The bytes of the side file ``path`` (a ``what``: "policy file", "baseline", …).

    Refused (with ``error(reason)``, by default a :class:`LoadError` naming the file) unless it
    is a regular file of at most ``limit`` bytes. The size is checked on the open descriptor
    and again while reading, so a file that grows, or a link swapped for a device in between,
    cannot make the read unbounded.
    """

    def fail(reason: str) -> SteelyardError:
        return error(f"{path}: {reason}") if error is not None else LoadError(path, reason)

    try:
        handle = open_regular(path)
    except LoadError as refused:
        if not os.path.lexists(path):
            raise fail(f"{what} does not exist") from None
        raise fail(f"{what} {refused.reason}") from None
    with handle:
        size = os.fstat(handle.fileno()).st_size
        if size > limit:
            raise fail(f"{what} is larger than the {limit:,}-byte cap ({size:,} bytes)")
        try:
            data = handle.read(limit + 1)
        except OSError as exc:
            raise fail(f"{what} cannot be read ({exc.strerror})") from None
    if len(data) > limit:
        raise fail(f"{what} is larger than the {limit:,}-byte cap")
    return data


def read_beside(source: Path, name: str, what: str, limit: int = SIDE_FILE_BYTES) -> bytes | None:
    """The bytes of the file ``name`` beside the checkpoint ``source`` (a ``config.json``, a
    layout file), or None when there is none. Present but refused by :func:`entry_problem`
    (a link, a FIFO, a device) counts as absent: such a file is never opened."""
    folder = source.parent
    candidate = folder / name
    if not os.path.lexists(candidate) or entry_problem(candidate, folder) is not None:
        return None
    return read_side_file(candidate, what, limit)


__all__ = [
    "SIDE_FILE_BYTES",
    "confined",
    "entry_problem",
    "kind_of",
    "open_regular",
    "read_beside",
    "read_side_file",
]
