"""The layer changes of ``steelyard compare`` in the terminal, in two layouts, and the most
changed units.

Wide terminals (at least :data:`~steelyard.render.grid.COMPACT_BELOW` columns, and room for
every measure at its natural width beside the names) get one column per measure, with a bar of
the relative change; narrow ones keep the status, the change, the
cosine and the optional columns (stored types, largest single change, update rank) on the row
and say below it what happened to units (died, revived, flattened). The fan-in norm medians
are then left to the unit detail and ``--format json``. A layer matched under another name in
OLD (``blk.3.attn_q`` and ``model.layers.3.self_attn.q_proj``) keeps both names readable: in a
column of its own when the whole table fits, else on a line under the row, in full.
"""

from __future__ import annotations

import math

from rich.text import Text

from steelyard.comparison.report import LayerDiff, Status
from steelyard.findings import compact_units
from steelyard.render.grid import COMPACT_BELOW, GAP, Cell, Column, Grid, indented
from steelyard.render.text import count, number, plural

STATUS_STYLE = {
    Status.SAME: "green",
    Status.CHANGED: "yellow",
    Status.ADDED: "cyan",
    Status.REMOVED: "magenta",
    Status.RESHAPED: "magenta",
}
_EIGHTHS = " ▏▎▍▌▋▊▉"
#: Cells of the change bar; a full bar is the largest change shown (at least 1.0).
BAR_CELLS = 10
#: Layer rows shown in the terminal (JSON has them all).
MAX_ROWS = 40
#: Changed layers whose most changed units are listed.
DETAIL_LAYERS = 3


def bar(value: float | None, full: float, cells: int = BAR_CELLS) -> str:
    """A horizontal bar of ``value / full`` in eighths of a cell."""
    if value is None or full <= 0:
        return ""
    if not math.isfinite(value):
        return "█" * cells
    eighths = round(min(1.0, max(0.0, value / full)) * cells * 8)
    whole, rest = divmod(eighths, 8)
    return "█" * whole + (_EIGHTHS[rest] if rest else "")


def measured(value: float | None) -> str:
    """A measured value in the report's one number format; ``—`` when not measured."""
    return "—" if value is None else number(value)


def rank_cell(diff: LayerDiff) -> str:
    """The update's effective rank, ``>64`` past the resolved limit, ``—`` when not measured."""
    if diff.update_rank is not None:
        return count(diff.update_rank)
    return f">{diff.update_rank_above:,}" if diff.update_rank_above else "—"


def status_label(diff: LayerDiff) -> str:
    """``changed``, ``same (permuted)``, ``same (bf16 rounding)``..."""
    label = diff.status.value
    if diff.permuted:
        label += " (permuted)"
    elif diff.precision_only:
        label += f" ({diff.precision or 'precision'} rounding)"
    return label


def stored_cell(diff: LayerDiff) -> str:
    """``f32 → Q4_K`` when the stored type changed, the one type when it did not."""
    old, new = diff.stored_old or "—", diff.stored_new or "—"
    return old if old == new else f"{old} → {new}"


def renamed(diff: LayerDiff) -> bool:
    """OLD's layer has another name than NEW's."""
    return diff.old_name not in (None, diff.name)


def _units_said(diff: LayerDiff) -> str:
    """What happened to units, for the compact layout's line under a row."""
    parts = [
        f"{plural(len(units), 'unit')} {what} ({compact_units(units, 8)})"
        for units, what in (
            (diff.units_died, "died"),
            (diff.units_revived, "revived"),
            (diff.rows_flattened, "flattened"),
        )
        if units
    ]
    return "; ".join(parts)


def _counted(units: tuple[int, ...]) -> str:
    return count(len(units)) if units else "—"


class _Shape:
    """Which optional columns the shown rows need."""

    def __init__(self, shown: tuple[LayerDiff, ...]) -> None:
        self.stored = any(d.stored_old != d.stored_new for d in shown)
        self.ranked = any(d.update_rank is not None or d.update_rank_above for d in shown)
        self.flattened = any(d.rows_flattened for d in shown)
        self.renamed = any(renamed(d) for d in shown)
        self.unit_events = any(d.units_died or d.units_revived or d.rows_flattened for d in shown)


def _columns(shape: _Shape, compact: bool, old_column: bool) -> list[Column]:
    columns = [Column("layer", wrap="name", floor=40 if compact else 30, one_line=True)]
    if old_column:
        columns.append(Column("OLD name", wrap="name", floor=30, one_line=True))
    columns.append(Column("status", wrap="words"))
    columns.append(Column("change", align="right"))
    if not compact:
        columns.append(Column(""))  # the bar
    columns.append(Column("cosine", align="right"))
    if shape.stored:
        columns += [Column("stored"), Column("max |Δ|", align="right")]
    if shape.ranked:
        columns.append(Column("rank", align="right"))
    if not compact:
        columns += [
            Column("fan-in norm median"),
            Column("died", align="right"),
            Column("revived", align="right"),
        ]
        if shape.flattened:
            columns.append(Column("flattened", align="right"))
    return columns


