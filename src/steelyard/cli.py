"""The command line: parses, calls :mod:`steelyard.api`, writes, and picks the exit code.

Exit codes: 0 the gate passed, 1 findings at or above ``--fail-on`` (only that), 2 bad input
or usage (every input error, including running out of memory or nesting depth while reading),
3 an internal error of steelyard (one line; ``--debug`` shows the traceback).
Reports go to stdout or ``--output``; progress and diagnostics go to stderr. Every name from a
file that reaches stderr passes through :func:`steelyard.text_safety.shown`.
"""

from __future__ import annotations

import json
import os
import sys
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from enum import Enum
from pathlib import Path
from types import ModuleType
from typing import TYPE_CHECKING, NoReturn

import click

if sys.version_info >= (3, 11):
    from typing import assert_never
else:  # pragma: no cover - Python 3.10
    # typing_extensions only where typing lacks it: importing it replaces typing's parameter
    # collection with a slower one, which cost every generic alias built at start-up about
    # 20 ms per audit here (cProfile, 205 calls).
    from typing_extensions import assert_never

from steelyard.cli_options import (
    PATH,
    AuditFormat,
    ColorChoice,
    CompareFormat,
    Group,
    HelpArgument,
    LayersFormat,
    TimelineFormat,
    Unreadable,
    budget_option,
    digest_option,
    enum_option,
    fail_on_option,
    output_option,
    output_targets,
    paths_argument,
    policy_option,
    quiet_option,
    report_format_option,
    timeline_format_option,
)
from steelyard.digest import Digest
from steelyard.errors import LoadError, SteelyardError
from steelyard.findings import FailOn
from steelyard.grads_kind import GradsKind
from steelyard.run_timeline.read_order import Order
from steelyard.text_safety import shown
from steelyard.version import __version__

if TYPE_CHECKING:
    from steelyard.budget import Budget
    from steelyard.comparison.report import CompareReport
    from steelyard.policy import Policy
    from steelyard.report import Report

_STATE: dict[str, object] = {"debug": False, "reading": None, "color": "auto"}

#: Exit code of an internal error (a bug in steelyard, never a verdict on the input).
EXIT_INTERNAL = 3


def _color(stream: object = None) -> bool:
    """``--color``; with ``auto``, colour only on a terminal and only when ``NO_COLOR`` is
    unset or empty (the NO_COLOR convention, no-color.org: a non-empty value disables it)."""
    if _STATE["color"] != "auto":
        return _STATE["color"] == "always"
    target = stream or sys.stdout
    return bool(getattr(target, "isatty", lambda: False)()) and not os.environ.get("NO_COLOR")


def _width() -> int:
    """The report's width: ``COLUMNS`` when set (also when piped, as CI logs want), else the
    terminal's, else 120; never under 80, the narrowest layout."""
    columns = os.environ.get("COLUMNS", "").strip()
    if columns.isdigit() and int(columns) > 0:
        return max(80, min(int(columns), 1000))
    try:
        return max(80, os.get_terminal_size(sys.stdout.fileno()).columns)
    except (OSError, ValueError):
        return 120


def _api() -> ModuleType:
    """The library API, imported when a command needs it (``--help`` and ``--version`` do not)."""
    from steelyard import api

    return api


def _say(line: str) -> None:
    """One diagnostic line on stderr, with names from files escaped (a newline in a file name
    never splits it, an escape sequence never reaches the terminal)."""
    click.echo(shown(line), err=True)


def _fail(error: SteelyardError) -> NoReturn:
    if _STATE["debug"]:
        raise error
    _say(f"steelyard: error: {error}")
    raise click.exceptions.Exit(2)


def _reading(what: object) -> None:
    """Remember what is being read, for the one line a MemoryError or RecursionError gets."""
    _STATE["reading"] = str(what)


