"""How far the engine got, for whoever shows progress (the CLI's display on a terminal).

The engine calls :func:`layer_done` as each layer's rules finish (from worker threads too);
nothing happens unless a listener was installed with :func:`listening`. The engine never
draws anything itself, and the listener never changes what the engine computes.
"""

from __future__ import annotations

import threading
from collections.abc import Callable, Iterator
from contextlib import contextmanager

#: Called with (checkpoint path, bytes of the file the layer stands for).
Listener = Callable[[str, int], None]

_lock = threading.Lock()
_listener: list[Listener] = []


@contextmanager
def listening(listener: Listener) -> Iterator[None]:
    """Send the engine's progress to ``listener`` while the block runs."""
    with _lock:
        _listener.append(listener)
    try:
        yield
    finally:
        with _lock:
            _listener.remove(listener)


def layer_done(checkpoint: str, stored_bytes: int) -> None:
    """One layer of ``checkpoint`` is audited; it holds about ``stored_bytes`` of the file."""
    with _lock:
        listeners = list(_listener)
    for listener in listeners:
        listener(checkpoint, stored_bytes)