def _grid(
    shown: tuple[LayerDiff, ...], shape: _Shape, compact: bool, old_column: bool,
    tails: dict[str, str],
) -> Grid:
    finite = [
        d.relative_change
        for d in shown
        if d.relative_change is not None and math.isfinite(d.relative_change)
    ]
    full = max([1.0, *finite])
    grid = Grid(tuple(_columns(shape, compact, old_column)), tails=tails)
    for diff in shown:
        cells: list[Cell | str] = [diff.name]
        if old_column:
            cells.append(diff.old_name if renamed(diff) and diff.old_name else "—")
        cells += [
            Cell.of(status_label(diff), STATUS_STYLE[diff.status]),
            measured(diff.relative_change),
        ]
        if not compact:
            cells.append(bar(diff.relative_change, full))
        cells.append(measured(diff.cosine))
        if shape.stored:
            cells += [stored_cell(diff), measured(diff.max_abs_change)]
        if shape.ranked:
            cells.append(rank_cell(diff))
        below: list[tuple[str, str]] = []
        if renamed(diff) and not old_column:
            below.append((f"OLD name: {diff.old_name}", "dim"))
        if compact:
            said = _units_said(diff)
            below += [(said, "yellow")] if said else []
        else:
            old = diff.fan_in_norm_old[1] if diff.fan_in_norm_old else None
            new = diff.fan_in_norm_new[1] if diff.fan_in_norm_new else None
            cells += [
                f"{measured(old)} → {measured(new)}",
                _counted(diff.units_died),
                _counted(diff.units_revived),
            ]
            if shape.flattened:
                cells.append(_counted(diff.rows_flattened))
        grid.add(*cells, below=below)
    return grid


def _fits(grid: Grid, width: int) -> bool:
    """Every column gets its natural width: no name shortened or wrapped."""
    natural = grid.widths(10**6)
    return sum(natural) + len(GAP) * (len(natural) - 1) <= width


def _roomy(grid: Grid, width: int) -> bool:
    """Only the name columns give up room: every measure keeps its natural width."""
    natural, got = grid.widths(10**6), grid.widths(width)
    return all(
        fitted >= wanted
        for column, fitted, wanted in zip(grid.columns, got, natural, strict=True)
        if column.wrap != "name"
    )


def _legend(shape: _Shape, compact: bool) -> str:
    parts = [
        "change: how far the layer's weights moved, the norm of NEW minus OLD over the norm "
        "of OLD" + ("" if compact else " (the bar draws it, full at 1 or the largest shown)"),
        "cosine: of OLD's and NEW's weights, 1 when they point the same way",
    ]
    if shape.stored:
        parts += [
            "stored: how OLD and NEW store the weights",
            "max |Δ|: the largest change of any single weight",
        ]
    if shape.ranked:
        parts.append(
            "rank: how many singular directions hold 99% of the update (>N: more than the N "
            "it counts up to)"
        )
    if not compact:
        parts.append(
            "fan-in norm median: the median L2 norm of a unit's incoming weights, OLD → NEW"
        )
        parts.append("died, revived: units dead in NEW but alive in OLD, and the reverse")
        if shape.flattened:
            parts.append("flattened: units whose weights are all equal in NEW but not in OLD")
    elif shape.unit_events:
        parts.append(
            "a line under a row says which units died, revived or were flattened (all weights "
            "equal in NEW but not in OLD)"
        )
    return "; ".join(parts)


def layer_changes(layers: tuple[LayerDiff, ...], width: int, tails: dict[str, str]) -> list[Text]:
    """The layer-changes table, its legend and the count of rows left out."""
    shown = layers[:MAX_ROWS]
    shape = _Shape(shown)
    compact = width < COMPACT_BELOW
    grid = _grid(shown, shape, compact, old_column=False, tails=tails)
    if not compact and not _roomy(grid, width):
        # The wide layout's many columns (stored types, rank, flattened...) do not fit beside
        # the names: the compact one keeps every measure readable instead of wrapping them.
        compact = True
        grid = _grid(shown, shape, compact, old_column=False, tails=tails)
    if shape.renamed and not compact:
        wide = _grid(shown, shape, compact, old_column=True, tails=tails)
        grid = wide if _fits(wide, width) else grid
    lines = [Text("layer changes, largest first", style="bold"), *grid.render(width)]
    if len(layers) > len(shown):
        lines += indented(
            f"… and {plural(len(layers) - len(shown), 'more layer')} (--format json lists them "
            "all)",
            width,
            "dim",
            indent=0,
        )
    lines += indented(_legend(shape, compact), width, "dim", indent=0)
    return lines


def unit_detail(layers: tuple[LayerDiff, ...], width: int, tails: dict[str, str]) -> list[Text]:
    """The most changed units of the most changed layers, one row per unit."""
    changed = [d for d in layers if d.status is Status.CHANGED and d.top_units][:DETAIL_LAYERS]
    if not changed:
        return []
    grid = Grid(
        (
            Column("layer", wrap="name", floor=40, one_line=True),
            Column("unit", align="right"),
            Column("change", align="right"),
            Column("fan-in norm, OLD → NEW", wrap="words"),
        ),
        tails=tails,
    )
    for diff in changed:
        for index, unit in enumerate(diff.top_units):
            last = index == len(diff.top_units) - 1
            died = (
                [(f"units that died in this layer: {compact_units(diff.units_died)}", "yellow")]
                if last and diff.units_died
                else []
            )
            grid.add(
                diff.name if index == 0 else "",
                str(unit.unit),
                measured(unit.relative_change),
                f"{measured(unit.old_norm)} → {measured(unit.new_norm)}",
                below=died,
            )
    return [Text(""), Text("most changed units", style="bold"), *grid.render(width)]
