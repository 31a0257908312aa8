"""ONNX models: stored tensors, layers in canonical orientation, and exact graph links.

Tensors come from initializers, sparse initializers and Constant nodes, in the main graph
and in every If/Loop/Scan body. Weight bytes stay on disk until read (see
:mod:`steelyard.loaders.onnx.wire` and :mod:`steelyard.loaders.onnx.stored`); layers read
them through look-through views
(:mod:`steelyard.loaders.onnx.lookthrough`), quantized ones through their dequantization
(:mod:`steelyard.loaders.onnx.quantized`). Links, biases, norms and activations come from the
node graph (:mod:`steelyard.loaders.onnx.node_graph`), so they are exact, never guessed.

A Loop or Scan state that the body hands back unchanged holds its initial value in every
iteration; when that value is a constant (exporters carry weights into loop bodies so), ops in
the body read it as that constant, and the layer it feeds names the outer initializer.

What counts as a parameter follows how ops read each stored tensor: a value some op computes
with (a float initializer, a quantized weight or bias) counts; a tensor read only as a scale,
a zero point or a shape does not. A tensor read both ways (exporters merge equal constants)
counts.

Canonical views, rows are always output units:

* Gemm: ``alpha·B`` as ``[out, in]`` (``B`` when ``transB=1``, ``Bᵀ`` otherwise); bias ``beta·C``
  when C holds one value per unit.
* MatMul with constant ``B [in, out]``: ``Bᵀ``; a constant left operand ``A [out, in]`` as is.
  The bias is a following Add of a per-unit constant.
* Conv: ``W [M, C/g, k...]`` as stored.
* ConvTranspose ``W [C, M/g, k...]``: group ``j`` owns input channels ``j·C/g ... (j+1)·C/g``
  and output channels ``j·M/g ... (j+1)·M/g``; canonical row ``j·M/g + m`` holds
  ``W[j·C/g : (j+1)·C/g, m]``, i.e. ``[M, C/g, k...]``. Kernels are not flipped.
* LSTM/GRU/RNN: one layer per direction, matrix (W input, R recurrent) and gate, in ONNX
  gate order (LSTM ``i o f c``, GRU ``z r h``, RNN ``h``), named ``<node>.W.<gate>`` /
  ``<node>.R.<gate>`` (``<node>.reverse.W.<gate>`` for the second direction). W gets the
  ``Wb`` half of ``B``, R the ``Rb`` half. Consumers of ``Y``/``Y_h`` link to the gate that
  forms the hidden state (LSTM ``o``, GRU and RNN ``h``), and R layers link to it too.
* Gather on a constant 2-D table (axis 0): an embedding ``[rows, dim]`` as stored. Its rows are
  not the units its consumers read, so consumers never list an embedding (as for files
  without a graph).
"""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass, replace
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from steelyard.errors import LoadError
from steelyard.graph import (
    Activation,
    Checkpoint,
    Format,
    Layer,
    LayerKind,
    Link,
    Tensor,
    TensorRole,
    mark_outputs,
)
from steelyard.loaders.onnx.lookthrough import Folder, View
from steelyard.loaders.onnx.node_graph import Graphs, Tracer, per_unit
from steelyard.loaders.onnx.quantized import (
    QuantWeight,
    conv_integer,
    dequantize,
    input_roles,
    integer_scale,
    matmul_integer,
    qlinear_conv,
    qlinear_matmul,
)
from steelyard.loaders.onnx.stored import FileBytes, Node, text
from steelyard.loaders.onnx.wire import looks_like_model, parse_model

if TYPE_CHECKING:
    from onnx import ModelProto

