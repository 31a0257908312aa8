"""Rendering rich renderables to a string, so renderers stay free of I/O.

Its own module, apart from :mod:`steelyard.render.text`, so that a renderer of plain lists
(``steelyard rules``) does not import the layer graph and numpy with the report helpers.
"""

from __future__ import annotations

import io
from collections.abc import Iterable

from rich.console import Console, RenderableType


def to_text(renderables: Iterable[RenderableType], *, color: bool = False, width: int = 120) -> str:
    """Render to text; with ``color`` the string carries ANSI styles for a terminal."""
    buffer = io.StringIO()
    console = Console(
        file=buffer,
        width=width,
        color_system="truecolor" if color else None,
        force_terminal=color,
        no_color=not color,
        highlight=False,
        # Names from files are data, never markup: "[/bold]" in a layer name is printed as
        # it is instead of restyling (or breaking) the report.
        markup=False,
        emoji=False,
        soft_wrap=False,
    )
    for renderable in renderables:
        console.print(renderable)
    return buffer.getvalue()
