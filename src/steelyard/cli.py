"""The command line: parses, calls :mod:`steelyard.api`, writes, and picks the exit code.

Exit codes: 0 the gate passed, 1 findings at or above ``--fail-on``, 2 bad input or usage.
"""

from __future__ import annotations

import difflib
import json
import os
import sys
from enum import Enum
from pathlib import Path
from typing import NoReturn

from typing_extensions import assert_never

import typer

from steelyard import __version__, api
from steelyard.errors import SteelyardError
from steelyard.gradients import GradsKind
from steelyard.inventory import layers_document
from steelyard.policy import Policy
from steelyard.render.layers_table import render_layers
from steelyard.report import Report

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


class AuditFormat(str, Enum):
    """Output formats of ``steelyard audit``."""

    table = "table"
    json = "json"


class FailOn(str, Enum):
    """The lowest severity that fails the gate."""

    error = "error"
    warning = "warning"
    info = "info"
    never = "never"


def _render(report: Report, chosen: AuditFormat) -> str:
    from steelyard.render.table_report import render_table

    if chosen is AuditFormat.json:
        return report.to_json()
    if chosen is AuditFormat.table:
        return render_table(report, color=_color(), width=_width())
    assert_never(chosen)


def _write(text: str, output: Path | None) -> None:
    if output is None:
        sys.stdout.write(text)
        return
    temporary = output.with_name(f".{output.name}.tmp{os.getpid()}")
    try:
        temporary.write_text(text, encoding="utf-8")
        os.replace(temporary, output)
    except OSError as exc:
        temporary.unlink(missing_ok=True)
        raise SteelyardError(f"{output}: cannot write the report ({exc.strerror})") from None


@app.command()
def audit(
    paths: list[Path] = typer.Argument(..., help="Checkpoint files, shard indexes, or folders."),
    grads: Path | None = typer.Option(None, "--grads", help="Sidecar file of per-weight gradient statistics."),
    grads_kind: GradsKind = typer.Option(GradsKind.RMS, "--grads-kind", help="What the sidecar holds."),
    format: AuditFormat = typer.Option(AuditFormat.table, "--format", "-f", help="Output format."),
    output: Path | None = typer.Option(None, "--output", "-o", help="Write the report here (atomically)."),
    fail_on: FailOn = typer.Option(FailOn.error, "--fail-on", help="Lowest severity that fails the gate."),
) -> None:
    """Audit checkpoints' weight health; exit 1 when a finding reaches --fail-on."""
    try:
        policy = Policy(fail_on=fail_on.value)
        report = api.audit_many(paths, policy=policy, grads=grads, grads_kind=grads_kind)
        _write(_render(report, format), output)
    except SteelyardError as error:
        if _DEBUG["on"]:
            raise
        _fail(error)
    raise typer.Exit(0 if report.passed else 1)


@app.command()
def rules(name: str | None = typer.Argument(None, help="A rule's name to explain in full.")) -> None:
    """List every rule, or explain one with its math."""
    from steelyard.render.rules_text import render_rule, render_rules
    from steelyard.rules import registry

    specs = registry()
    if name is None:
        sys.stdout.write(render_rules(specs, color=_color(), width=_width()))
        return
    if name not in specs:
        close = difflib.get_close_matches(name, list(specs), n=1)
        hint = f"; did you mean {close[0]!r}?" if close else ""
        typer.echo(f"steelyard: error: no rule named {name!r}{hint}", err=True)
        raise typer.Exit(2)
    sys.stdout.write(render_rule(specs[name]))


def main() -> None:
    """Console-script entry point."""
    app()