_GATES = {"LSTM": ("i", "o", "f", "c"), "GRU": ("z", "r", "h"), "RNN": ("h",)}
#: The gate whose units form the hidden state a recurrent layer outputs.
_HIDDEN_GATE = {"LSTM": "o", "GRU": "h", "RNN": "h"}
_DEFAULT_GATE_ACTS = {
    "LSTM": ["Sigmoid", "Tanh", "Tanh"],
    "GRU": ["Sigmoid", "Tanh"],
    "RNN": ["Tanh"],
}
_RECURRENT_ACTS = {
    "Sigmoid": Activation.SIGMOID,
    "Tanh": Activation.TANH,
    "Relu": Activation.RELU,
    "HardSigmoid": Activation.HARD_SIGMOID,
    "LeakyRelu": Activation.LEAKY_RELU,
}
Array = Callable[[], np.ndarray]


@dataclass
class _Draft:
    """A layer before its bias, norm, activation and links are known."""

    node: Node
    name: str
    kind: LayerKind
    weight: View | QuantWeight
    units: int
    in_per_group: int
    kernel: tuple[int, ...]
    groups: int
    view: Array
    data: str
    """Value key of the input whose units the weights read."""
    out: str
    """Value key whose unit axis holds this layer's units (follow starts here)."""
    trailing: int = 0
    bias: str | None = None
    bias_view: Array | None = None
    want_bias: bool = True
    activation: Activation | None = None
    gate: str | None = None
    own_inputs: tuple[str, ...] | None = None
    opaque_next: bool = False


def _f32(
    read: Array,
    transform: Callable[[np.ndarray], np.ndarray] | None = None,
    shape: tuple[int, ...] | None = None,
) -> Array:
    def view() -> np.ndarray:
        array = np.asarray(read()).astype(np.float32)
        if transform is not None:
            array = transform(array)
        if shape is not None:
            array = array.reshape(shape)
        return np.ascontiguousarray(array, dtype=np.float32)

    return view


def _rows(direction: int, rows: slice) -> Callable[[np.ndarray], np.ndarray]:
    """Select one direction's gate rows of a recurrent W/R/B tensor."""

    def select(array: np.ndarray) -> np.ndarray:
        return array[direction, rows]

    return select


