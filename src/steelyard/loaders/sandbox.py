"""A process sandbox for native readers that a hostile file can hang or crash.

A C library (HDF5 is the one we use it for) can loop forever on a damaged structure, which no
Python timeout interrupts, or crash the interpreter. :func:`isolated` runs one call in a child
process with a time limit and an address-space cap, and turns a hang, a crash or any exception
in the child into one :class:`~steelyard.errors.LoadError`. The child dies with its parent, so
a killed steelyard never leaves a decoder holding memory behind.
"""

from __future__ import annotations

import multiprocessing
import os
import time
from collections.abc import Callable
from multiprocessing.connection import Connection
from pathlib import Path
from typing import Any, TypeVar

from steelyard.errors import LoadError
from steelyard.loaders.meanwhile import run_pending

#: Address space a reader process may add to what it inherited.
CHILD_MEMORY = 4 << 30

T = TypeVar("T")


def _context() -> Any:
    methods = multiprocessing.get_all_start_methods()
    # fork keeps the parent's state (and is cheap); spawn re-imports, which also works.
    return multiprocessing.get_context("fork" if "fork" in methods else "spawn")


def _limit_memory(extra: int) -> None:
    """Best effort: cap the child's address space at what it has plus ``extra``."""
    try:
        import resource

        with open("/proc/self/statm") as handle:
            current = int(handle.read().split()[0]) * os.sysconf("SC_PAGE_SIZE")
        soft, hard = resource.getrlimit(resource.RLIMIT_AS)
        want = current + extra
        if hard != resource.RLIM_INFINITY:
            want = min(want, hard)
        if soft == resource.RLIM_INFINITY or soft > want:
            resource.setrlimit(resource.RLIMIT_AS, (want, hard))
    except (ImportError, OSError, ValueError):
        pass


def _die_with_parent(parent: int) -> None:
    """Best effort (Linux): the sandbox is killed when the process that started it dies, so
    a killed steelyard never leaves a decoder holding memory behind."""
    try:
        import ctypes
        import signal

        ctypes.CDLL(None, use_errno=True).prctl(1, int(signal.SIGKILL))  # PR_SET_PDEATHSIG
    except (OSError, AttributeError, TypeError):
        return
    if os.getppid() != parent:  # the parent died before the request took effect
        os._exit(1)


def _child(
    conn: Connection, fn: Callable[..., Any], args: tuple[Any, ...], memory: int, parent: int
) -> None:
    _die_with_parent(parent)
    _limit_memory(memory)
    message: tuple[str, Any]
    try:
        message = ("ok", fn(*args))
    except LoadError as exc:
        message = ("load", (exc.path, exc.reason))
    except BaseException as exc:  # reported to the parent as one LoadError line
        message = ("error", f"{type(exc).__name__}: {exc}"[:300])
    try:
        conn.send(message)
    except BaseException as exc:
        conn.send(("error", f"the result could not be returned ({type(exc).__name__})"))
    conn.close()


#: A child that gets little of the processor (a busy CI machine) may take this many times its
#: CPU allowance in wall-clock time before it is refused anyway (a child blocked without
#: spinning, which the CPU clock alone would never stop).
WALL_FACTOR = 4.0
_TICK = 0.05


def _cpu_seconds(pid: int | None) -> float | None:
    """CPU time the process has used (user + system, from /proc on Linux), None elsewhere."""
    if pid is None:
        return None
    try:
        with open(f"/proc/{pid}/stat", "rb") as stat:
            fields = stat.read().rsplit(b")", 1)[1].split()
        return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")
    except (OSError, ValueError, IndexError):
        return None


def _answered(receiver: Connection, pid: int | None, timeout: float) -> bool:
    """Wait for the child's answer. A stuck parser spins, so the allowance is ``timeout``
    seconds of the child's CPU time where the system reports it (so a loaded machine does not
    refuse a healthy file whose child waited for a processor), and ``WALL_FACTOR`` times
    that in wall-clock time whatever happens; plain wall-clock ``timeout`` where CPU time is
    not available."""
    started = time.monotonic()
    while True:
        if receiver.poll(_TICK):
            return True
        waited = time.monotonic() - started
        used = _cpu_seconds(pid)
        if used is None:
            if waited >= timeout:
                return receiver.poll(0)
        elif used >= timeout or waited >= WALL_FACTOR * timeout:
            return receiver.poll(0)


def isolated(
    source: Path,
    fn: Callable[..., T],
    args: tuple[Any, ...],
    timeout: float,
    memory: int = CHILD_MEMORY,
    reader: str = "HDF5 reader",
) -> T:
    """``fn(*args)`` run in a child process: a hang becomes a LoadError after ``timeout``
    seconds, a crash of the C library a LoadError instead of a dead interpreter."""
    ctx = _context()
    receiver, sender = ctx.Pipe(duplex=False)
    process = ctx.Process(target=_child, args=(sender, fn, args, memory, os.getpid()), daemon=True)
    try:
        process.start()
    except (OSError, AssertionError, ValueError, RuntimeError):
        # No child processes here (e.g. inside a daemonic worker): run unprotected.
        receiver.close()
        sender.close()
        return fn(*args)
    sender.close()
    try:
        run_pending()
        if not _answered(receiver, process.pid, timeout):
            raise LoadError(
                source,
                f"was not read within {timeout:g} s: the {reader} is stuck on a damaged or "
                "hostile structure (refused)",
            )
        try:
            status, payload = receiver.recv()
        except (EOFError, OSError):
            process.join(5)
            raise LoadError(
                source, f"made the {reader} fail (exit code {process.exitcode}); damaged file?"
            ) from None
    finally:
        receiver.close()
        if process.is_alive():
            process.kill()
        process.join()
    if status == "ok":
        result: T = payload
        return result
    if status == "load":
        raise LoadError(payload[0], payload[1])
    raise LoadError(source, f"is malformed ({payload})")
