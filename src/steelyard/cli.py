"""The command line: parses, calls :mod:`steelyard.api`, writes, and picks the exit code.

Exit codes: 0 the gate passed, 1 findings at or above ``--fail-on``, 2 bad input or usage.
"""

from __future__ import annotations

import json
import os
import sys
from enum import Enum
from pathlib import Path
from typing import NoReturn

import typer

from steelyard import __version__, api
from steelyard.errors import SteelyardError
from steelyard.inventory import layers_document
from steelyard.render.layers_table import render_layers

app = typer.Typer(
    add_completion=False,
    no_args_is_help=True,
    help="Audit trained neural-network weight files before they ship.",
    pretty_exceptions_enable=False,
)


class LayersFormat(str, Enum):
    """Output formats of ``steelyard layers``."""

    table = "table"
    json = "json"


def _color() -> bool:
    return sys.stdout.isatty() and "NO_COLOR" not in os.environ


def _width() -> int:
    try:
        return max(80, os.get_terminal_size(sys.stdout.fileno()).columns)
    except OSError:
        return 120


def _fail(error: SteelyardError) -> NoReturn:
    typer.echo(f"steelyard: error: {error}", err=True)
    raise typer.Exit(2)


_DEBUG = {"on": False}


def _version(value: bool) -> None:
    if value:
        typer.echo(f"steelyard {__version__}")
        raise typer.Exit(0)


@app.callback()
def _root(
    debug: bool = typer.Option(False, "--debug", help="Show tracebacks instead of one-line errors."),
    version: bool = typer.Option(
        False, "--version", callback=_version, is_eager=True, help="Print the version and exit."
    ),
) -> None:
    _DEBUG["on"] = debug


@app.command()
def layers(
    path: Path = typer.Argument(..., help="Checkpoint file, shard index, or folder."),
    format: LayersFormat = typer.Option(LayersFormat.table, "--format", "-f", help="Output format."),
) -> None:
    """Show the layer graph steelyard reads from a checkpoint."""
    try:
        checkpoint = api.load(path)
        if format is LayersFormat.json:
            text = json.dumps(layers_document(checkpoint), indent=2) + "\n"
        else:
            text = render_layers(checkpoint, color=_color(), width=_width())
    except SteelyardError as error:
        if _DEBUG["on"]:
            raise
        _fail(error)
    sys.stdout.write(text)


def main() -> None:
    """Console-script entry point."""
    app()