class _Builder:
    """Turns nodes into layer drafts."""

    def __init__(self, graphs: Graphs, folder: Folder) -> None:
        self.graphs = graphs
        self.folder = folder
        self.notes: list[str] = []
        self.scale_uses: set[tuple[int, int]] = set()
        """(node index, input position) where a ConvInteger/MatMulInteger weight scale is read."""
        counts = Counter(n.name for n in graphs.nodes if n.name)
        self._unique = {name for name, count in counts.items() if count == 1}

    def base_name(self, node: Node, weight: str) -> str:
        return node.name if node.name in self._unique else weight

    def drafts(self) -> list[_Draft]:
        out: list[_Draft] = []
        for node in self.graphs.nodes:
            if not node.standard and node.domain != "com.microsoft":
                continue
            handler = _HANDLERS.get(node.op)
            if handler is not None:
                out.extend(handler(self, node))
        return out

    def _simple(
        self,
        node: Node,
        kind: LayerKind,
        weight: View | QuantWeight,
        shape: tuple[int, ...],
        view: Array,
        data: str,
        groups: int = 1,
        trailing: int = 0,
    ) -> _Draft:
        return _Draft(
            node=node,
            name=self.base_name(node, weight.source if isinstance(weight, View) else weight.weight),
            kind=kind,
            weight=weight,
            units=shape[0],
            in_per_group=shape[1],
            kernel=tuple(shape[2:]),
            groups=groups,
            view=_f32(view, shape=shape),
            data=data,
            out=node.outputs[0] if node.outputs else "",
            trailing=trailing,
        )

    def gemm(self, node: Node) -> list[_Draft]:
        b = self.folder.fold(node.input(1))
        if b is None or len(b.shape) != 2 or self.folder.is_const(node.input(0)):
            return []
        trans_b = node.get_int("transB", 0) == 1
        alpha, beta = node.get_float("alpha", 1.0), node.get_float("beta", 1.0)
        units, fan = (b.shape[0], b.shape[1]) if trans_b else (b.shape[1], b.shape[0])
        read = b.read

        def weight() -> np.ndarray:
            array = np.asarray(read()).astype(np.float32)
            array = array if trans_b else array.T
            return array * np.float32(alpha) if alpha != 1.0 else array

        draft = self._simple(node, LayerKind.DENSE, b, (units, fan), weight, node.input(0))
        c = self.folder.fold(node.input(2)) if node.input(2) else None
        if node.input(2):
            draft.want_bias = False
        if c is not None and (math.prod(c.shape) == 1 or per_unit(c.shape, units, 0)):
            read_c = c.read

            def bias() -> np.ndarray:
                values = np.asarray(read_c()).astype(np.float32).reshape(-1) * np.float32(beta)
                return np.ascontiguousarray(np.broadcast_to(values, (units,)))

            draft.bias, draft.bias_view = c.source, bias
        elif node.input(2):
            self.notes.append(f"Gemm {node.label!r}: C is not one value per unit, no bias taken")
        return [draft]

    def matmul(self, node: Node) -> list[_Draft]:
        a, b = self.folder.fold(node.input(0)), self.folder.fold(node.input(1))
        if b is not None and a is None and len(b.shape) == 2:
            shape = (b.shape[1], b.shape[0])
            return [
                self._simple(
                    node, LayerKind.DENSE, b, shape, _f32(b.read, np.transpose), node.input(0)
                )
            ]
        if a is not None and b is None and len(a.shape) == 2:
            return [
                self._simple(node, LayerKind.DENSE, a, a.shape, a.read, node.input(1), trailing=1)
            ]
        return []

    def conv(self, node: Node) -> list[_Draft]:
        w = self.folder.fold(node.input(1))
        groups = node.get_int("group", 1)
        if w is None or len(w.shape) < 3 or groups < 1 or w.shape[0] % groups:
            return []
        draft = self._simple(
            node, LayerKind.CONV, w, w.shape, w.read, node.input(0), groups, len(w.shape) - 2
        )
        self._node_bias(draft, node.input(2))
        return [draft]

    def conv_transpose(self, node: Node) -> list[_Draft]:
        w = self.folder.fold(node.input(1))
        groups = node.get_int("group", 1)
        if w is None or len(w.shape) < 3 or groups < 1 or w.shape[0] % groups:
            return []
        cin, per_group, kernel = w.shape[0], w.shape[1], w.shape[2:]
        units, fan = groups * per_group, cin // groups

        def canonical(array: np.ndarray) -> np.ndarray:
            grouped = array.reshape(groups, fan, per_group, *kernel)
            return np.swapaxes(grouped, 1, 2).reshape(units, fan, *kernel)

        shape = (units, fan, *kernel)
        draft = self._simple(
            node,
            LayerKind.CONV_TRANSPOSE,
            w,
            shape,
            _f32(w.read, canonical),
            node.input(0),
            groups,
            len(kernel),
        )
        self._node_bias(draft, node.input(2))
        return [draft]

    def _node_bias(self, draft: _Draft, key: str) -> None:
        if not key:
            return
        draft.want_bias = False
        bias = self.folder.fold(key)
        if bias is not None and per_unit(bias.shape, draft.units, 0):
            draft.bias, draft.bias_view = bias.source, _f32(bias.read, shape=(draft.units,))

    def gather(self, node: Node) -> list[_Draft]:
        table = self.folder.fold(node.input(0))
        if (
            table is None
            or len(table.shape) != 2
            or node.get_int("axis", 0) not in (0, -2)
            or self.folder.is_const(node.input(1))
            or not (table.dtype.is_float or table.quantized)
        ):
            return []
        draft = self._simple(
            node, LayerKind.EMBEDDING, table, table.shape, table.read, node.input(1)
        )
        draft.want_bias, draft.activation = False, Activation.IDENTITY
        return [draft]

    def recurrent(self, node: Node) -> list[_Draft]:
        op = node.op
        w, r = self.folder.fold(node.input(1)), self.folder.fold(node.input(2))
        b = self.folder.fold(node.input(3)) if node.input(3) else None
        gates = _GATES[op]
        if w is None or r is None or len(w.shape) != 3 or len(r.shape) != 3:
            return []
        directions, rows, fan = w.shape
        hidden = node.get_int("hidden_size", r.shape[2])
        expected = 2 if node.get_str("direction", "forward") == "bidirectional" else 1
        if (
            directions != expected
            or hidden <= 0
            or rows != len(gates) * hidden
            or r.shape != (directions, rows, hidden)
            or (b is not None and b.shape != (directions, 2 * rows))
        ):
            self.notes.append(f"{op} {node.label!r}: weight shapes do not match its attributes")
            return []
        names = node.get_strs("activations") or _DEFAULT_GATE_ACTS[op] * directions
        per_direction = len(_DEFAULT_GATE_ACTS[op])
        base = self.base_name(node, w.source)
        drafts: list[_Draft] = []
        for d in range(directions):
            prefix = base if d == 0 else f"{base}.reverse"
            acts = names[d * per_direction : (d + 1) * per_direction]
            for g, gate in enumerate(gates):
                act_name = acts[1 if gate in ("c", "h") and op != "RNN" else 0] if acts else ""
                activation = _RECURRENT_ACTS.get(act_name, Activation.UNKNOWN)
                for which, matrix, offset, width in (("W", w, 0, fan), ("R", r, rows, hidden)):
                    sl = slice(g * hidden, (g + 1) * hidden)
                    draft = _Draft(
                        node=node,
                        name=f"{prefix}.{which}.{gate}",
                        kind=LayerKind.RECURRENT,
                        weight=matrix,
                        units=hidden,
                        in_per_group=width,
                        kernel=(),
                        groups=1,
                        view=_f32(matrix.read, _rows(d, sl)),
                        data=node.input(0),
                        out="",
                        want_bias=False,
                        activation=activation,
                        gate=gate,
                    )
                    if which == "R":
                        draft.own_inputs = (f"{prefix}.W.{_HIDDEN_GATE[op]}",)
                    if b is not None:
                        bs = slice(offset + g * hidden, offset + (g + 1) * hidden)
                        draft.bias = b.source
                        draft.bias_view = _f32(b.read, _rows(d, bs))
                    drafts.append(draft)
        return drafts

    def _quantized(
        self,
        node: Node,
        found: QuantWeight | None,
        kind: LayerKind,
        groups: int,
        follow_from: str | None = None,
    ) -> list[_Draft]:
        if found is None:
            return []
        shape = found.shape
        draft = _Draft(
            node=node,
            name=self.base_name(node, found.weight),
            kind=kind,
            weight=found,
            units=shape[0],
            in_per_group=shape[1],
            kernel=tuple(shape[2:]),
            groups=groups,
            view=found.read,
            data=node.input(0),
            out=follow_from or (node.outputs[0] if node.outputs else ""),
            trailing=len(shape) - 2,
            bias=found.bias,
            bias_view=found.bias_read,
        )
        if node.op == "QLinearConv":
            draft.want_bias = False
            draft.opaque_next = True  # a fused ReLU hides in the output quantisation range
        if node.op == "QLinearMatMul":
            draft.opaque_next = True
        if not found.scale_found:
            self.notes.append(
                f"{node.op} {node.label!r}: no weight scale found downstream, "
                "its float view uses scale 1"
            )
        return [draft]

    def quantized(self, node: Node) -> list[_Draft]:
        groups = node.get_int("group", 1)
        if node.op == "QLinearConv":
            return self._quantized(node, qlinear_conv(self.folder, node), LayerKind.CONV, groups)
        if node.op == "QLinearMatMul":
            return self._quantized(node, qlinear_matmul(self.folder, node), LayerKind.DENSE, 1)
        rescale = integer_scale(self.graphs.consumers, self.graphs.producer, self.folder, node)
        scale, after = rescale.key, rescale.out
        if rescale.use is not None:
            self.scale_uses.add(rescale.use)
        if node.op == "ConvInteger":
            found = conv_integer(self.folder, node, scale)
            return self._quantized(node, found, LayerKind.CONV, groups, after)
        return self._quantized(
            node, matmul_integer(self.folder, node, scale), LayerKind.DENSE, 1, after
        )