@contextmanager
def _guarded() -> Iterator[None]:
    """Every failure of a command becomes one stderr line and its exit code.

    SteelyardError (bad input or usage) exits 2. MemoryError and RecursionError come from
    inputs too large or too deeply nested for a reader that had no explicit check: exit 2,
    naming what was being read. Any other exception is a bug in steelyard: exit 3 with an
    invitation to rerun with --debug, so CI never mistakes a crash for a failed gate (exit 1).
    """
    _STATE["reading"] = None
    try:
        yield
    except (click.exceptions.Exit, click.exceptions.Abort, click.ClickException):
        raise
    except SteelyardError as error:
        _fail(error)
    except (MemoryError, RecursionError) as exc:
        if _STATE["debug"]:
            raise
        what = _STATE["reading"]
        problem = "too large" if isinstance(exc, MemoryError) else "too deeply nested"
        where = f"{what}: " if what else ""
        _say(
            f"steelyard: error: {where}input is {problem} to read within this process's limits "
            f"({type(exc).__name__})"
        )
        raise click.exceptions.Exit(2) from None
    except Exception as exc:
        if _STATE["debug"]:
            raise
        what = _STATE["reading"]
        where = f" while reading {what}" if what else ""
        _say(
            f"steelyard: internal error{where}: {type(exc).__name__}: {exc}; this is a bug in "
            "steelyard, not a verdict on the input: rerun with --debug for the traceback and "
            "report it"
        )
        raise click.exceptions.Exit(EXIT_INTERNAL) from None


@contextmanager
def _progress(quiet: bool, total: int) -> Iterator[Callable[[str], None]]:
    """Advance the stderr progress bar to the next checkpoint's name. The bar is drawn only
    on a terminal and without ``--quiet``; otherwise rich is not even imported (a piped or
    JSON run does not pay for it)."""
    if quiet or not sys.stderr.isatty():
        yield lambda name: None
        return
    from rich.markup import escape

    from steelyard.progress import Progress

    with Progress(enabled=True, total=total) as bar:
        # Names are escaped, and not read as rich markup ("[/x]").
        yield lambda name: bar.advance(escape(shown(name)))


def _budget(policy: Policy | None, pairs: list[str] | None) -> Budget:
    """The budget in force: defaults, then the policy's [budget] table, then --budget."""
    from steelyard.budget import Budget

    chosen = policy.budget if policy is not None and policy.budget is not None else Budget()
    overrides: dict[str, object] = {}
    for pair in pairs or ():
        key, sep, value = pair.partition("=")
        if not sep or not key.strip() or not value.strip():
            raise SteelyardError(f"--budget {pair!r}: expected KEY=VALUE, e.g. expansion-bytes=1G")
        overrides[key.strip()] = value.strip()
    return chosen.with_overrides(overrides) if overrides else chosen


def _version(ctx: click.Context, param: click.Parameter, value: bool) -> None:
    if value and not ctx.resilient_parsing:
        click.echo(f"steelyard {__version__}")
        ctx.exit(0)


# Help text is plain text: "[tool.steelyard]" and "[budget]" are literal (click has no markup).
@click.group(
    cls=Group,
    no_args_is_help=True,
    help="Audit trained neural-network weight files before they ship.",
)
@click.option("--debug", is_flag=True, default=False, help="Show tracebacks instead of one-line errors.")
@click.option(
    "--version",
    is_flag=True,
    expose_value=False,
    is_eager=True,
    callback=_version,
    help="Print the version and exit.",
)
@enum_option(
    "--color",
    kind=ColorChoice,
    default=ColorChoice.auto,
    help="Colour the terminal report: auto (on a terminal, unless NO_COLOR is set), "
    "always or never.",
)
def app(debug: bool, color: ColorChoice) -> None:
    """The command group that ``main`` runs (and tests invoke)."""
    _STATE["debug"] = debug
    _STATE["color"] = color.value


