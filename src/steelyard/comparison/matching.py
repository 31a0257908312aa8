"""Which layer of NEW is which layer of OLD.

Two passes. First by stored tensor name: the layer's ``weight`` tensor and its recurrent
``gate``, which is exact whenever both files keep the training framework's names. Then, for
the layers left over (the same model exported to a format that renames tensors), by graph
position: the longest order-preserving alignment of the two layer sequences in which every
pair agrees on kind and shape (units, in/groups, groups, kernel). Orientation is not an issue
because loaders already expose every weight in the canonical ``[out, in/groups, *kernel]``
view. Left-over layers between two aligned anchors pair up as *reshaped* when both sides hold
the same number of them with the same kinds; anything else is *added* or *removed*.
"""

from __future__ import annotations

from collections import defaultdict
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

from steelyard.graph import Layer

#: Largest alignment table (old × new unmatched layers) solved exactly; beyond it layers of
#: each signature pair up in order, which is linear.
MAX_ALIGNMENT_CELLS = 4_000_000

Signature = tuple[str, int, int, int, tuple[int, ...]]


@dataclass(frozen=True, slots=True)
class Pair:
    """One row of the matching: a layer on both sides, or on one side only."""

    old: Layer | None
    new: Layer | None
    matched_by: str | None
    """``name`` or ``position`` when both sides are present (``name`` also when the names
    matched through a naming-scheme map)."""

    @property
    def same_shape(self) -> bool:
        """Both sides present with identical kind and shape."""
        return (
            self.old is not None
            and self.new is not None
            and signature(self.old) == signature(self.new)
        )


def signature(layer: Layer) -> Signature:
    """Kind and shape of a layer's canonical view."""
    return (layer.kind.value, layer.units, layer.in_per_group, layer.groups, tuple(layer.kernel))


def _by_name(
    old: Sequence[Layer], new: Sequence[Layer], aliases: Mapping[str, str]
) -> dict[int, int]:
    """Old index → new index for layers backed by the same tensor name (and gate), OLD's
    names first translated into NEW's naming scheme by ``aliases`` where it has them."""
    slots: dict[tuple[str, str], list[int]] = defaultdict(list)
    for index, layer in enumerate(old):
        slots[(aliases.get(layer.weight, layer.weight), layer.gate or "")].append(index)
    taken: dict[int, int] = {}
    used: dict[tuple[str, str], int] = defaultdict(int)
    for index, layer in enumerate(new):
        key = (layer.weight, layer.gate or "")
        candidates = slots.get(key, [])
        # Tied weights give one tensor several layers: pair them in order of appearance.
        if used[key] < len(candidates):
            taken[candidates[used[key]]] = index
            used[key] += 1
    return taken


def _align(old: Sequence[Layer], new: Sequence[Layer]) -> list[tuple[int, int]]:
    """Longest order-preserving alignment of equal signatures (index pairs)."""
    a = [signature(layer) for layer in old]
    b = [signature(layer) for layer in new]
    if not a or not b:
        return []
    if len(a) * len(b) > MAX_ALIGNMENT_CELLS:
        return _zip_by_signature(a, b)
    rows, cols = len(a), len(b)
    table = [[0] * (cols + 1) for _ in range(rows + 1)]
    for i in range(rows - 1, -1, -1):
        row, below = table[i], table[i + 1]
        for j in range(cols - 1, -1, -1):
            row[j] = below[j + 1] + 1 if a[i] == b[j] else max(below[j], row[j + 1])
    pairs: list[tuple[int, int]] = []
    i = j = 0
    while i < rows and j < cols:
        if a[i] == b[j] and table[i][j] == table[i + 1][j + 1] + 1:
            pairs.append((i, j))
            i += 1
            j += 1
        elif table[i + 1][j] >= table[i][j + 1]:
            i += 1
        else:
            j += 1
    return pairs


