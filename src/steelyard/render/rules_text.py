"""``steelyard rules``: the rule list and one rule's page."""

from __future__ import annotations

import inspect
import re
from collections.abc import Mapping
from typing import TYPE_CHECKING

from steelyard.render.console import to_text
from steelyard.render.grid import COMPACT_BELOW, Column, Grid

if TYPE_CHECKING:
    from rich.console import RenderableType

    from steelyard.rule_catalogue import RuleCard
    from steelyard.rules.base import RuleSpec

    #: A live rule, or its catalogue card (:mod:`steelyard.rule_catalogue`), which needs none
    #: of the rules' imports: the list and the page read the same fields of either.
    AnySpec = RuleCard | RuleSpec

#: A Sphinx cross-reference in a docstring (":func:`name`"): on a terminal, just the code.
_SPHINX_ROLE = re.compile(r":(?:mod|func|class|meth|data|attr|obj):`([^`]*)`")


def _thresholds(spec: AnySpec) -> str:
    if not spec.thresholds:
        return "—"
    return ", ".join(f"{k}={'unset' if v is None else v}" for k, v in spec.thresholds.items())


def render_rules(specs: Mapping[str, AnySpec], *, color: bool = False, width: int = 120) -> str:
    """One row per rule: name, default severity, thresholds, why; on a narrow terminal the
    thresholds go under their row. No word is broken (see :mod:`steelyard.render.grid`)."""
    compact = width < COMPACT_BELOW
    grid = Grid(
        (
            Column("rule"),
            Column("severity"),
            *(() if compact else (Column("thresholds", wrap="words", floor=24),)),
            Column("why", wrap="words", floor=30, cap=80),
        ),
        indent_below=2,
    )
    for spec in specs.values():
        if compact:
            below = [(f"thresholds: {_thresholds(spec)}", "dim")] if spec.thresholds else []
            grid.add(spec.name, spec.severity.value, spec.summary, below=below)
        else:
            grid.add(spec.name, spec.severity.value, _thresholds(spec), spec.summary)
    renderables: list[RenderableType] = list(grid.render(width))
    return to_text(renderables, color=color, width=width)


def render_rule(spec: AnySpec, *, color: bool = False, width: int = 120) -> str:
    """The rule's page: its docstring (Markdown: headings, emphasis, code, lists) rendered for
    a terminal by rich, or as plain text when not coloured, then defaults and help address."""
    from rich.markdown import Markdown
    from rich.text import Text

    from steelyard.render.grid import indented

    footer = [
        f"default severity: {spec.severity.value}",
        f"thresholds: {_thresholds(spec)}",
        f"help: {spec.help_uri}",
    ]
    page: list[RenderableType] = [
        Markdown(_SPHINX_ROLE.sub(r"`\1`", inspect.cleandoc(spec.doc)), hyperlinks=False),
        Text(""),
        *(line for text in footer for line in indented(text, width, indent=0)),
    ]
    text = to_text(page, color=color, width=width)
    # rich pads Markdown paragraphs to the width; a plain page should not end lines in blanks.
    return text if color else "\n".join(line.rstrip() for line in text.split("\n"))
