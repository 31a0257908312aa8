"""One HDF5 file at arm's length: where its bytes are (:class:`Location`: a file, a stored window
of an archive, or an inflated archive member), its signature, and :class:`H5File`, which walks
its links one at a time.

h5py follows external links, external storage and virtual datasets silently, so no path is
handed to h5py whole: each link is checked (external and user-defined links refused, soft
links followed only within the top-level group the path starts in) and every walk counts the
objects it lists. Reading attributes and datasets is
:class:`~steelyard.loaders.keras.hdf5_access.H5Store`'s.
"""

from __future__ import annotations

import contextlib
import io
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import h5py

from steelyard.errors import LoadError

#: Objects one walk of the groups may list…
MAX_NODES = 200_000
#: …and all walks of one file together (each object is listed by at most a few walks).
MAX_VISITS = 4 * MAX_NODES
MAX_SOFT_HOPS = 8


#: What h5py raises on damaged or unexpected files; always converted to LoadError.
H5_ERRORS: tuple[type[BaseException], ...] = (
    OSError,
    KeyError,
    ValueError,
    TypeError,
    RuntimeError,
    IndexError,
    AttributeError,
    OverflowError,
    SystemError,
)


class _Window(io.RawIOBase):
    """Read-only, seekable view of ``length`` bytes of ``raw`` starting at ``start``."""

    def __init__(self, raw: io.BufferedReader, start: int, length: int) -> None:
        super().__init__()
        self._raw = raw
        self._start = start
        self._length = length
        self._pos = 0

    def readable(self) -> bool:
        return True

    def seekable(self) -> bool:
        return True

    def tell(self) -> int:
        return self._pos

    def seek(self, offset: int, whence: int = io.SEEK_SET) -> int:
        base = {io.SEEK_SET: 0, io.SEEK_CUR: self._pos, io.SEEK_END: self._length}.get(whence)
        if base is None or base + offset < 0:
            raise ValueError("bad seek")
        self._pos = base + offset
        return self._pos

    def readinto(self, buffer: Any) -> int:
        view = memoryview(buffer).cast("B")
        count = max(0, min(len(view), self._length - self._pos))
        if count == 0:
            return 0
        self._raw.seek(self._start + self._pos)
        got = int(self._raw.readinto(view[:count]) or 0)
        self._pos += got
        return got


@dataclass(frozen=True)
class Location:
    """Where an HDF5 file's bytes are: a file, a stored window of an archive (``start``,
    ``length``), or a compressed archive member already inflated to the file ``spill``.
    Errors always name ``path`` (the file the user gave)."""

    path: Path
    length: int
    start: int = 0
    spill: Path | None = None

    @property
    def data_path(self) -> Path:
        """The file that holds the HDF5 bytes."""
        return self.spill if self.spill is not None else self.path

    @contextlib.contextmanager
    def open_h5(self) -> Iterator[Any]:
        """The file opened with h5py (only ever called inside :func:`isolated`)."""
        if self.start == 0:
            with h5py.File(self.data_path, "r", locking=False) as f:
                yield f
        else:
            with (
                open(self.data_path, "rb") as raw,
                h5py.File(_Window(raw, self.start, self.length), "r") as f,
            ):
                yield f

    def read(self, offset: int, count: int, what: str) -> bytes:
        """``count`` bytes at ``offset`` of the HDF5 file, refusing ranges outside it."""
        if offset < 0 or count < 0 or offset + count > self.length:
            raise LoadError(
                self.path, f"{what}: bytes {offset}..{offset + count} lie outside the file"
            )
        try:
            with open(self.data_path, "rb") as handle:
                handle.seek(self.start + offset)
                data = handle.read(count)
        except OSError as exc:
            raise LoadError(self.path, f"{what} cannot be read ({exc.strerror})") from None
        if len(data) != count:
            raise LoadError(self.path, f"{what}: the file ends before its data (truncated?)")
        return data


