"""The command line's choices and shared options: the value sets of its options (formats,
gates, colour), the click options that several commands share, and how an ``--output`` file's
ending names its format. Declared once here so that every command means the same by them;
:mod:`steelyard.cli` only wires them to commands. Choices are the enums' values
(``click.Choice``); each command receives the enum member back."""

from __future__ import annotations

from collections.abc import Callable, Sequence
from enum import Enum
from pathlib import Path
from typing import Any, TypeVar

import click

from steelyard.digest import DEFAULT_DIGEST, Digest
from steelyard.errors import SteelyardError
from steelyard.findings import FailOn


class LayersFormat(str, Enum):
    """Output formats of ``steelyard layers`` and ``steelyard rules``."""

    table = "table"
    json = "json"


class AuditFormat(str, Enum):
    """Output formats of ``steelyard audit``."""

    table = "table"
    json = "json"
    markdown = "markdown"
    sarif = "sarif"
    junit = "junit"
    html = "html"


class Unreadable(str, Enum):
    """What an unreadable checkpoint does to the run's exit code."""

    input_error = "input-error"
    gate_failure = "gate-failure"


class ColorChoice(str, Enum):
    """When the terminal report is coloured."""

    auto = "auto"
    always = "always"
    never = "never"


#: ``steelyard compare`` writes the same formats as ``audit`` (each command's render table is
#: checked against its CLI choices in tests/test_format_tables.py).
CompareFormat = AuditFormat


class TimelineFormat(str, Enum):
    """Output formats of ``steelyard timeline``."""

    table = "table"
    json = "json"
    html = "html"


_F = TypeVar("_F", bound=Callable[..., Any])

#: Paths as given (no existence check: the loaders say what is wrong with a path).
PATH = click.Path(path_type=Path)


def to_enum(kind: type[Enum]) -> Callable[[click.Context, click.Parameter, Any], Any]:
    """A callback that turns a chosen value back into its member of ``kind`` (None stays)."""

    def convert(ctx: click.Context, param: click.Parameter, value: Any) -> Any:
        return None if value is None else kind(value)

    return convert


def listed(ctx: click.Context, param: click.Parameter, value: Any) -> list[Any] | None:
    """A repeatable option's values as a list; None when it was not given."""
    return list(value) if value else None


def enum_option(
    *decls: str, kind: type[Enum], default: Enum | None = None, help: str
) -> Callable[[_F], _F]:
    """An option choosing one member of ``kind``: the choices are its values (case-sensitive,
    as typed), and the command receives the member (or None)."""
    return click.option(
        *decls,
        type=click.Choice([str(member.value) for member in kind]),
        default=None if default is None else str(default.value),
        callback=to_enum(kind),
        show_default=default is not None,
        help=help,
    )


class HelpArgument(click.Argument):
    """A positional argument with a help text, listed under "Arguments" in ``--help``."""

    def __init__(self, param_decls: Sequence[str], *, help: str, **attrs: Any) -> None:
        super().__init__(param_decls, **attrs)
        self.help = help

    def help_row(self) -> tuple[str, str]:
        """(name, help) as the help page lists it."""
        name = (self.name or "").upper() + ("..." if self.nargs == -1 else "")
        return name, self.help + ("  [required]" if self.required else "")


class Command(click.Command):
    """A command whose help lists its arguments with their help texts before its options."""

    def format_options(self, ctx: click.Context, formatter: click.HelpFormatter) -> None:
        rows = [p.help_row() for p in self.get_params(ctx) if isinstance(p, HelpArgument)]
        if rows:
            with formatter.section("Arguments"):
                formatter.write_dl(rows)
        super().format_options(ctx, formatter)


class Group(click.Group):
    """The command group: commands are listed in the order they are declared, and are
    :class:`Command`."""

    command_class = Command

    def list_commands(self, ctx: click.Context) -> list[str]:
        return list(self.commands)


def paths_argument(help: str) -> Callable[[_F], _F]:
    """The required, repeatable ``PATHS...`` argument: the command receives a list of paths."""
    return click.argument(
        "paths", cls=HelpArgument, type=PATH, nargs=-1, required=True, callback=listed, help=help
    )


def _format_option(kind: type[Enum]) -> Callable[[_F], _F]:
    """``--format`` of a command that writes reports (unset: the ``--output`` endings decide,
    else the table)."""
    return enum_option("--format", "-f", kind=kind, help="Output format [default: table].")