_HANDLERS: dict[str, Callable[[_Builder, Node], list[_Draft]]] = {
    "Gemm": _Builder.gemm,
    "MatMul": _Builder.matmul,
    "Conv": _Builder.conv,
    "ConvTranspose": _Builder.conv_transpose,
    "Gather": _Builder.gather,
    "LSTM": _Builder.recurrent,
    "GRU": _Builder.recurrent,
    "RNN": _Builder.recurrent,
    "QLinearConv": _Builder.quantized,
    "QLinearMatMul": _Builder.quantized,
    "ConvInteger": _Builder.quantized,
    "MatMulInteger": _Builder.quantized,
}


def _sources(weight: View | QuantWeight) -> tuple[str, ...]:
    return weight.sources if isinstance(weight, View) else (weight.weight,)


def _unique_names(drafts: list[_Draft]) -> None:
    """Suffix repeated layer names ``#2``, ``#3``… in draft order, in linear time.

    Each base name resumes its numbering where it stopped (counting from 2 for every repeat
    is quadratic: fifty thousand unnamed nodes sharing one weight); a suffix already taken by
    another name is skipped once.
    """
    seen: set[str] = set()
    following: dict[str, int] = {}
    renamed: dict[tuple[int, str], str] = {}
    for draft in drafts:
        name = draft.name
        if name in seen:
            number = following.get(draft.name, 2)
            while f"{draft.name}#{number}" in seen:
                number += 1
            name = f"{draft.name}#{number}"
            following[draft.name] = number + 1
        seen.add(name)
        renamed[(draft.node.index, draft.name)] = name
        draft.name = name
    for draft in drafts:  # R layers refer to their W gate by its first name
        if draft.own_inputs:
            draft.own_inputs = tuple(
                renamed.get((draft.node.index, n), n) for n in draft.own_inputs
            )


