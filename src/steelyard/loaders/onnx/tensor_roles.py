"""Which stored tensors of an ONNX model count as parameters.

What counts follows how ops read each stored tensor: a value some op computes with (a float
initializer, a quantized weight or bias) counts; a tensor read only as a scale, a zero point or
a shape does not. A tensor read both ways (exporters merge equal constants) counts.
"""

from __future__ import annotations

from steelyard.graph import TensorRole
from steelyard.loaders.onnx.layer_draft import Draft
from steelyard.loaders.onnx.lookthrough import Folder, View
from steelyard.loaders.onnx.node_graph import Graphs
from steelyard.loaders.onnx.op_kinds import CONTROL_FLOW
from steelyard.loaders.onnx.quantized import QuantWeight, input_roles

#: Ops whose constant output is a view of their constant input (see
#: :mod:`steelyard.loaders.onnx.lookthrough`): their
#: inputs are not where a weight is used, the op that reads their output is.
_LOOK_THROUGH = {
    "Identity",
    "Cast",
    "Transpose",
    "Reshape",
    "Flatten",
    "Squeeze",
    "Unsqueeze",
    "Slice",
    "Concat",
    "DequantizeLinear",
}
#: Float inputs that are shapes, not weights (ONNX Resize ``roi, scales``; Upsample ``scales``).
_SHAPE_INPUTS = {"Resize": (1, 2, 3), "Upsample": (1,)}


def _sources(weight: View | QuantWeight) -> tuple[str, ...]:
    return weight.sources if isinstance(weight, View) else (weight.weight,)


def _uses(
    graphs: Graphs, folder: Folder, scale_uses: set[tuple[int, int]]
) -> tuple[set[str], set[str], set[str]]:
    """Stored tensors by how ops read them: (quantized values, scales/zero points/shapes, values).

    Each op input that folds to constants counts for the stored tensors behind it. Look-through
    ops building a constant are skipped (the op reading the result is the use), as are
    control-flow nodes (their bodies' ops are the uses).
    """
    quantized: set[str] = set()
    book: set[str] = set()
    value: set[str] = set()
    # Views derived from one another share their ``sources`` tuple; adding a tuple to a set
    # once is enough (a Concat of many tensors read by many nodes would be quadratic).
    added: set[tuple[int, int]] = set()

    def add(target: set[str], names: tuple[str, ...]) -> None:
        mark = (id(target), id(names))
        if mark not in added:
            added.add(mark)
            target.update(names)

    for node in graphs.nodes:
        if not node.standard and node.domain != "com.microsoft":
            continue
        if node.standard and node.op in CONTROL_FLOW:
            continue
        spec = input_roles(node)
        building = (
            node.op in _LOOK_THROUGH and len(node.outputs) == 1 and folder.is_const(node.outputs[0])
        )
        if building and spec is None:
            continue
        for position, key in enumerate(node.inputs):
            view = folder.fold(key) if key else None
            if view is None:
                continue
            scale = (
                (node.index, position) in scale_uses
                or position in _SHAPE_INPUTS.get(node.op, ())
                or (spec is not None and position in spec[1])
            )
            if scale:
                add(book, view.sources)
            elif spec is not None and position in spec[0]:
                add(quantized, view.sources)
            elif not building:
                add(value, view.sources)
            add(book, view.aux)  # scales and zero points a DequantizeLinear was read through
    return quantized, book, value


def tensor_roles(
    graphs: Graphs, folder: Folder, drafts: list[Draft], scale_uses: set[tuple[int, int]]
) -> dict[str, TensorRole]:
    """Count a stored tensor when the model computes with it; not when it only scales or shapes.

    A tensor read both ways (exporters merge equal constants, so one scalar may be a weight
    and a scale at once) is a weight: it is part of what the model computes.
    """
    quantized, book, value = _uses(graphs, folder, scale_uses)
    used: set[str] = set()
    seen: dict[int, tuple[str, ...]] = {}  # holds each tuple, so that its id stays its own
    for draft in drafts:
        sources = _sources(draft.weight)
        if id(sources) not in seen:  # shared tuples: see _uses
            seen[id(sources)] = sources
            used.update(sources)
        if draft.bias:
            used.add(draft.bias)
    roles: dict[str, TensorRole] = {}
    for key, stored in graphs.stored.items():
        if stored.dtype.is_float:
            weight = key in used or key in quantized or key in value
            roles[key] = (
                TensorRole.BOOKKEEPING if key in book and not weight else TensorRole.PARAMETER
            )
        elif key in used or key in quantized:
            roles[key] = TensorRole.QUANTIZED
        else:
            roles[key] = TensorRole.BOOKKEEPING
    return roles
