"""Plain aligned tables that fit a width without breaking words or names.

rich's tables fold a cell that does not fit, cutting words and names mid-token; this grid
decides every column's width itself (never below what its longest word or name piece needs,
unless the terminal is narrower than that), wraps prose at spaces and names after their
separators, and hands back styled lines. Columns are separated by two spaces, and the header
is underlined, so a report reads the same in a CI log as in a terminal.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Literal

from rich.cells import cell_len
from rich.text import Text

from steelyard.render.fitting import (
    ELLIPSIS,
    fit_name,
    longest_piece,
    longest_word,
    widest,
    wrap_words,
)

GAP = "  "
#: Narrower terminals than this get the reports' compact layouts.
COMPACT_BELOW = 110
#: Width of the labels of a report header ("checkpoint", "sha256", ...).
LABEL = 12


def indented(text: str, width: int, style: str = "", indent: int = 2) -> list[Text]:
    """``text`` wrapped at spaces into lines indented by ``indent`` cells."""
    return [
        Text(" " * indent + line, style=style) for line in wrap_words(text, max(1, width - indent))
    ]


def labelled(label: str, value: str | Text, width: int) -> list[Text]:
    """``label`` then ``value`` wrapped at spaces (a path after its separators), continuation
    lines under the value, each keeping the value's styles."""
    text = value if isinstance(value, Text) else Text(value)
    out: list[Text] = []
    offset = 0
    for index, line in enumerate(wrap_words(text.plain, max(1, width - LABEL))):
        start = text.plain.find(line, offset)
        # Lines are runs of the value (it wraps at spaces), so each keeps its own styles.
        piece = text[start : start + len(line)] if line and start >= 0 else Text(line)
        offset = start + len(line) if start >= 0 else offset
        # The label's bold is a span of its own, not the line's base style.
        lead = (label.ljust(LABEL), "bold") if index == 0 else " " * LABEL
        out.append(Text.assemble(lead, piece))
    return out


@dataclass(frozen=True)
class Column:
    """How one column lays out its cells."""

    header: str
    align: Literal["left", "right"] = "left"
    wrap: Literal["words", "name", "none"] = "none"
    """``words``: prose wrapped at spaces; ``name``: names fitted by :func:`fit_name`;
    ``none``: kept on one line (short values)."""
    floor: int = 0
    """Width this column keeps while other columns can still give room up."""
    one_line: bool = False
    """For ``name`` columns: shorten from the left to a distinct tail before wrapping."""
    cap: int = 0
    """For ``words`` columns: the widest a line of prose gets however wide the terminal
    (long lines are hard to read); 0 for no cap."""


@dataclass(frozen=True)
class Cell:
    """A cell: paragraphs, each with its style (a message, then a dim why, ...)."""

    paragraphs: tuple[tuple[str, str], ...]

    @classmethod
    def of(cls, text: str, style: str = "") -> Cell:
        """A cell of one paragraph."""
        return cls(((text, style),))


@dataclass(frozen=True)
class Row:
    """One row, and paragraphs printed under it across the full width (indented)."""

    cells: tuple[Cell, ...]
    below: tuple[tuple[str, str], ...] = ()