# Options that the report-writing commands share: declared once so that they mean the same in
# each.
def report_format_option(f: _F) -> _F:
    """``--format`` of audit and compare: the command receives an :class:`AuditFormat` or None."""
    return _format_option(AuditFormat)(f)


def timeline_format_option(f: _F) -> _F:
    """``--format`` of timeline: the command receives a :class:`TimelineFormat` or None."""
    return _format_option(TimelineFormat)(f)


def output_option(f: _F) -> _F:
    """``--output``, repeatable: the command receives a list of paths, or None."""
    return click.option(
        "--output",
        "-o",
        type=PATH,
        multiple=True,
        callback=listed,
        help="Write the report here, atomically; repeat for several formats from one run. "
        "The format follows the extension (.json, .sarif, .md, .xml for JUnit, .html, .txt for "
        "the table) unless --format names it.",
    )(f)


def fail_on_option(f: _F) -> _F:
    """``--fail-on``: the command receives a :class:`FailOn` or None."""
    return enum_option(
        "--fail-on",
        kind=FailOn,
        help="Lowest severity that fails the gate [default: the policy's, else error].",
    )(f)


def policy_option(f: _F) -> _F:
    """``--policy``, received as ``policy_file``."""
    return click.option(
        "--policy",
        "policy_file",
        type=PATH,
        default=None,
        help="Policy file [default: steelyard.toml or [tool.steelyard] in pyproject.toml, found upwards].",
    )(f)


def quiet_option(f: _F) -> _F:
    """``--quiet``/``-q``."""
    return click.option(
        "--quiet", "-q", is_flag=True, default=False, help="No progress or diagnostics on stderr."
    )(f)


def digest_option(f: _F) -> _F:
    """``--digest``: the command receives a :class:`~steelyard.digest.Digest`."""
    return enum_option(
        "--digest",
        kind=Digest,
        default=DEFAULT_DIGEST,
        help="Content hash that identifies each checkpoint in the report: blake3 (fast), or "
        "sha256 to match the SHA-256 digests that registries and manifests publish.",
    )(f)


def budget_option(f: _F) -> _F:
    """``--budget KEY=VALUE``, repeatable: the command receives a list of pairs, or None."""
    return click.option(
        "--budget",
        multiple=True,
        callback=listed,
        metavar="KEY=VALUE",
        help="Raise or lower a resource budget, KEY=VALUE (repeatable): expansion-bytes, "
        "checkpoint-expansion-bytes, tensor-elements, layer-units, load-seconds; sizes accept "
        "512M, 2G. Overrides the policy's [budget] table.",
    )(f)


#: Report formats by file ending; ".sarif.json" is SARIF (the name code-scanning uploads use).
FORMAT_BY_ENDING = {
    ".sarif.json": "sarif",
    ".sarif": "sarif",
    ".json": "json",
    ".md": "markdown",
    ".markdown": "markdown",
    ".xml": "junit",
    ".txt": "table",
    ".html": "html",
    ".htm": "html",
}


def output_targets(
    chosen: str | None, outputs: list[Path] | None, offered: type[Enum] = AuditFormat
) -> list[tuple[str, Path | None]]:
    """(format, file or stdout) for each report to write: one run, several files. An explicit
    ``--format`` that contradicts a file's ending is refused rather than guessed, and so is an
    ending that names a format the command does not write (``offered``)."""
    if not outputs:
        return [(chosen or "table", None)]
    targets: list[tuple[str, Path | None]] = []
    for output in outputs:
        name = output.name.lower()
        inferred = next((f for end, f in FORMAT_BY_ENDING.items() if name.endswith(end)), None)
        if chosen is not None and inferred is not None and inferred != chosen:
            raise SteelyardError(
                f"--output {output}: its ending says {inferred}, but --format says {chosen}; "
                "rename the file or drop --format"
            )
        fmt = chosen or inferred
        if fmt is None:
            raise SteelyardError(
                f"--output {output}: cannot tell the format from its ending; name it "
                "with --format or use .json, .sarif, .md, .xml, .html or .txt"
            )
        if fmt not in {str(f.value) for f in offered}:
            names = ", ".join(str(f.value) for f in offered)
            raise SteelyardError(f"--output {output}: this command writes {names}, not {fmt}")
        targets.append((fmt, output))
    return targets
