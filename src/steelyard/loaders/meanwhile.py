"""Work a caller will do anyway, run while a sandboxed reader's child reads the file.

:func:`steelyard.loaders.sandbox.isolated` forks a child to read a native format's structure
and waits for it; in that wait the parent had nothing to do. :func:`meanwhile` lets the caller
of a load name such work (the API imports the audit's rule modules), which the first sandboxed
reader started inside the block runs on the caller's thread after forking its child. A module
of its own, light to import: the sandbox imports ``multiprocessing``, which a safetensors
audit never needs.
"""

from __future__ import annotations

import threading
from collections.abc import Callable, Iterator
from contextlib import contextmanager, suppress

_pending = threading.local()


@contextmanager
def meanwhile(work: Callable[[], object]) -> Iterator[None]:
    """Within the block, the first sandboxed reader started on this thread runs ``work`` on
    this thread while its child reads, instead of only waiting for it (at most once; never
    when no reader is started). For work the caller will do anyway, such as imports: a Keras
    file's structure takes its child 30-50 ms, in which the parent imported nothing before
    (docs/performance.md, Start-up, "Sixteenth session"). The child is forked before ``work``
    starts, so no thread of ``work`` is ever copied into it."""
    previous = getattr(_pending, "work", None)
    _pending.work = work
    try:
        yield
    finally:
        _pending.work = previous


def run_pending() -> None:
    """Run the work :func:`meanwhile` named on this thread, once (see the module)."""
    work = getattr(_pending, "work", None)
    if work is not None:
        _pending.work = None
        # A failure here would read as a broken file; the caller meets it again itself.
        with suppress(Exception):
            work()
