"""The command line's choices and shared options: the value sets of its options (formats,
gates, colour) and how an ``--output`` file's ending names its format. Declared once here so
that every command means the same by them; :mod:`steelyard.cli` only wires them to commands."""

from __future__ import annotations

from enum import Enum
from pathlib import Path
from typing import Annotated, Any

import typer

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


def _format_option() -> Any:
    """``--format`` of a command that writes reports (unset: the ``--output`` endings decide,
    else the table)."""
    return typer.Option("--format", "-f", help="Output format [default: table].")


# Options that the report-writing commands share: declared once so that they mean the same in
# each.
ReportFormatOption = Annotated[AuditFormat | None, _format_option()]
TimelineFormatOption = Annotated[TimelineFormat | None, _format_option()]
OutputOption = Annotated[
    list[Path] | None,
    typer.Option(
        "--output",
        "-o",
        help="Write the report here, atomically; repeat for several formats from one run. "
        "The format follows the extension (.json, .sarif, .md, .xml for JUnit, .html, .txt for "
        "the table) unless --format names it.",
    ),
]
FailOnOption = Annotated[
    FailOn | None,
    typer.Option(
        "--fail-on",
        help="Lowest severity that fails the gate [default: the policy's, else error].",
    ),
]
PolicyOption = Annotated[
    Path | None,
    typer.Option(
        "--policy",
        help="Policy file [default: steelyard.toml or [tool.steelyard] in pyproject.toml, found upwards].",
    ),
]
QuietOption = Annotated[
    bool, typer.Option("--quiet", "-q", help="No progress or diagnostics on stderr.")
]
BudgetOption = Annotated[
    list[str] | None,
    typer.Option(
        "--budget",
        metavar="KEY=VALUE",
        help="Raise or lower a resource budget, KEY=VALUE (repeatable): expansion-bytes, "
        "checkpoint-expansion-bytes, tensor-elements, layer-units, load-seconds; sizes accept "
        "512M, 2G. Overrides the policy's [budget] table.",
    ),
]


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