def _layers(graphs: Graphs, folder: Folder, drafts: list[_Draft]) -> tuple[Layer, ...]:
    unit_outputs: dict[str, tuple[str, ...]] = {}
    data_inputs: dict[int, int] = {}
    for draft in drafts:
        position = draft.node.inputs.index(draft.data) if draft.data in draft.node.inputs else -1
        data_inputs[draft.node.index] = position
        if draft.kind is LayerKind.EMBEDDING:
            unit_outputs[draft.out] = ()
        elif draft.kind is not LayerKind.RECURRENT and draft.out:
            unit_outputs[draft.out] = (draft.name,)
    by_node: dict[int, list[_Draft]] = {}
    for draft in drafts:
        if draft.kind is LayerKind.RECURRENT:
            by_node.setdefault(draft.node.index, []).append(draft)
    for node_drafts in by_node.values():
        node = node_drafts[0].node
        gates = [d for d in node_drafts if d.own_inputs is None]
        hidden = tuple(d.name for d in gates if d.gate == _HIDDEN_GATE[node.op])
        cell = tuple(d.name for d in gates if d.gate == "c")
        for position, key in enumerate(node.outputs[:3]):
            if key:
                unit_outputs[key] = cell if position == 2 else hidden
    tracer = Tracer(graphs, folder, data_inputs, unit_outputs)
    layers: list[Layer] = []
    for draft in drafts:
        activation, norm = draft.activation, None
        bias, bias_view = draft.bias, draft.bias_view
        if activation is None:
            followed = tracer.follow(
                draft.out, draft.units, draft.trailing, draft.want_bias, draft.opaque_next
            )
            activation, norm = followed.activation, followed.norm
            if followed.bias is not None and bias is None:
                bias = followed.bias.source
                bias_view = _f32(followed.bias.read, shape=(draft.units,))
        if draft.own_inputs is not None:
            inputs: tuple[str, ...] | None = draft.own_inputs
        else:
            inputs = tracer.sources(draft.data)
        layers.append(
            Layer(
                name=draft.name,
                kind=draft.kind,
                weight=draft.weight.source
                if isinstance(draft.weight, View)
                else draft.weight.weight,
                bias=bias,
                units=draft.units,
                in_per_group=draft.in_per_group,
                kernel=draft.kernel,
                groups=draft.groups,
                activation=activation,
                weight_view=draft.view,
                bias_view=bias_view if bias is not None else None,
                norm=norm,
                inputs_from=inputs or (),
                linked_by=Link.NONE if inputs is None else Link.GRAPH,
                gate=draft.gate,
            )
        )
    return _heads(mark_outputs(layers), drafts, tracer.reaching())


