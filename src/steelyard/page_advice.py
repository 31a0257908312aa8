"""numpy's transparent-huge-page advice, switched off while an audit runs.

numpy asks Linux (``madvise(MADV_HUGEPAGE)``) for huge pages on every array of 4 MiB and
more. Where THP is ``madvise`` with synchronous defrag (a common default), the first touch of
such an array can stall while the kernel compacts memory for a 2 MiB page, and an audit
allocates and frees layer-sized arrays all the time: on the 20M-parameter benchmark the first
audit in a process took 102 ms with the advice and 89 ms without it, on the 300M families
13-16 % less (docs/performance.md, "Fifth session"). The setting is numpy's documented
``NUMPY_MADVISE_HUGEPAGE``: when the user set it, their choice stands and nothing is touched.

The switch is process-wide, so it is counted: overlapping audits (threads of the API) turn it
off once and restore the user's value when the last one ends. It only changes how memory is
paged, never a result.
"""

from __future__ import annotations

import os
import threading
from collections.abc import Callable, Iterator
from contextlib import contextmanager

_LOCK = threading.Lock()
_DEPTH = 0
_BEFORE = True


def _switch() -> Callable[[bool], bool] | None:
    """numpy's setter (returns the previous value), or None where this numpy has none."""
    try:
        from numpy._core import multiarray
    except ImportError:  # pragma: no cover - numpy 1.x keeps it in numpy.core
        return None
    setter = getattr(multiarray, "_set_madvise_hugepage", None)
    return setter if callable(setter) else None


@contextmanager
def small_pages() -> Iterator[None]:
    """numpy's huge-page advice off while the block runs (unless the user chose a setting)."""
    global _DEPTH, _BEFORE
    setter = None if "NUMPY_MADVISE_HUGEPAGE" in os.environ else _switch()
    if setter is None:
        yield
        return
    with _LOCK:
        if _DEPTH == 0:
            _BEFORE = setter(False)
        _DEPTH += 1
    try:
        yield
    finally:
        with _LOCK:
            _DEPTH -= 1
            if _DEPTH == 0:
                setter(_BEFORE)
