"""Progress on stderr: a rich bar when stderr is a terminal, nothing otherwise."""

from __future__ import annotations

import os
import sys
from types import TracebackType

from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, TextColumn, TimeElapsedColumn
from rich.progress import Progress as _RichProgress


class Progress:
    """Counts audited checkpoints; a no-op unless enabled."""

    def __init__(self, *, enabled: bool, total: int) -> None:
        self._bar: _RichProgress | None = None
        self._task = None
        if enabled:
            console = Console(file=sys.stderr, no_color="NO_COLOR" in os.environ)
            self._bar = _RichProgress(
                TextColumn("auditing {task.description}", markup=False),
                BarColumn(),
                MofNCompleteColumn(),
                TimeElapsedColumn(),
                console=console,
                transient=True,
            )
            self._task = self._bar.add_task("", total=total)

    def __enter__(self) -> Progress:
        if self._bar is not None:
            self._bar.start()
        return self

    def __exit__(
        self,
        kind: type[BaseException] | None,
        value: BaseException | None,
        trace: TracebackType | None,
    ) -> None:
        if self._bar is not None:
            self._bar.stop()

    def advance(self, path: str) -> None:
        """Called before each checkpoint is audited."""
        if self._bar is not None and self._task is not None:
            self._bar.update(self._task, description=path)
            self._bar.advance(self._task)