def _heads(layers: tuple[Layer, ...], drafts: list[_Draft], reach: set[str]) -> tuple[Layer, ...]:
    """Keep ``is_output`` only where the graph shows that no layer reads the output at all.

    ``mark_outputs`` sees known links only; a layer whose consumer's link is unknown would
    otherwise pass for a head. A recurrent node is a head when none of its outputs reach a
    layer, and then only its hidden-state W gates are marked (the other gates and the R
    layers are internal to the cell).
    """
    out: list[Layer] = []
    for layer, draft in zip(layers, drafts, strict=True):
        if layer.kind is LayerKind.RECURRENT:
            head = (
                draft.own_inputs is None
                and draft.gate == _HIDDEN_GATE[draft.node.op]
                and bool(layer.inputs_from)
                and not any(k in reach for k in draft.node.outputs if k)
            )
        else:
            head = layer.is_output and draft.out not in reach
        out.append(replace(layer, is_output=head) if head != layer.is_output else layer)
    return tuple(out)


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
_CONTROL_FLOW = ("If", "Loop", "Scan")


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
        if node.standard and node.op in _CONTROL_FLOW:
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


def _roles(
    graphs: Graphs, folder: Folder, drafts: list[_Draft], scale_uses: set[tuple[int, int]]
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


def _describe(model: ModelProto) -> str:
    opsets = (
        ", ".join(f"{text(o.domain) or 'ai.onnx'} {o.version}" for o in model.opset_import)
        or "none"
    )
    producer = " ".join(p for p in (text(model.producer_name), text(model.producer_version)) if p)
    return f"ONNX IR version {model.ir_version}, opsets: {opsets}" + (
        f", produced by {producer}" if producer else ""
    )


class OnnxLoader:
    """ONNX protobuf models (``.onnx``), with external data files beside them."""

    format = Format.ONNX

    def sniff(self, path: Path, head: bytes) -> bool:
        """True when the first bytes parse as ModelProto fields (content, not extension)."""
        try:
            size = path.stat().st_size
        except OSError:
            return False
        return bool(head) and looks_like_model(head, size)

    def load(self, path: Path) -> Checkpoint:
        """Read the model's structure; tensor bytes stay on disk until read."""
        try:
            files = FileBytes(path)
        except OSError as exc:
            raise LoadError(path, f"cannot be opened ({exc.strerror})") from None
        model = parse_model(path, files.size)
        graphs = Graphs(files)
        graphs.walk(model.graph)
        folder = Folder(
            graphs.stored, graphs.producer, path, dequantize, graphs.invariant, files.ledger
        )
        builder = _Builder(graphs, folder)
        drafts = builder.drafts()
        _unique_names(drafts)
        layers = _layers(graphs, folder, drafts)
        roles = _roles(graphs, folder, drafts, builder.scale_uses)
        tensors = {
            key: Tensor(
                name=key, shape=s.shape, dtype=s.dtype.name, role=roles[key], reader=s.reader
            )
            for key, s in graphs.stored.items()
        }
        notes = [_describe(model), *builder.notes]
        if files.files:
            notes.append(f"external data read from {len(files.files)} file(s)")
        if graphs.skipped:
            notes.append(f"{len(graphs.skipped)} string tensor(s) left out")
        return Checkpoint(
            path=str(path),
            format=self.format,
            tensors=tensors,
            layers=layers,
            file_size=files.size + sum(files.files.values()),
            files=(str(path), *(str(f) for f in files.files)),
            notes=tuple(notes),
        )


__all__ = ["OnnxLoader"]
