"""Numbered layer names: ``seq.<N>``, ``convN``, ``fc_N``... PyTorch's ``nn.Sequential`` and
hand-named stacks number their layers in the order data flows through them, so the nearest
lower-numbered sibling is the likely producer, and names sort in natural order.

Names come from the file, so nothing here converts a digit run it has not bounded first or
scans a range a (hostile) number sets.
"""

from __future__ import annotations

import re
from bisect import bisect_left
from collections import defaultdict
from collections.abc import Iterable

from steelyard.loaders.conventions.module_names import split_name

_DIGIT_RUNS = re.compile(r"([0-9]+)", re.ASCII)


#: Leaves numbered the way the numbered-sibling search understands: ``seq.<N>`` (no stem)
#: and ``convN``/``fc_N``/``layerN``… Only ASCII digits: ``str.isdigit`` accepts superscripts
#: that ``int`` refuses.
_NUMBERED = re.compile(r"(?:(conv|fc|linear|dense|layer|lin|hidden)(_?))?([0-9]+)", re.ASCII)
#: Longest number read from a name (a layer index has a handful of digits; a name carrying a
#: longer number is simply not a numbered sibling, so no search and no int conversion limit).
_MAX_DIGITS = 18


def natural_key(text: str) -> list[tuple[int, int, str]]:
    """Sort key that puts ``seq.10`` after ``seq.2``.

    Numbers compare by length, then digits (leading zeros dropped), never through ``int``:
    a name may carry more digits than ``int`` converts, and converting would be quadratic.
    """
    key: list[tuple[int, int, str]] = []
    for part in _DIGIT_RUNS.split(text):
        if part.isascii() and part.isdigit():
            digits = part.lstrip("0")
            key.append((0, len(digits), digits))
        else:
            key.append((1, 0, part))
    return key


def numbered_leaf(leaf: str) -> tuple[str, str, int] | None:
    """(stem, separator, number) of a numbered leaf (``("", "", 3)`` for ``"3"``), else None."""
    match = _NUMBERED.fullmatch(leaf)
    if match is None or len(match.group(3)) > _MAX_DIGITS:
        return None
    return match.group(1) or "", match.group(2) or "", int(match.group(3))


class Siblings:
    """Numbered layers indexed by (parent, stem, separator), numbers sorted.

    The previous numbered sibling of ``seq.7`` is the highest-numbered ``seq.<k>`` with
    ``k < 7``; looking it up by bisection keeps the search linear in the number of layers
    whatever number a (hostile) name carries.
    """

    def __init__(self, names: Iterable[str]) -> None:
        groups: dict[tuple[str, str, str], set[int]] = defaultdict(set)
        for name in names:
            parent, leaf = split_name(name)
            found = numbered_leaf(leaf)
            # The search names candidates by the canonical number (``seq.6``, never
            # ``seq.06``), so only canonically spelled layers can be found.
            if found is not None and leaf == f"{found[0]}{found[1]}{found[2]}":
                groups[(parent, found[0], found[1])].add(found[2])
        self._numbers = {key: sorted(numbers) for key, numbers in groups.items()}

    def previous(self, parent: str, leaf: str) -> str | None:
        """The nearest lower-numbered sibling of ``<parent>.<leaf>``, None when none."""
        found = numbered_leaf(leaf)
        if found is None:
            return None
        stem, sep, number = found
        numbers = self._numbers.get((parent, stem, sep), [])
        position = bisect_left(numbers, number)
        if position == 0:
            return None
        prefix = f"{parent}." if parent else ""
        return f"{prefix}{stem}{sep}{numbers[position - 1]}"
