"""Text report helpers: tables, numbers and rendering rich renderables to a string."""

from __future__ import annotations

import math
from collections.abc import Container, Iterable

from rich.table import Table

from steelyard.coverage import Coverage, describe
from steelyard.numbers import count as count
from steelyard.numbers import measured
from steelyard.numbers import percent as percent
from steelyard.numbers import plural as plural
from steelyard.render.console import to_text as to_text


def titled_table(title: str, columns: Iterable[str], right: Container[str]) -> Table:
    """An empty titled table with the ``right`` columns (numbers) right-aligned.

    The audit's layer health and the comparison's layer changes share it so that the two
    reports' tables look alike.
    """
    table = Table(
        title=title,
        show_edge=False,
        header_style="bold",
        pad_edge=False,
        title_justify="left",
    )
    for column in columns:
        table.add_column(column, justify="right" if column in right else "left")
    return table


def human_count(value: int) -> str:
    """1234567 → '1.23M' (exact below ten thousand)."""
    if value < 10_000:
        return str(value)
    for unit, size in (("G", 1e9), ("M", 1e6), ("k", 1e3)):
        if value >= size:
            return f"{value / size:.3g}{unit}"
    return str(value)


def human_bytes(value: int) -> str:
    """File sizes in binary units."""
    size = float(value)
    for unit in ("B", "KiB", "MiB", "GiB", "TiB"):
        if size < 1024 or unit == "TiB":
            return f"{size:.0f} {unit}" if unit == "B" else f"{size:.1f} {unit}"
        size /= 1024
    return f"{value} B"


# One number rule for the terminal reports: counts are exact with thousands separators;
# measured values have three significant figures, with separators from a thousand up and
# powers of ten below a ten-thousandth; shares are percentages that never round a partial share
# up to 100 % or down to 0 %.


def number(value: float) -> str:
    """A measured value to three significant figures (:func:`steelyard.numbers.measured`),
    but '—' for NaN, which in a report's table means "not measured"."""
    return "—" if math.isnan(value) else measured(value)


def coverage_line(coverage: Coverage) -> str:
    """What the layer rules saw, as every report says it (:func:`steelyard.coverage.describe`)."""
    return describe(coverage)

