"""Judging both sides of a comparison with the same knowledge of the model's structure.

The same weights saved twice can say different amounts about the model: an ONNX graph or a
Keras config names each layer's activation, normalisation, inputs and groups, while a
safetensors, npz or PyTorch state dict gives names and shapes only, from which
:mod:`~steelyard.loaders.conventions` infers what it can. Rules that depend on that structure
(a ReLU unit that can never fire, a unit no consumer reads, a silenced normalisation scale, a
declared constraint) then judge one side and not the other, and the comparison would report
the difference in knowledge as a change of the model.

So for every matched pair the richer side's structure is used for both sides: the poorer
side's :class:`~steelyard.graph.Layer` is rebuilt with :func:`dataclasses.replace` (layers and
checkpoints are frozen; nothing is mutated) and a new :class:`~steelyard.graph.Checkpoint`
view holds the rebuilt layers over the same lazily read tensors. What is taken, and when:

* **activation**: when one side knows it and the other says ``unknown``;
* **links** (``inputs_from`` translated through the matching, with ``linked_by``,
  ``from_input``, ``channels_last_inputs`` and ``is_output``): when one side's links come from a
  better source (graph or config over names over none) and every input layer has a partner;
* **normalisation**: when the richer-linked side has one and the other has none but holds its
  tensors, read by no other of its layers: under the same names and shapes, or renamed and
  found by their values (exactly equal, and only one candidate);
* **kind and groups**: when one side is described by a graph or config and the other is not,
  and both expose the same canonical shape (units, inputs per group, kernel); the kind only
  between dense and embedding, whose canonical views are the stored matrix on both sides;
* **constraint and regularizer**: when one side declares them and the other is not itself a
  config that declares none.

Both sides' values are never touched: only the description of the layer around them.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from steelyard.comparison.matching import Pair, signature
from steelyard.graph import Activation, Checkpoint, Layer, LayerKind, Link, Norm, TensorRole
from steelyard.stats import read_float32

#: How much a layer's ``linked_by`` says: a graph or config states the structure, names only
#: suggest it, none knows nothing.
_RANK = {Link.GRAPH: 2, Link.CONFIG: 2, Link.INFERRED: 1, Link.NONE: 0}
#: Kinds whose canonical view is the stored ``[rows, columns]`` matrix in every loader, so the
#: label can change without the view changing.
_RELABEL = frozenset({LayerKind.DENSE, LayerKind.EMBEDDING})
_SOURCE = {Link.GRAPH: "graph", Link.CONFIG: "config", Link.INFERRED: "names"}
_NORM_PARTS = ("scale", "shift", "mean", "var")


@dataclass(frozen=True)
class SharedStructure:
    """Both checkpoints as the comparison judges them, and what was taken from where."""

    old: Checkpoint
    new: Checkpoint
    pairs: tuple[Pair, ...]
    """The matching with the rebuilt layers (same order, same ``matched_by``)."""
    taken_from: Mapping[str, str]
    """NEW's layer name → ``OLD``, ``NEW`` or ``both``: whose structure the pair was judged with,
    for pairs where one side took something from the other."""
    notes: tuple[str, ...]


def _borrow(
    dst: Layer,
    src: Layer,
    partner: Mapping[str, str],
    dst_side: Checkpoint,
    src_side: Checkpoint,
    claimed: Mapping[str, str],
) -> tuple[dict[str, Any], list[str], list[str]]:
    """What ``dst`` takes from ``src`` (replace() keywords), the names of what it took, and
    what it could not take with why. ``partner`` maps ``src``'s layer names to ``dst``'s."""
    update: dict[str, Any] = {}
    took: list[str] = []
    missed: list[str] = []
    described = _RANK[src.linked_by] == 2 and _RANK[dst.linked_by] < 2
    same_view = (dst.units, dst.in_per_group, tuple(dst.kernel)) == (
        src.units,
        src.in_per_group,
        tuple(src.kernel),
    )
    if described and same_view:
        if dst.kind is not src.kind and {dst.kind, src.kind} <= _RELABEL:
            update["kind"] = src.kind
            took.append("kind")
        if dst.groups != src.groups and update.get("kind", dst.kind) is src.kind:
            update["groups"] = src.groups
            took.append("groups")
    if signature(replace(dst, **update)) != signature(src):
        return {}, [], []  # a reshaped pair: its structure is its own
    if src.activation is not Activation.UNKNOWN and dst.activation is Activation.UNKNOWN:
        update["activation"] = src.activation
        took.append("activation")
    if _RANK[src.linked_by] > _RANK[dst.linked_by]:
        sources = [partner.get(name) for name in src.inputs_from]
        if all(sources):
            update.update(
                inputs_from=tuple(s for s in sources if s),
                linked_by=src.linked_by,
                from_input=src.from_input,
                channels_last_inputs=src.channels_last_inputs,
                is_output=src.is_output,
            )
            took.append("links")
        else:
            missed.append("links (an input layer has no partner)")
        if src.norm is not None and dst.norm is None:
            carried = _carried_norm(src.norm, dst, dst_side, src_side, claimed)
            if carried is not None:
                update["norm"] = carried
                took.append("normalisation")
            else:
                missed.append("normalisation (its tensors are not found in this file)")
    config = dst.linked_by is Link.CONFIG  # a config that declares none means none
    if src.constraint is not None and dst.constraint is None and not config:
        update["constraint"] = src.constraint
        took.append("constraint")
    if src.regularizer is not None and dst.regularizer is None and not config:
        update["regularizer"] = src.regularizer
        took.append("regularizer")
    return update, took, missed


def _carried_norm(
    norm: Norm, dst: Layer, dst_side: Checkpoint, src_side: Checkpoint, claimed: Mapping[str, str]
) -> Norm | None:
    """``norm`` (a layer of ``src_side``) with the names of ``dst_side``'s tensors that hold it,
    or None when they cannot be told for certain.

    Each part is the tensor of the same name and shape, else the one tensor of ``dst_side``
    that no other layer reads and that holds exactly the same values (a file that renamed the
    tensors); two candidates with equal values (a zero shift and a zero running mean) make it
    unknown. Only per-unit vectors are read, so this stays cheap.
    """
    free = {
        name: tensor
        for name, tensor in dst_side.tensors.items()
        if claimed.get(name, dst.name) == dst.name and tensor.role is TensorRole.PARAMETER
    }
    mapped: dict[str, str] = {}
    for part in _NORM_PARTS:
        name = getattr(norm, part)
        if name is None:
            continue
        source = src_side.tensors.get(name)
        if source is None:
            return None
        same = free.get(name)
        if same is not None and same.shape == source.shape:
            mapped[part] = name
            continue
        values = read_float32(source)
        hits = [
            other
            for other, tensor in free.items()
            if tensor.shape == source.shape
            and other not in mapped.values()
            and np.array_equal(read_float32(tensor), values)
        ]
        if len(hits) != 1:
            return None
        mapped[part] = hits[0]
    if len(set(mapped.values())) != len(mapped):
        return None
    return replace(
        norm,
        scale=mapped.get("scale"),
        shift=mapped.get("shift"),
        mean=mapped.get("mean"),
        var=mapped.get("var"),
    )


def _source(side: Checkpoint, layers: Sequence[Layer]) -> str:
    """``onnx graph``, ``keras config``, ``safetensors names``: where the taken structure came
    from, by the best link source among the layers it came from."""
    best = max((layer.linked_by for layer in layers), key=lambda link: _RANK[link])
    return f"{side.format.value} {_SOURCE.get(best, 'file')}"


def _note(dst: str, src: str, side: Checkpoint, layers: list[Layer], what: Counter[str]) -> str:
    count = len(layers)
    parts = ", ".join(name for name, _ in what.most_common())
    return (
        f"layer structure of {dst} taken from {src} ({_source(side, layers)}) for {count} "
        f"matched layer{'s' if count != 1 else ''}: {parts}; both sides are judged with it"
    )


def share_structure(old: Checkpoint, new: Checkpoint, pairs: Sequence[Pair]) -> SharedStructure:
    """Rebuild the poorer side of every matched pair with the richer side's structure."""
    matched = [p for p in pairs if p.old is not None and p.new is not None]
    old_to_new: dict[str, str] = {}
    new_to_old: dict[str, str] = {}
    for pair in matched:
        assert pair.old is not None and pair.new is not None
        old_to_new.setdefault(pair.old.name, pair.new.name)
        new_to_old.setdefault(pair.new.name, pair.old.name)
    claimed_old = {n: layer.name for layer in old.layers for n in layer.tensor_names}
    claimed_new = {n: layer.name for layer in new.layers for n in layer.tensor_names}
    rebuilt: dict[int, Layer] = {}  # id() of an original layer → its rebuilt layer
    taken_from: dict[str, str] = {}
    into_old: list[Layer] = []
    into_new: list[Layer] = []
    what_old: Counter[str] = Counter()
    what_new: Counter[str] = Counter()
    missed: list[str] = []
    for pair in matched:
        assert pair.old is not None and pair.new is not None
        for dst, src, partner, dst_side, src_side, claimed, sink, what, label in (
            (pair.old, pair.new, new_to_old, old, new, claimed_old, into_old, what_old, "OLD"),
            (pair.new, pair.old, old_to_new, new, old, claimed_new, into_new, what_new, "NEW"),
        ):
            update, took, lost = _borrow(dst, src, partner, dst_side, src_side, claimed)
            if update:
                rebuilt[id(dst)] = replace(dst, **update)
                sink.append(src)
                what.update(took)
                giver = "NEW" if label == "OLD" else "OLD"
                previous = taken_from.get(pair.new.name)
                taken_from[pair.new.name] = giver if previous in (None, giver) else "both"
            missed += [f"{label} layer {dst.name!r} could not take its {m}" for m in lost]

    def view(side: Checkpoint) -> Checkpoint:
        if not any(id(layer) in rebuilt for layer in side.layers):
            return side
        return replace(side, layers=tuple(rebuilt.get(id(layer), layer) for layer in side.layers))

    shared_pairs = tuple(
        Pair(
            rebuilt.get(id(p.old), p.old) if p.old is not None else None,
            rebuilt.get(id(p.new), p.new) if p.new is not None else None,
            p.matched_by,
        )
        for p in pairs
    )
    notes: list[str] = []
    if into_old:
        notes.append(_note("OLD", "NEW", new, into_old, what_old))
    if into_new:
        notes.append(_note("NEW", "OLD", old, into_new, what_new))
    if missed:
        shown = "; ".join(missed[:5]) + (f"; … {len(missed) - 5} more" if len(missed) > 5 else "")
        notes.append(f"the two sides are judged with different structure where {shown}")
    return SharedStructure(
        old=view(old),
        new=view(new),
        pairs=shared_pairs,
        taken_from=taken_from,
        notes=tuple(notes),
    )
