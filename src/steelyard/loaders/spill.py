"""Inflate once, keep on disk: the run's private spill folder for decompressed bytes.

A compressed archive member (an ``.npz`` array, a ``.keras`` archive's ``model.weights.h5``)
or a compressed HDF5 dataset is decompressed at most once per run, streamed into a file of
this folder, and every later read memory-maps that file. Why disk rather than memory: the
inflated bytes are file-backed pages the kernel can drop and re-read under pressure, so
holding every inflated member for the whole run costs disk (bounded by the checkpoint's
expansion budget plus its stored bytes), not resident memory; and h5py can open a spilled
``model.weights.h5`` by name in its sandbox process, which an in-memory buffer would have to
be copied into.

The folder is created on first use (mode 0700, under the system temporary folder) and
removed when the process exits. Sandboxed children (forked) write into files the parent
named; they never remove anything.
"""

from __future__ import annotations

import atexit
import os
import shutil
import tempfile
import threading
from collections.abc import Callable, Hashable
from pathlib import Path

_lock = threading.Lock()
_folder: Path | None = None
_owner = 0
_done: dict[Hashable, Path] = {}
_key_locks: dict[Hashable, threading.Lock] = {}


def _cleanup() -> None:
    if _folder is not None and os.getpid() == _owner:
        shutil.rmtree(_folder, ignore_errors=True)


def folder() -> Path:
    """The run's spill folder (created on first use, removed at exit)."""
    global _folder, _owner
    with _lock:
        if _folder is None or _owner != os.getpid():
            _folder = Path(tempfile.mkdtemp(prefix="steelyard-spill-"))
            _owner = os.getpid()
            atexit.register(_cleanup)
        return _folder


def spilled(key: Hashable, fill: Callable[[Path], None]) -> Path:
    """The spill file for ``key``, written by ``fill(path)`` the first time it is asked for.

    Threads asking for the same key wait for the one that fills it, so the work is done
    once; a ``fill`` that raises leaves nothing behind and the next caller tries again."""
    with _lock:
        done = _done.get(key)
        if done is not None:
            return done
        key_lock = _key_locks.setdefault(key, threading.Lock())
    with key_lock:
        with _lock:
            done = _done.get(key)
        if done is not None:
            return done
        handle, name = tempfile.mkstemp(dir=folder(), suffix=".bin")
        os.close(handle)
        target = Path(name)
        try:
            fill(target)
        except BaseException:
            target.unlink(missing_ok=True)
            raise
        with _lock:
            _done[key] = target
        return target


__all__ = ["folder", "spilled"]
