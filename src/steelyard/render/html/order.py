"""The order in which the charts draw layers "along the model".

Stored order is not depth order (safetensors keeps names sorted, so ``fc10`` comes before
``fc2``). Layers are ordered by the producer-consumer links the graph found (a producer before
its consumers), and otherwise by name with runs of digits compared as numbers.
"""

from __future__ import annotations

import heapq
import re
from collections.abc import Mapping, Sequence
from typing import Any

_DIGITS = re.compile(r"(\d+)")


def natural_key(name: str) -> tuple[tuple[int, int | str], ...]:
    """``layers.10`` after ``layers.9``: digit runs compare as numbers, the rest as text."""
    return tuple((0, int(part)) if part.isdigit() else (1, part) for part in _DIGITS.split(name) if part)


def along_model(blocks: Sequence[Mapping[str, Any]]) -> list[int]:
    """Indices of ``blocks`` (layer entries with ``name`` and ``inputs_from``) in depth order:
    a topological order of the links, ties and unlinked layers taken by natural name order."""
    names = [str(b.get("name", "")) for b in blocks]
    index = {name: i for i, name in enumerate(names)}
    producers: list[set[int]] = [
        {index[p] for p in b.get("inputs_from") or () if p in index and index[p] != i}
        for i, b in enumerate(blocks)
    ]
    consumers: list[list[int]] = [[] for _ in blocks]
    waiting = [len(p) for p in producers]
    for i, found in enumerate(producers):
        for p in found:
            consumers[p].append(i)
    ready = [(natural_key(names[i]), i) for i in range(len(blocks)) if not waiting[i]]
    heapq.heapify(ready)
    order: list[int] = []
    while ready:
        _, i = heapq.heappop(ready)
        order.append(i)
        for c in consumers[i]:
            waiting[c] -= 1
            if not waiting[c]:
                heapq.heappush(ready, (natural_key(names[c]), c))
    if len(order) < len(blocks):  # a cycle in the links (recurrent wiring): name order for the rest
        rest = sorted((i for i in range(len(blocks)) if i not in set(order)), key=lambda i: natural_key(names[i]))
        order += rest
    return order