def _write(text: str, output: Path | None) -> None:
    """Write to stdout, or atomically to ``output`` (a reader never sees half a report)."""
    if output is None:
        # surrogateescape: a file name that is not valid UTF-8 is written back as its own
        # bytes (exact, as JSON promises) instead of crashing the write.
        data = text.encode("utf-8", errors="surrogateescape")
        buffer = getattr(sys.stdout, "buffer", None)
        if buffer is None:  # a replaced stdout (tests) takes text
            sys.stdout.write(data.decode("utf-8", errors="replace"))
            return
        sys.stdout.flush()
        buffer.write(data)
        buffer.flush()
        return
    temporary = output.with_name(f".{output.name}.tmp{os.getpid()}")
    try:
        temporary.write_text(text, encoding="utf-8", errors="surrogateescape")
        os.replace(temporary, output)
    except OSError as exc:
        temporary.unlink(missing_ok=True)
        raise SteelyardError(f"{output}: cannot write the report ({exc.strerror})") from None


def _write_report(text: str, output: Path | None, quiet: bool) -> None:
    """Write a report; when it went to a file, say so on stderr unless ``quiet``."""
    _write(text, output)
    if not quiet and output is not None:
        _say(f"steelyard: wrote {output}")


def _run_setup(
    chosen: Enum | None,
    output: list[Path] | None,
    offered: type[Enum],
    policy_file: Path | None,
    fail_on: FailOn | None,
    budget: list[str] | None,
) -> tuple[list[tuple[str, Path | None]], Policy, Budget]:
    """What every report-writing command settles first: the reports to write (format, file
    or stdout), the policy in force and the budget."""
    targets = output_targets(chosen.value if chosen else None, output, offered)
    policy = _policy(policy_file, fail_on)
    return targets, policy, _budget(policy, budget)


def _policy(policy_file: Path | None, fail_on: FailOn | None) -> Policy:
    """The policy in force, its gate overridden by ``--fail-on`` when given."""
    from dataclasses import replace

    from steelyard.policy_file import load_policy

    _reading(policy_file or "the policy file")
    policy = load_policy(policy_file)
    _STATE["reading"] = None
    return policy if fail_on is None else replace(policy, fail_on=fail_on.value)


@app.command()
@click.argument("path", cls=HelpArgument, type=PATH, help="Checkpoint file, shard index, or folder.")
@enum_option("--format", "-f", kind=LayersFormat, default=LayersFormat.table, help="Output format.")
@click.option("--output", "-o", type=PATH, help="Write the layer graph here, atomically.")
@policy_option
@budget_option
def layers(
    path: Path,
    format: LayersFormat,
    output: Path | None,
    policy_file: Path | None,
    budget: list[str] | None,
) -> None:
    """Show the layer graph steelyard reads from a checkpoint."""
    with _guarded():
        limits = _budget(_policy(policy_file, None), budget)
        _reading(path)
        checkpoint = _api().load(path, budget=limits)
        if format is LayersFormat.json:
            from steelyard.inventory import layers_document

            text = json.dumps(layers_document(checkpoint), indent=2) + "\n"
        elif format is LayersFormat.table:
            color = _color() and output is None
            from steelyard.render.layers_table import render_layers

            text = render_layers(checkpoint, color=color, width=_width())
        else:
            assert_never(format)
        _write(text, output)


def _render(report: Report, chosen: AuditFormat) -> str:
    from steelyard.render.report_formats import render_report

    return render_report(report, chosen.value, color=_color(), width=_width())


