"""Fitting text into terminal columns without breaking a word or hiding what tells names apart.

Prose wraps at spaces only. A name (a layer, a tensor, a path) has no spaces, so it wraps after
its separators (``.``, ``/``, ``_``, ``-``, ``,``), or, where a table must stay one line per
row, loses leading components in favour of an ellipsis while keeping the tail that no other
name of the report has. A piece is cut inside only when it alone is wider than the whole column,
which a caller avoids by giving the column at least :func:`longest_piece`.
Widths are terminal cells (``rich.cells.cell_len``), so wide characters count double.
"""

from __future__ import annotations

import re
from bisect import bisect_left, bisect_right
from collections.abc import Iterable, Sequence

from rich.cells import cell_len

#: Where a name may wrap: after these characters, the first group preferred (``q_proj`` stays
#: whole while a ``.`` or ``/`` can take the break).
PREFERRED_BREAKS = "./,"
NAME_BREAKS = "./,_-:"
#: Where a name may be shortened from the left: before a component that follows these.
_COMPONENT = re.compile(r"[^./_]+[./_]?|[./_]")
ELLIPSIS = "…"


def name_pieces(name: str, breaks: str = NAME_BREAKS) -> list[str]:
    """``model.layers.17`` → ``["model.", "layers.", "17"]``: the unbreakable pieces."""
    pieces: list[str] = []
    current = ""
    for char in name:
        current += char
        if char in breaks:
            pieces.append(current)
            current = ""
    if current:
        pieces.append(current)
    return pieces


def _hard_cut(piece: str, width: int) -> list[str]:
    """The last resort for a piece wider than the column: cut it by cells."""
    lines: list[str] = []
    current = ""
    for char in piece:
        if current and cell_len(current + char) > width:
            lines.append(current)
            current = ""
        current += char
    return [*lines, current] if current else lines


def _pack(
    pieces: Iterable[str | tuple[str, str]], width: int, joiner: str, finer: str = ""
) -> list[str]:
    """Greedy packing of pieces into lines of at most ``width`` cells, joined by ``joiner``
    (or by the joiner a ``(piece, joiner)`` pair brings); a piece wider than a line is split
    after the ``finer`` separators, and only then cut."""
    lines: list[str] = []
    current = ""
    for item in pieces:
        piece, join = (item, joiner) if isinstance(item, str) else item
        candidate = f"{current}{join}{piece}" if current else piece
        if cell_len(candidate) <= width:
            current = candidate
            continue
        if current:
            lines.append(current)
        if cell_len(piece) <= width:
            current = piece
            continue
        parts = name_pieces(piece, finer) if finer else []
        *whole, current = (
            _pack(parts, width, "") if len(parts) > 1 else _hard_cut(piece, width)
        )
        lines += whole
    if current or not lines:
        lines.append(current)
    return lines


def wrap_name(name: str, width: int) -> list[str]:
    """A name in lines of at most ``width`` cells, broken only after its separators (``.``,
    ``/`` and ``,`` first, then ``_``, ``-`` and ``:``)."""
    if cell_len(name) <= width:
        return [name]
    return _pack(name_pieces(name, PREFERRED_BREAKS), max(1, width), "", NAME_BREAKS)


def wrap_words(text: str, width: int) -> list[str]:
    """Prose in lines of at most ``width`` cells, broken only at spaces; a word wider than the
    line (a long tensor name quoted in a message) wraps after its separators instead."""
    lines: list[str] = []
    for paragraph in text.split("\n"):
        pieces: list[tuple[str, str]] = []
        for word in paragraph.split():
            if cell_len(word) <= width:
                pieces.append((word, " "))
                continue
            # The parts of a split word join each other with nothing, never with a space.
            first, *rest = wrap_name(word, width)
            pieces += [(first, " "), *((part, "") for part in rest)]
        lines += _pack(pieces, max(1, width), " ")
    return lines


def longest_word(text: str) -> int:
    """Cells of the widest word: a prose column narrower than this would break a word."""
    return max((cell_len(w) for w in text.split()), default=0)


def longest_piece(name: str, breaks: str = PREFERRED_BREAKS) -> int:
    """Cells of the widest piece of a name (or of a list of names with spaces) between its
    spaces and (preferred) separators."""
    return max(
        (cell_len(p) for word in name.split() for p in name_pieces(word, breaks)), default=0
    )


def _components(name: str) -> list[str]:
    return _COMPONENT.findall(name)


def distinct_tails(names: Iterable[str]) -> dict[str, str]:
    """For each name, the shortest run of trailing components (split after ``.``, ``/``, ``_``)
    with which no other name ends, so that no shown tail can be misread as part of another.

    ``model.layers.7.self_attn.q_proj`` beside ``model.layers.17.self_attn.q_proj`` keeps
    ``layers.7.self_attn.q_proj`` (``7.self_attn.q_proj`` also ends the other name), while the
    latter keeps ``17.self_attn.q_proj``; a name that ends another (``fc1`` beside
    ``encoder.fc1``) keeps everything.
    """
    unique = sorted(set(names))
    # A tail ends another name iff, reversed, it starts that name reversed: a sorted list of
    # reversed names answers it with two bisections, not a scan of every name.
    backwards = sorted(name[::-1] for name in unique)

    def ending(tail: str) -> int:
        reverse = tail[::-1]
        return bisect_right(backwards, reverse + "\U0010ffff") - bisect_left(backwards, reverse)

    tails: dict[str, str] = {}
    for name in unique:
        comps = _components(name)
        tails[name] = name
        for start in range(len(comps) - 1, 0, -1):
            tail = "".join(comps[start:])
            if ending(tail) == 1:
                tails[name] = tail
                break
    return tails


def shortened(name: str, width: int, tail: str) -> str:
    """``name`` in ``width`` cells when it fits; else ``…`` and as many trailing components as
    fit, never fewer than its distinct ``tail`` (which the caller wraps if even that is wider)."""
    if cell_len(name) <= width:
        return name
    comps = _components(name)
    best = ELLIPSIS + tail if tail != name else name
    for start in range(len(comps) - 1, 0, -1):
        candidate = ELLIPSIS + "".join(comps[start:])
        if cell_len(candidate) > width:
            break
        if len(candidate) > len(best):
            best = candidate
    return best


def fit_name(name: str, width: int, tails: dict[str, str], *, one_line: bool = False) -> list[str]:
    """A name in a column of ``width`` cells: whole when it fits; shortened from the left to a
    distinct tail when ``one_line`` asks for it; wrapped after separators otherwise (and when
    even the tail is wider than the column)."""
    if cell_len(name) <= width:
        return [name]
    if one_line:
        short = shortened(name, width, tails.get(name, name))
        return wrap_words(short, width)
    return wrap_words(name, width)


def widest(lines: Sequence[str]) -> int:
    """Cells of the widest line."""
    return max((cell_len(line) for line in lines), default=0)