def _zip_by_signature(a: list[Signature], b: list[Signature]) -> list[tuple[int, int]]:
    """The k-th layer of each signature in OLD with the k-th of that signature in NEW."""
    queues: dict[Signature, list[int]] = defaultdict(list)
    for j, sig in enumerate(b):
        queues[sig].append(j)
    seen: dict[Signature, int] = defaultdict(int)
    pairs: list[tuple[int, int]] = []
    for i, sig in enumerate(a):
        if seen[sig] < len(queues[sig]):
            pairs.append((i, queues[sig][seen[sig]]))
            seen[sig] += 1
    pairs.sort(key=lambda p: p[1])
    return pairs


def _gaps(
    left: Sequence[int], right: Sequence[int], anchors: list[tuple[int, int]]
) -> list[tuple[list[int], list[int]]]:
    """Runs of unaligned indices between consecutive anchors, on each side."""
    anchored_left = {i for i, _ in anchors}
    anchored_right = {j for _, j in anchors}
    cut_left = [i for i, _ in anchors] + [len(left)]
    cut_right = [j for _, j in anchors] + [len(right)]
    out: list[tuple[list[int], list[int]]] = []
    start_left = start_right = 0
    for end_left, end_right in zip(cut_left, cut_right, strict=True):
        if end_left < start_left or end_right < start_right:
            continue  # crossing anchors (signature fallback): no gap to pair
        out.append(
            (
                [i for i in range(start_left, end_left) if i not in anchored_left],
                [j for j in range(start_right, end_right) if j not in anchored_right],
            )
        )
        start_left, start_right = end_left + 1, end_right + 1
    return out


def match_layers(
    old: Sequence[Layer], new: Sequence[Layer], aliases: Mapping[str, str] | None = None
) -> list[Pair]:
    """Every layer of both checkpoints, paired where possible, in NEW's order. ``aliases``
    maps OLD's weight tensor names to NEW's scheme when the two files name tensors
    differently (a float checkpoint and its GGUF export: :mod:`steelyard.comparison.precision`).

    Removed layers follow the NEW layer they preceded in OLD's order as closely as known.
    """
    named = _by_name(old, new, aliases or {})
    rest_old = [i for i in range(len(old)) if i not in named]
    matched_new = set(named.values())
    rest_new = [j for j in range(len(new)) if j not in matched_new]
    aligned = _align([old[i] for i in rest_old], [new[j] for j in rest_new])
    by_position = {rest_old[i]: rest_new[j] for i, j in aligned}
    reshaped: dict[int, int] = {}
    for gap_old, gap_new in _gaps(rest_old, rest_new, aligned):
        if len(gap_old) == len(gap_new) and all(
            old[rest_old[i]].kind is new[rest_new[j]].kind
            for i, j in zip(gap_old, gap_new, strict=True)
        ):
            reshaped.update(
                {rest_old[i]: rest_new[j] for i, j in zip(gap_old, gap_new, strict=True)}
            )

    partner: dict[int, tuple[int, str]] = {}
    for i, j in named.items():
        partner[j] = (i, "name")
    for i, j in (*by_position.items(), *reshaped.items()):
        partner[j] = (i, "position")
    paired_old = {i for i, _ in partner.values()}
    # Removed layers go after the NEW layer matched to their nearest paired predecessor.
    removed_after: dict[int, list[int]] = defaultdict(list)
    old_to_new = {i: j for j, (i, _) in partner.items()}
    anchor = -1
    for i in range(len(old)):
        if i in old_to_new:
            anchor = old_to_new[i]
        elif i not in paired_old:
            removed_after[anchor].append(i)
    pairs: list[Pair] = [Pair(old[i], None, None) for i in removed_after.get(-1, [])]
    for j, layer in enumerate(new):
        if j in partner:
            i, how = partner[j]
            pairs.append(Pair(old[i], layer, how))
        else:
            pairs.append(Pair(None, layer, None))
        pairs.extend(Pair(old[i], None, None) for i in removed_after.get(j, []))
    return pairs