@app.command()
@paths_argument("Checkpoint files, shard indexes, or folders.")
@click.option(
    "--grads", type=PATH, help="Sidecar file of per-weight gradient statistics (same tensor names)."
)
@enum_option("--grads-kind", kind=GradsKind, default=GradsKind.RMS, help="What the sidecar holds.")
@click.option(
    "--base",
    type=PATH,
    help="Base model that the LoRA/DoRA adapters of the run are merged onto, so the rules "
    "see the merged weights and the report how large each update is.",
)
@report_format_option
@output_option
@fail_on_option
@policy_option
@click.option(
    "--baseline", type=PATH, help="Earlier baseline or JSON report: gate only on findings not in it."
)
@click.option(
    "--write-baseline", type=PATH, help="Record the current findings as a baseline file."
)
@quiet_option
@enum_option(
    "--unreadable",
    kind=Unreadable,
    default=Unreadable.input_error,
    help="What an unreadable checkpoint in the run means: input-error exits 2; "
    "gate-failure fails the gate (exit 1). Either way it is never passed.",
)
@click.option(
    "--jobs",
    "-j",
    type=click.IntRange(min=1),
    metavar="N",
    help="Worker threads per checkpoint [default: the machine's cores]; the report is "
    "the same for every value.",
)
@digest_option
@budget_option
def audit(
    paths: list[Path],
    grads: Path | None,
    grads_kind: GradsKind,
    base: Path | None,
    format: AuditFormat | None,
    output: list[Path] | None,
    fail_on: FailOn | None,
    policy_file: Path | None,
    baseline: Path | None,
    write_baseline: Path | None,
    quiet: bool,
    unreadable: Unreadable,
    jobs: int | None,
    digest: Digest,
    budget: list[str] | None,
) -> None:
    """Audit checkpoints' weight health; exit 1 when a finding reaches the gate."""
    with _guarded():
        targets, policy, limits = _run_setup(format, output, AuditFormat, policy_file, fail_on, budget)
        accepted = None
        if baseline is not None:
            from steelyard.baseline import read_baseline

            _reading(baseline)
            accepted = read_baseline(baseline)
        _reading(paths[0] if len(paths) == 1 else "the checkpoints named")
        run = _api().plan(paths, grads, base)
        with _progress(quiet, len(run.targets)) as bar:

            def advance(path: str) -> None:
                _reading(path)
                bar(path)

            report = _api().audit_many(
                run,
                policy=policy,
                grads=grads,
                grads_kind=grads_kind,
                on_checkpoint=advance,
                jobs=jobs,
                unreadable_fails_gate=unreadable is Unreadable.gate_failure,
                budget=limits,
                base=base,
                digest=digest.value,
            )
        _STATE["reading"] = None
        if len(paths) == 1 and not paths[0].is_dir() and report.errors and not report.audits:
            # One named file that cannot be read: the one-line contract, no report.
            error = report.errors[0]
            raise LoadError(error.path, error.reason)
        if accepted is not None:
            from steelyard.baseline import apply_baseline

            report = apply_baseline(report, accepted)
        if write_baseline is not None:
            from steelyard.baseline import baseline_text

            _write(baseline_text(report.audits, __version__), write_baseline)
        for chosen, target in targets:
            _write_report(_render(report, AuditFormat(chosen)), target, quiet)
    for problem in report.errors:
        _say(f"steelyard: error: {problem.line}")
    raise click.exceptions.Exit(report.exit_code)


def _render_compare(report: CompareReport, chosen: CompareFormat) -> str:
    from steelyard.render.compare_formats import render_comparison

    return render_comparison(report, chosen.value, color=_color(), width=_width())


@app.command()
@click.argument(
    "old", cls=HelpArgument, type=PATH, help="The earlier checkpoint (file, shard index, or folder)."
)
@click.argument(
    "new", cls=HelpArgument, type=PATH, help="The later checkpoint, in the same or another format."
)
@report_format_option
@output_option
@fail_on_option
@policy_option
@quiet_option
@digest_option
@budget_option
def compare(
    old: Path,
    new: Path,
    format: CompareFormat | None,
    output: list[Path] | None,
    fail_on: FailOn | None,
    policy_file: Path | None,
    quiet: bool,
    digest: Digest,
    budget: list[str] | None,
) -> None:
    """What changed between two checkpoints, and is it healthy; exit 1 when a finding reaches the gate."""
    with _guarded():
        targets, policy, limits = _run_setup(format, output, CompareFormat, policy_file, fail_on, budget)
        with _progress(quiet, 1) as bar:
            bar(f"{old} → {new}")
            _reading(f"{old} or {new}")
            report = _api().compare(old, new, policy=policy, budget=limits, digest=digest.value)
        _STATE["reading"] = None
        for chosen, target in targets:
            _write_report(_render_compare(report, CompareFormat(chosen)), target, quiet)
    raise click.exceptions.Exit(0 if report.passed else 1)


