"""The findings of one checkpoint in the terminal report, in two layouts.

Wide terminals (at least :data:`COMPACT_BELOW` columns) get a table whose last column holds the
message, the rule's why (once per rule) and the hint. Narrow ones get one line per row (number,
severity, rule, layer, units) with the message wrapped under it, and each rule's why and hints
once, below the table. Info findings that say the same thing about several layers fold into one
row that says how many findings it stands for, so the counts in the header add up to the rows.
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from dataclasses import dataclass

from rich.text import Text

from steelyard.findings import Finding, Severity, compact_units, units_cell
from steelyard.render.grid import COMPACT_BELOW, Cell, Column, Grid, indented
from steelyard.render.text import plural
from steelyard.rules.base import RuleSpec

#: Rows shown in full; the rest are counted (JSON has them all).
MAX_ROWS = 40
#: Layers named in a folded row.
_FOLDED_NAMED = 12
#: Widest line of a message in the wide table, for reading comfort.
_PROSE = 100
#: Distinct hints of one rule shown under the compact table.
_HINTS_SHOWN = 4
STYLE = {Severity.ERROR: "bold red", Severity.WARNING: "yellow", Severity.INFO: "cyan"}


@dataclass(frozen=True)
class FindingRow:
    """One row: a finding, and every layer it stands for when folded."""

    finding: Finding
    layers: tuple[str, ...]

    @property
    def folded(self) -> int:
        """How many findings the row stands for."""
        return max(1, len(self.layers))


def grouped(findings: tuple[Finding, ...]) -> list[FindingRow]:
    """Info findings that say the same thing about several layers become one row."""
    rows: list[tuple[Finding, list[str]]] = []
    for finding in findings:
        if finding.severity is Severity.INFO and not finding.units:
            key = (finding.rule, finding.message, finding.hint)
            for seen, layers in rows:
                if (
                    seen.severity is Severity.INFO
                    and not seen.units
                    and (seen.rule, seen.message, seen.hint) == key
                ):
                    layers.append(finding.layer or "—")
                    break
            else:
                rows.append((finding, [finding.layer or "—"]))
        else:
            rows.append((finding, [finding.layer] if finding.layer else []))
    return [FindingRow(f, tuple(layers)) for f, layers in rows]


def _units(finding: Finding, limit: int) -> str:
    """The units cell, its count of units with thousands separators like every other count
    (unit indices stay bare: they are names of rows, and commas separate them)."""
    return re.sub(
        r"\((\d+) units\)", lambda m: f"({int(m.group(1)):,} units)", units_cell(finding, limit)
    )


def _layer_cell(row: FindingRow) -> str:
    if len(row.layers) > 1:
        return plural(len(row.layers), "layer")
    return row.layers[0] if row.layers else "—"


def _folded_note(row: FindingRow) -> list[tuple[str, str]]:
    if len(row.layers) <= 1:
        return []
    named = ", ".join(row.layers[:_FOLDED_NAMED])
    more = (
        f" and {len(row.layers) - _FOLDED_NAMED:,} more"
        if len(row.layers) > _FOLDED_NAMED
        else ""
    )
    return [(f"{plural(len(row.layers), 'finding')}, one per layer: {named}{more}", "dim")]


def headline(rows: list[FindingRow], total: int, shown: list[FindingRow]) -> Text:
    """The count line over the table: findings, rows, and what folding and the cap hid."""
    text = Text.assemble(("findings ", "bold"), f"{total:,}")
    if len(rows) != total:
        text.append(f" in {plural(len(rows), 'row')}; a row for several layers says how many")
    if len(shown) < len(rows):
        text.append(f" (the first {len(shown):,} rows shown)")
    return text


def findings_table(
    rows: list[FindingRow],
    specs: Mapping[str, RuleSpec],
    width: int,
    tails: dict[str, str],
    marked: tuple[set[str], str] | None = None,
) -> list[Text]:
    """The findings as lines of at most ``width`` cells; ``marked`` is (finding ids, a line
    said under each of them), as compare says which findings come from the audit of NEW."""
    compact = width < COMPACT_BELOW
    columns = [
        Column("#", align="right"),
        Column("severity"),
        Column("rule", wrap="name"),
        Column("layer", wrap="name", floor=40, one_line=True),
        Column("units", wrap="name", floor=14),
    ]
    if not compact:
        columns.append(Column("finding", wrap="words", floor=40, cap=_PROSE))
    grid = Grid(tuple(columns), tails=tails, indent_below=5)
    explained: set[str] = set()
    for index, row in enumerate(rows, 1):
        finding = row.finding
        cells: list[Cell | str] = [
            str(index),
            Cell.of(finding.severity.value, STYLE[finding.severity]),
            finding.rule,
            _layer_cell(row),
            _units(finding, limit=4 if compact else 6),
        ]
        text = [(finding.message, ""), *_folded_note(row)]
        if marked is not None and finding.id in marked[0]:
            text.append((marked[1], "dim"))
        if compact:
            grid.add(*cells, below=text)
            continue
        if finding.rule not in explained and finding.rule in specs:
            # The why is the rule's, not the finding's: say it once per report.
            text.append((f"why: {specs[finding.rule].summary}", "dim"))
            explained.add(finding.rule)
        text.append((f"hint: {finding.hint}", "italic"))
        grid.add(*cells, Cell(tuple(text)))
    return grid.render(width)


def explanations(rows: list[FindingRow], specs: Mapping[str, RuleSpec], width: int) -> list[Text]:
    """Under the compact table: each rule's why once, and its hints (one per distinct hint,
    naming the rows it answers; the first few when a rule has many)."""
    hints: dict[str, dict[str, list[int]]] = {}
    for index, row in enumerate(rows, 1):
        hints.setdefault(row.finding.rule, {}).setdefault(row.finding.hint, []).append(index)
    lines = [Text("why it matters and what to do", style="bold")]
    for rule, by_hint in hints.items():
        numbers = sorted(n for rows_ in by_hint.values() for n in rows_)
        lines += indented(f"{rule} ({_rows(numbers)})", width, "bold", indent=0)
        if rule in specs:
            lines += indented(f"why: {specs[rule].summary}", width, "dim")
        for hint, numbers_ in list(by_hint.items())[:_HINTS_SHOWN]:
            label = "hint" if len(by_hint) == 1 else f"hint for {_rows(numbers_)}"
            lines += indented(f"{label}: {hint}", width, "italic")
        if len(by_hint) > _HINTS_SHOWN:
            rest = len(by_hint) - _HINTS_SHOWN
            lines += indented(
                f"… and {plural(rest, 'other hint')} (--format json has every finding's)",
                width,
                "dim",
            )
    return lines


def _rows(numbers: list[int]) -> str:
    """``rows 3-4, 8-40``: row numbers as ranges."""
    spans = compact_units(tuple(numbers), limit=len(numbers)).split(",")
    return ("row " if len(numbers) == 1 else "rows ") + ", ".join(spans)


def findings_section(
    findings: tuple[Finding, ...] | list[Finding],
    specs: Mapping[str, RuleSpec],
    width: int,
    tails: dict[str, str],
    marked: tuple[set[str], str] | None = None,
) -> list[Text]:
    """The headline, the findings table (at most :data:`MAX_ROWS` rows, the rest counted) and,
    on a narrow terminal, each rule's why and hints below it: what audit and compare show."""
    rows = grouped(tuple(findings))
    shown = rows[:MAX_ROWS]
    parts = [headline(rows, len(findings), shown), *findings_table(shown, specs, width, tails, marked)]
    if len(rows) > len(shown):
        hidden = sum(r.folded for r in rows[len(shown) :])
        parts += indented(
            f"… and {plural(hidden, 'more finding')} in {plural(len(rows) - len(shown), 'row')} "
            "not shown (--format json lists them all)",
            width,
            "dim",
            indent=0,
        )
    if width < COMPACT_BELOW:
        parts += [Text(""), *explanations(shown, specs, width)]
    return parts