class H5File:
    """Checked walks over the links of one HDF5 file at ``location``; ``source`` is the file
    named in errors (the ``.h5`` or the ``.keras`` archive)."""

    def __init__(self, source: Path, location: Location) -> None:
        self.source = source
        self.location = location
        self.visits = 0

    def address(self, obj: Any) -> int:
        """The object's address in the file: its identity, whatever link reached it."""
        return int(h5py.h5o.get_info(obj.id).addr)

    def count(self, names: int, where: str) -> None:
        """Count objects listed by any walk; refuse past :data:`MAX_VISITS` for the file."""
        self.visits += names
        if self.visits > MAX_VISITS:
            raise self.fail(f"lists more than {MAX_VISITS} HDF5 objects (at {where!r})")

    def fail(self, reason: str) -> LoadError:
        """A LoadError naming the file."""
        return LoadError(self.source, reason)

    @contextlib.contextmanager
    def open(self) -> Iterator[Any]:
        """The open h5py file; h5py errors become LoadError."""
        try:
            with self.location.open_h5() as f:
                yield f
        except LoadError:
            raise
        except H5_ERRORS as exc:
            raise self.fail(f"is a damaged HDF5 file ({reason(exc)})") from None

    # -- paths ----------------------------------------------------------------------------

    def _parts(self, path: str) -> list[str]:
        parts = path.split("/") if path else []
        if any(part in ("", ".", "..") for part in parts):
            raise self.fail(f"refers to the invalid HDF5 path {path!r}")
        return parts

    def link(self, group: Any, name: str, where: str) -> Any:
        """The link ``name`` in ``group`` (not followed); refuses external and user links."""
        if not isinstance(group, h5py.Group):
            raise self.fail(f"HDF5 path {where!r} goes through a dataset")
        link = group.get(name, getlink=True)
        if link is None:
            raise self.fail(f"has no HDF5 object {where!r}")
        if isinstance(link, h5py.ExternalLink):
            raise self.fail(
                f"HDF5 object {where!r} is an external link to {link.filename!r} (refused)"
            )
        if not isinstance(link, (h5py.SoftLink, h5py.HardLink)):
            raise self.fail(f"HDF5 object {where!r} is a user-defined link (refused)")
        return link

    def resolve(self, f: Any, path: str) -> Any:
        """The object at ``path``, following soft links only when they stay inside the top-level
        group the path starts in (hard links are followed as HDF5 does)."""
        parts = self._parts(path)
        if not parts:
            return f
        top = parts[0]
        trail: list[str] = []
        node, hops, i = f, 0, 0
        while i < len(parts):
            where = "/".join([*trail, parts[i]])
            if isinstance(node, h5py.Group) and parts[i] not in node:
                raise self.fail(f"has no HDF5 object {path!r} ({where!r} is missing)")
            link = self.link(node, parts[i], where)
            if isinstance(link, h5py.SoftLink):
                hops += 1
                if hops > MAX_SOFT_HOPS:
                    raise self.fail(f"HDF5 soft links at {where!r} loop")
                target = str(link.path)
                full = target.lstrip("/") if target.startswith("/") else "/".join([*trail, target])
                redirected = self._parts(full)
                if not redirected or redirected[0] != top:
                    raise self.fail(
                        f"HDF5 soft link {where!r} points to {target!r}, outside {top!r} (refused)"
                    )
                parts, node, trail, i = redirected + parts[i + 1 :], f, [], 0
                continue
            node = node[parts[i]]
            trail.append(parts[i])
            i += 1
        return node

    def exists(self, f: Any, path: str) -> bool:
        """Whether ``path`` names an object (links checked as in :meth:`resolve`)."""
        parts = self._parts(path)
        node = f
        for depth, part in enumerate(parts):
            if not isinstance(node, h5py.Group) or part not in node:
                return False
            self.link(node, part, "/".join(parts[: depth + 1]))
            node = self.resolve(f, "/".join(parts[: depth + 1]))
        return True

    def group(self, f: Any, path: str) -> Any:
        """The group at ``path`` or LoadError."""
        node = self.resolve(f, path)
        if not isinstance(node, h5py.Group):
            raise self.fail(f"HDF5 object {path!r} is not a group")
        return node


def reason(exc: BaseException) -> str:
    """First line of an h5py error, for a one-line LoadError."""
    text = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
    return text[:200]