@app.command()
@click.argument("name", cls=HelpArgument, required=False, help="A rule's name, to explain it in full.")
@enum_option(
    "--format",
    "-f",
    kind=LayersFormat,
    default=LayersFormat.table,
    help="table, or json: every rule (or the named one) with its commands, severity and "
    "policy keys (steelyard.rules/1).",
)
def rules(name: str | None, format: LayersFormat) -> None:
    """List every rule, or explain one with its math."""
    if format is LayersFormat.json:
        from steelyard.render.rules_json import render_rules_json
        from steelyard.rules import registry

        every = registry(None)
        if name is not None and name not in every:
            _say(f"steelyard: error: no rule named {name!r}")
            raise click.exceptions.Exit(2)
        sys.stdout.write(render_rules_json([every[name]] if name else list(every.values())))
        return
    # The list and the pages come from the catalogue: no rule module (nor numpy) is imported.
    from steelyard.render.rules_text import render_rule, render_rules
    from steelyard.rule_catalogue import cards

    specs = {card.name: card for card in cards()}
    if name is None:
        sys.stdout.write(render_rules(specs, color=_color(), width=_width()))
        return
    if name not in specs:
        import difflib  # only for a name that is not a rule

        close = difflib.get_close_matches(name, list(specs), n=1)
        hint = f"; did you mean {close[0]!r}?" if close else ""
        _say(f"steelyard: error: no rule named {name!r}{hint}")
        raise click.exceptions.Exit(2)
    sys.stdout.write(render_rule(specs[name], color=_color(), width=_width()))


@app.command()
@click.option(
    "--init", is_flag=True, help="Write a commented starter steelyard.toml with every default."
)
@click.option("--show", is_flag=True, help="Print the effective policy.")
@click.option(
    "--policy", "policy_file", type=PATH, help="Policy file to show instead of the discovered one."
)
@click.option("--force", is_flag=True, help="With --init, overwrite an existing file.")
def policy(init: bool, show: bool, policy_file: Path | None, force: bool) -> None:
    """Write a starter policy, or show the one in force."""
    from steelyard.policy_file import POLICY_FILE, load_policy, policy_text, starter_text

    with _guarded():
        if init == show:
            raise SteelyardError("say --init or --show")
        if init:
            target = Path(POLICY_FILE)
            if target.exists() and not force:
                raise SteelyardError(f"{target}: already exists (use --force to overwrite)")
            _write(starter_text(), target)
            _say(f"steelyard: wrote {target}")
            return
        _reading(policy_file or "the policy file")
        _write(policy_text(load_policy(policy_file)), None)


@app.command()
@paths_argument("The run's checkpoints, or the run folder.")
@enum_option("--order", kind=Order, default=Order.step, help="By training step, name or as given.")
@timeline_format_option
@output_option
@fail_on_option
@policy_option
@quiet_option
@digest_option
@budget_option
def timeline(
    paths: list[Path],
    order: Order,
    format: TimelineFormat | None,
    output: list[Path] | None,
    fail_on: FailOn | None,
    policy_file: Path | None,
    quiet: bool,
    digest: Digest,
    budget: list[str] | None,
) -> None:
    """Follow a training run's checkpoints layer by layer (docs/timeline.md); exit 1 when a
    finding of the last checkpoint reaches the gate."""
    with _guarded():
        targets, policy, limits = _run_setup(format, output, TimelineFormat, policy_file, fail_on, budget)
        result = _api().timeline(
            paths,
            order.value,
            policy=policy,
            on_checkpoint=_reading,
            budget=limits,
            digest=digest.value,
        )
        _STATE["reading"] = None
        for chosen, target in targets:
            color = _color() and target is None
            _write_report(result.render(chosen, width=_width(), color=color), target, quiet)
    raise click.exceptions.Exit(result.exit_code)


def main() -> None:
    """Console-script entry point."""
    app()