@dataclass
class Grid:
    """Columns, rows and the names the name columns must keep apart."""

    columns: tuple[Column, ...]
    rows: list[Row] = field(default_factory=list)
    tails: dict[str, str] = field(default_factory=dict)
    """Distinct tails of names (see :func:`steelyard.render.fitting.distinct_tails`)."""
    indent_below: int = 4

    def add(self, *cells: Cell | str, below: Sequence[tuple[str, str]] = ()) -> None:
        """Add a row; plain strings become unstyled cells."""
        self.rows.append(
            Row(tuple(c if isinstance(c, Cell) else Cell.of(c) for c in cells), tuple(below))
        )

    def _needs(self, index: int) -> tuple[int, int]:
        """(natural, minimum) cells of column ``index``."""
        column = self.columns[index]
        texts = [t for row in self.rows for t, _ in row.cells[index].paragraphs]
        natural = max([cell_len(column.header), *(widest(t.split("\n")) for t in texts)])
        if column.cap:
            natural = min(natural, max(column.cap, cell_len(column.header)))
        if column.wrap == "words":
            least = max([longest_word(column.header), *(longest_word(t) for t in texts)])
            if column.floor:
                # A word wider than the floor (a long quoted tensor name) wraps after its
                # separators rather than starve every other column.
                least = min(least, max(column.floor, longest_word(column.header)))
        elif column.wrap == "name":
            pieces = [longest_piece(t) for t in texts]
            if column.one_line:
                # Room for each name's distinct tail on one line, so shortening never wraps.
                pieces = [
                    min(cell_len(t), cell_len(self.tails.get(t, t)) + len(ELLIPSIS))
                    for t in texts
                ]
            least = max([longest_word(column.header), *pieces])
        else:
            values = [widest(t.split("\n")) for t in texts]
            least = max([longest_word(column.header), *values])
        return natural, min(natural, least)

    def widths(self, width: int) -> list[int]:
        """Column widths that fit ``width``: natural widths, then the widest flexible column
        gives up a cell at a time, first down to its floor, then down to its minimum (no word
        or name piece broken), and only on a terminal too narrow even for that, further (a
        shortened name then wraps, a piece longer than its column is cut)."""
        needs = [self._needs(i) for i in range(len(self.columns))]
        widths = [natural for natural, _ in needs]
        budget = width - len(GAP) * (len(self.columns) - 1)
        for stage in ("floor", "minimum", "squeeze"):
            limits = [
                self._limit(stage, column, natural, least)
                for column, (natural, least) in zip(self.columns, needs, strict=True)
            ]
            while sum(widths) > budget:
                room = [w - lim for w, lim in zip(widths, limits, strict=True)]
                if max(room) <= 0:
                    break
                widest_index = max(
                    (i for i, r in enumerate(room) if r > 0), key=lambda i: widths[i]
                )
                widths[widest_index] -= 1
        return widths

    @staticmethod
    def _limit(stage: str, column: Column, natural: int, least: int) -> int:
        if stage == "floor":
            return max(least, min(natural, column.floor))
        if stage == "minimum" or column.wrap == "none":
            return least
        return min(least, 4)

    def _lines(self, column: Column, cell: Cell, width: int) -> list[tuple[str, str]]:
        out: list[tuple[str, str]] = []
        for text, style in cell.paragraphs:
            if column.wrap == "words":
                lines = wrap_words(text, width)
            elif column.wrap == "name":
                lines = fit_name(text, width, self.tails, one_line=column.one_line)
            else:
                lines = text.split("\n")
            out += [(line, style) for line in lines]
        return out

    def render(self, width: int, *, header_style: str = "bold") -> list[Text]:
        """The table as lines of at most ``width`` cells (when the minimums allow it)."""
        widths = self.widths(width)
        heads = [wrap_words(c.header, w) for c, w in zip(self.columns, widths, strict=True)]
        depth = max(len(h) for h in heads)
        # Bottom-aligned, so every header's last line sits on the underline.
        lines = [
            self._line([(([""] * (depth - len(h)) + h)[d], header_style) for h in heads], widths)
            for d in range(depth)
        ]
        lines.append(Text(GAP.join("─" * w for w in widths), style="dim"))
        for row in self.rows:
            cells = [
                self._lines(column, cell, w)
                for column, cell, w in zip(self.columns, row.cells, widths, strict=True)
            ]
            for depth in range(max(len(c) for c in cells)):
                lines.append(self._line([c[depth] if depth < len(c) else ("", "") for c in cells], widths))
            room = max(1, width - self.indent_below)
            for text, style in row.below:
                for part in wrap_words(text, room):
                    lines.append(Text(" " * self.indent_below + part, style=style))
        return lines

    def _line(self, cells: list[tuple[str, str]], widths: list[int]) -> Text:
        line = Text()
        for index, ((text, style), column, w) in enumerate(
            zip(cells, self.columns, widths, strict=True)
        ):
            pad = " " * max(0, w - cell_len(text))
            if index:
                line.append(GAP)
            if column.align == "right":
                line.append(pad)
                line.append(text, style=style)
            else:
                line.append(text, style=style)
                if index < len(self.columns) - 1:
                    line.append(pad)
        line.rstrip()
        return line
