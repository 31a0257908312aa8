"""Progress on stderr while a run works: on a terminal only (never in a pipe, never with
``--quiet``), a line that moves with the work: checkpoints done of the run's, the current
checkpoint's name, bytes of the files audited so far with the rate, and layers done."""

from __future__ import annotations

import os
import sys
import threading
import time
from types import TracebackType

from rich.console import Console
from rich.filesize import decimal
from rich.progress import BarColumn, MofNCompleteColumn, TextColumn, TimeElapsedColumn
from rich.progress import Progress as _RichProgress

from steelyard.progress_events import listening


class Progress:
    """A no-op unless enabled; listens to the engine's per-layer events while entered."""

    def __init__(self, *, enabled: bool, total: int) -> None:
        self._bar: _RichProgress | None = None
        self._task = None
        self._lock = threading.Lock()
        self._bytes = 0
        self._layers = 0
        self._started = time.monotonic()
        self._listening = listening(self._layer_done) if enabled else None
        if enabled:
            console = Console(file=sys.stderr, no_color=bool(os.environ.get("NO_COLOR")))
            self._bar = _RichProgress(
                TextColumn("auditing {task.description}", markup=False),
                BarColumn(),
                MofNCompleteColumn(),
                TextColumn("{task.fields[work]}", markup=False),
                TimeElapsedColumn(),
                console=console,
                transient=True,
            )
            self._task = self._bar.add_task("", total=total, work="")

    def __enter__(self) -> Progress:
        if self._bar is not None:
            self._started = time.monotonic()
            self._bar.start()
        if self._listening is not None:
            self._listening.__enter__()
        return self

    def __exit__(
        self,
        kind: type[BaseException] | None,
        value: BaseException | None,
        trace: TracebackType | None,
    ) -> None:
        if self._listening is not None:
            self._listening.__exit__(kind, value, trace)
        if self._bar is not None:
            self._bar.stop()

    def advance(self, path: str) -> None:
        """Called before each checkpoint is audited."""
        if self._bar is not None and self._task is not None:
            self._bar.update(self._task, description=path)
            self._bar.advance(self._task)

    def _layer_done(self, checkpoint: str, stored_bytes: int) -> None:
        """The engine finished a layer (from any worker thread)."""
        if self._bar is None or self._task is None:
            return
        with self._lock:
            self._bytes += stored_bytes
            self._layers += 1
            elapsed = max(time.monotonic() - self._started, 1e-3)
            work = (
                f"{decimal(self._bytes)} read, {decimal(int(self._bytes / elapsed))}/s, "
                f"{self._layers:,} layers"
            )
        self._bar.update(self._task, work=work)
