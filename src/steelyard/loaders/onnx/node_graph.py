"""The ONNX node graph: scoped value names, stored tensors, and the walks over edges.

:class:`Graphs` walks the main graph and every If/Loop/Scan body. Value names are resolved
per scope (a body may use outer names and may shadow them), and each value gets a key that
is unique in the whole model: its own name when free, else ``<subgraph path>/<name>``.
Stored tensors (initializers, sparse initializers, Constant outputs) are keyed the same way.

:class:`Tracer` answers the questions layers need: what follows a layer's output (bias Add,
normalisation, activation) and which layers produced a layer's input, looking only through
ops that keep channel identity.
"""

from __future__ import annotations

from collections import defaultdict
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from steelyard.errors import LoadError
from steelyard.graph import Activation, Norm, NormKind
from steelyard.loaders.onnx.lookthrough import Folder, View
from steelyard.loaders.onnx.stored import FileBytes, Node, Stored, constant, sparse, tensor, text

#: Deepest subgraph nesting walked (protobuf's own recursion limit stops far deeper files).
MAX_NESTING = 32
#: Steps any single forward walk may take.
MAX_STEPS = 256
#: Values one backward walk may visit before the answer is "unknown".
MAX_VISITS = 100_000
#: Most layers one value may be traced back to (a Concat of that many layer outputs is
#: "unknown"); keeps the memoised answers linear in the model's size.
MAX_SOURCES = 1024

_CONTROL_FLOW = ("If", "Loop", "Scan")


class Graphs:
    """Every node and stored tensor of a model, with producer/consumer maps over value keys."""

    def __init__(self, files: FileBytes) -> None:
        self.files = files
        self.path: Path = files.path
        self.nodes: list[Node] = []
        self.stored: dict[str, Stored] = {}
        self.producer: dict[str, tuple[Node, int]] = {}
        self.consumers: dict[str, list[tuple[Node, int]]] = defaultdict(list)
        self.outputs: set[str] = set()
        """Main graph outputs."""
        self.forward: dict[str, list[str]] = defaultdict(list)
        """Value → values it also flows into (into a body input, out of a body output)."""
        self.backward: dict[str, list[str]] = defaultdict(list)
        """The reverse of :attr:`forward`."""
        self.skipped: list[str] = []
        """Stored tensors left out (string tensors)."""
        self.invariant: dict[str, str] = {}
        """Body input → the outer value it holds in every iteration: a Loop/Scan state that the
        body hands back unchanged (a weight carried through the loop)."""
        self._keys: set[str] = set()
        self._next: dict[str, int] = {}
        """Base key → the next ``#<n>`` suffix to try, so repeated names stay linear."""

    def walk(self, graph: Any) -> None:
        """Walk the main graph and, recursively, its subgraphs."""
        _, outputs = self._walk(graph, "", (), 0)
        self.outputs.update(k for k in outputs if k)

    def _key(self, name: str, scope: str) -> str:
        key = name if name and name not in self._keys else f"{scope}{name or '<unnamed>'}"
        if key in self._keys:
            # Resume where this base's numbering stopped: counting from 2 every time would be
            # quadratic in the number of repeats (tens of thousands of unnamed tensors). A
            # suffix taken by another name is skipped once and never looked at again.
            base = key
            number = self._next.get(base, 2)
            while f"{base}#{number}" in self._keys:
                number += 1
            key = f"{base}#{number}"
            self._next[base] = number + 1
        self._keys.add(key)
        return key

    def _store(self, key: str, stored: Stored | None) -> None:
        if stored is None:
            self.skipped.append(key)
        else:
            self.stored[key] = stored

    def _walk(
        self, graph: Any, scope: str, chain: tuple[dict[str, str], ...], depth: int
    ) -> tuple[list[str], list[str]]:
        if depth > MAX_NESTING:
            raise LoadError(self.path, f"subgraphs are nested more than {MAX_NESTING} deep")
        local: dict[str, str] = {}
        scopes = (local, *chain)

        def resolve(name: str) -> str:
            if not name:
                return ""
            for table in scopes:
                if name in table:
                    return table[name]
            local[name] = self._key(name, scope)  # defined nowhere: a dangling value
            return local[name]

        for proto in graph.initializer:
            name = text(proto.name)
            key = self._key(name, scope)
            if name:
                local[name] = key
            self._store(key, tensor(proto, key, self.files))
        for proto in graph.sparse_initializer:
            name = text(proto.values.name)
            key = self._key(name, scope)
            if name:
                local[name] = key
            self._store(key, sparse(proto, key, self.files))
        inputs: list[str] = []
        for value in graph.input:
            # IR < 4 lists initializers as graph inputs too: those stay the stored tensor.
            name = text(value.name)
            if name not in local:
                local[name] = self._key(name, scope)
            inputs.append(local[name])
        pending: list[tuple[Any, list[str]]] = []
        for proto in graph.node:
            outs: list[str] = []
            for name in map(text, proto.output):
                if name:
                    local[name] = self._key(name, scope)
                outs.append(local[name] if name else "")
            pending.append((proto, outs))
        for proto, outs in pending:
            attrs: dict[str, Any] = {}
            for attr in proto.attribute:
                attr_name = text(attr.name)
                if attr_name in attrs:
                    raise LoadError(
                        self.path, f"node {text(proto.name)!r} repeats attribute {attr_name!r}"
                    )
                attrs[attr_name] = attr
            node = Node(
                op=text(proto.op_type),
                domain=text(proto.domain),
                name=text(proto.name),
                inputs=[resolve(text(name)) for name in proto.input],
                outputs=outs,
                attrs=attrs,
                scope=scope,
                index=len(self.nodes),
                path=self.path,
            )
            self.nodes.append(node)
            for position, key in enumerate(node.outputs):
                if key:
                    self.producer[key] = (node, position)
            for position, key in enumerate(node.inputs):
                if key:
                    self.consumers[key].append((node, position))
            if node.op == "Constant" and node.standard and outs and outs[0]:
                self._store(outs[0], constant(node, outs[0], self.files))
            for attr_name, subgraph in node.graphs():
                sub_scope = f"{scope}{node.label}.{attr_name}/"
                sub_in, sub_out = self._walk(subgraph, sub_scope, scopes, depth + 1)
                self._alias(node, sub_in, sub_out)
        return inputs, [resolve(text(value.name)) for value in graph.output]

    def _alias(self, node: Node, sub_in: list[str], sub_out: list[str]) -> None:
        """Connect a body's inputs and outputs to its control-flow node's values."""
        if not node.standard or node.op not in _CONTROL_FLOW:
            return
        pairs_in: list[tuple[str, str]] = []
        pairs_out: list[tuple[str, str]] = []
        if node.op == "If":
            pairs_out = list(zip(sub_out, node.outputs, strict=False))
        elif node.op == "Loop":  # body (iter, cond, carried...) → (carried..., scan...)
            pairs_in = list(zip(node.inputs[2:], sub_in[2:], strict=False))
            pairs_out = list(zip(sub_out[1:], node.outputs, strict=False))
        else:  # Scan (opset 9+): inputs and outputs line up with the body's
            pairs_in = list(zip(node.inputs, sub_in, strict=False))
            pairs_out = list(zip(sub_out, node.outputs, strict=False))
        for source, target in (*pairs_in, *pairs_out):
            if source and target:
                self.forward[source].append(target)
                self.backward[target].append(source)
        for outer, inner, back in self._carried(node, sub_in, sub_out):
            if outer and inner and self._passes_through(back, inner):
                self.invariant[inner] = outer

    @staticmethod
    def _carried(node: Node, sub_in: list[str], sub_out: list[str]) -> list[tuple[str, str, str]]:
        """(outer initial value, body input, body output) of each loop-carried state."""
        if node.op == "Loop":
            # ONNX Loop: inputs (M, cond, v_initial...), body (iter, cond, v...) → (cond, v...).
            return list(zip(node.inputs[2:], sub_in[2:], sub_out[1:], strict=False))
        if node.op == "Scan" and len(node.inputs) == len(sub_in):
            # ONNX Scan (opset 9+): the first N - num_scan_inputs inputs are state variables,
            # and the body's first outputs are their next values. Scan-8 (sequence_lens first,
            # so the counts differ) is left alone.
            states = max(0, len(node.inputs) - node.get_int("num_scan_inputs", len(node.inputs)))
            return list(zip(node.inputs[:states], sub_in[:states], sub_out[:states], strict=False))
        return []

    def _passes_through(self, value: str, body_input: str) -> bool:
        """True when a body output is the body input itself, possibly through Identity nodes.

        Such a state holds its initial value in every iteration, so when that value is a
        constant the body computes with a constant (exporters carry weights so).
        """
        for _ in range(MAX_STEPS):
            if value == body_input:
                return True
            found = self.producer.get(value)
            if found is None:
                return False
            node = found[0]
            if not (node.standard and node.op == "Identity" and len(node.inputs) == 1):
                return False
            value = node.inputs[0]
        return False


# --- tracing ----------------------------------------------------------------------------------

#: Single-input ops after which a unit is still the same unit (possibly pooled or reshaped).
_KEEP = {
    "Identity",
    "Dropout",
    "Cast",
    "Flatten",
    "Squeeze",
    "Unsqueeze",
    "Transpose",
    "Reshape",
    "MaxPool",
    "AveragePool",
    "GlobalAveragePool",
    "GlobalMaxPool",
    "LpPool",
    "Pad",
    "QuantizeLinear",
    "DequantizeLinear",
    "Upsample",
    "Resize",
    "LRN",
}
#: Ops that compute one element from the same element of each input.
_ELEMENTWISE = {"Add", "Sub", "Mul", "Div", "Sum", "Max", "Min", "Mean"}
_NORMS = {
    "BatchNormalization": NormKind.BATCH,
    "LayerNormalization": NormKind.LAYER,
    "GroupNormalization": NormKind.GROUP,
    "InstanceNormalization": NormKind.INSTANCE,
    "RMSNormalization": NormKind.RMS,
    "SimplifiedLayerNormalization": NormKind.RMS,  # com.microsoft
}
_ACTIVATIONS = {
    "Relu": Activation.RELU,
    "LeakyRelu": Activation.LEAKY_RELU,
    "Sigmoid": Activation.SIGMOID,
    "Tanh": Activation.TANH,
    "Softmax": Activation.SOFTMAX,
    "HardSigmoid": Activation.HARD_SIGMOID,
    "Gelu": Activation.GELU,
    "FastGelu": Activation.GELU,  # com.microsoft
    "QuickGelu": Activation.GELU,  # com.microsoft
    "BiasGelu": Activation.GELU,  # com.microsoft
    "Swish": Activation.SILU,
}
#: Nonlinearities with no member in :class:`Activation`.
_OTHER_NONLINEAR = {
    "Elu",
    "Selu",
    "Celu",
    "Softplus",
    "Softsign",
    "PRelu",
    "HardSwish",
    "Mish",
    "ThresholdedRelu",
    "LogSoftmax",
    "Erf",
    "Exp",
    "Abs",
    "Sin",
    "Cos",
    "Sqrt",
    "Log",
}
_BACK_THROUGH = _KEEP | set(_ACTIVATIONS) | _OTHER_NONLINEAR | set(_NORMS) | {"Clip"}


@dataclass
class Followed:
    """What the walk forward from a layer's output found."""

    activation: Activation
    bias: View | None = None
    norm: Norm | None = None


@dataclass
class Tracer:
    """Forward and backward walks over a :class:`Graphs`."""

    graphs: Graphs
    folder: Folder
    data_inputs: Mapping[int, int]
    """Node index → position of its data input, for every node that became a layer."""
    unit_outputs: Mapping[str, tuple[str, ...]]
    """Value key → names of the layers whose units it carries (empty for embeddings)."""
    _memo: dict[str, tuple[str, ...] | None] = field(default_factory=dict)

    def next(self, key: str) -> tuple[list[tuple[Node, int]], list[str]]:
        """Consumers of ``key`` (control-flow nodes excluded) and the values it aliases."""
        nodes = [
            (n, p)
            for n, p in self.graphs.consumers.get(key, [])
            if not (n.standard and n.op in _CONTROL_FLOW)
        ]
        return nodes, list(self.graphs.forward.get(key, []))

    def feeds_layer(self, node: Node, position: int) -> bool:
        """True when ``node`` is a layer and ``position`` is its data input."""
        return self.data_inputs.get(node.index) == position

    # -- forward ---------------------------------------------------------------------------

    def follow(
        self, start: str, units: int, trailing: int, want_bias: bool, opaque_next: bool = False
    ) -> Followed:
        """Walk forward from a layer output through channel-keeping ops to its activation.

        ``trailing`` is the number of axes after the unit axis (a bias must broadcast along
        them); ``opaque_next`` reports an unknown activation instead of identity when the
        output goes straight into another layer (QLinear ops may have fused a ReLU).
        """
        key = start
        found = Followed(Activation.UNKNOWN)
        for _ in range(MAX_STEPS):
            nodes, aliases = self.next(key)
            if not nodes and len(aliases) == 1 and key not in self.graphs.outputs:
                key = aliases[0]
                continue
            if not nodes:
                found.activation = (
                    Activation.IDENTITY if key in self.graphs.outputs else Activation.UNKNOWN
                )
                return found
            if len(nodes) > 1 or aliases or key in self.graphs.outputs:
                found.activation = self._fan_out(key, nodes, aliases)
                return found
            node, position = nodes[0]
            if not node.standard and node.domain != "com.microsoft":
                return found
            if want_bias and found.bias is None and found.norm is None and node.op == "Add":
                view = self.folder.fold(node.input(1 - position))
                if view is not None and per_unit(view.shape, units, trailing):
                    found.bias = view
                    key = node.outputs[0] if node.outputs else ""
                    continue
            if node.op in _NORMS and position == 0:
                if found.norm is None:
                    found.norm = self._norm(node, units, trailing)
                if found.norm is None and node.op != "GroupNormalization":
                    return found  # normalised across something other than these units
                key = node.outputs[0] if node.outputs else ""
                continue
            activation = self._activation(node, position)
            if activation is not None:
                found.activation = activation
                return found
            if self._keeps(node, position):
                key = node.outputs[0] if node.outputs else ""
                continue
            if self.feeds_layer(node, position):
                found.activation = Activation.UNKNOWN if opaque_next else Activation.IDENTITY
            return found
        return found

    def _keeps(self, node: Node, position: int) -> bool:
        if node.op in _KEEP or node.op == "Concat":
            return position == 0 or node.op == "Concat"
        if node.op in ("Add", "Sub", "Mul", "Div") and len(node.inputs) == 2:
            return self.folder.is_const(node.input(1 - position))
        return False

    def _activation(self, node: Node, position: int) -> Activation | None:
        if position != 0:
            return None
        if node.op == "Clip":
            # Clip(0, max) is ReLU (ReLU6 included); the lower bound is an input from opset 11.
            low: float | None = None
            if node.input(1):
                low = self.folder.scalar(node.input(1))
            elif "min" in node.attrs:
                low = node.get_float("min", float("-inf"))
            return Activation.RELU if low == 0.0 else Activation.UNKNOWN
        if node.op in _ACTIVATIONS:
            return _ACTIVATIONS[node.op]
        if node.op in _OTHER_NONLINEAR:
            return Activation.UNKNOWN
        return None

    def _fan_out(self, key: str, nodes: list[tuple[Node, int]], aliases: list[str]) -> Activation:
        """Activations written as several nodes reading the same value (SiLU, GELU)."""
        ops = {n.op for n, _ in nodes}
        if len(nodes) == 2 and not aliases and ops == {"Sigmoid", "Mul"}:
            sigmoid = next(n for n, _ in nodes if n.op == "Sigmoid")
            mul = next(n for n, _ in nodes if n.op == "Mul")
            if sigmoid.outputs and set(mul.inputs) == {key, sigmoid.outputs[0]}:
                return Activation.SILU
        if (
            2 <= len(nodes) <= 4
            and not aliases
            and (self._reaches_gelu(nodes) or self._quick_gelu(key, nodes))
        ):
            return Activation.GELU
        if not aliases and all(self.feeds_layer(n, p) for n, p in nodes):
            return Activation.IDENTITY
        return Activation.UNKNOWN

    def _reaches_gelu(self, nodes: list[tuple[Node, int]]) -> bool:
        """x·Φ(x) written out: x/√2 → Erf, or x³ → … → Tanh (the tanh approximation)."""
        for node, _ in nodes:
            frontier, hops = [node], 0
            while frontier and hops < 5:
                following: list[Node] = []
                for current in frontier:
                    if current.op == "Erf" or (current.op == "Tanh" and hops >= 2):
                        return True
                    if current.op not in ("Div", "Mul", "Pow", "Add"):
                        continue
                    for out in current.outputs:
                        following.extend(n for n, _ in self.graphs.consumers.get(out, []))
                frontier, hops = following, hops + 1
        return False

    def _quick_gelu(self, key: str, nodes: list[tuple[Node, int]]) -> bool:
        """x·σ(1.702·x), the sigmoid approximation of GELU."""
        if len(nodes) != 2 or {n.op for n, _ in nodes} != {"Mul"}:
            return False
        for node, position in nodes:
            gain = self.folder.scalar(node.input(1 - position))
            users = self.graphs.consumers.get(node.outputs[0], []) if node.outputs else []
            if gain is None or abs(gain - 1.702) > 1e-3 or len(users) != 1:
                continue
            sigmoid = users[0][0]
            if sigmoid.op != "Sigmoid" or not sigmoid.outputs:
                continue
            other = next(n for n, _ in nodes if n is not node)
            if set(other.inputs) == {key, sigmoid.outputs[0]}:
                return True
        return False

    def _norm(self, node: Node, units: int, trailing: int) -> Norm | None:
        kind = _NORMS[node.op]
        names: list[str | None] = []
        for position in range(1, 5 if kind is NormKind.BATCH else 3):
            view = self.folder.fold(node.input(position))
            names.append(
                view.source if view is not None and _squeezes_to(view.shape, units) else None
            )
        names += [None] * (4 - len(names))
        scale, shift, mean, var = names
        if kind is NormKind.RMS:
            shift = None
        if kind in (NormKind.LAYER, NormKind.RMS) and (
            trailing != 0 or node.get_int("axis", -1) != -1
        ):
            return None
        if scale is None and mean is None:
            return None
        eps = node.get_float("epsilon", 1e-5)
        return Norm(kind=kind, scale=scale, shift=shift, mean=mean, var=var, eps=eps)

    def reaching(self) -> set[str]:
        """Value keys from which some layer's data input is reachable, through any ops.

        One pass over the nodes in reverse (they are topologically ordered per graph), plus
        the body aliases, repeated until nothing changes.
        """
        reach: set[str] = set()
        for _ in range(MAX_NESTING + 2):
            before = len(reach)
            for node in reversed(self.graphs.nodes):
                data = self.data_inputs.get(node.index)
                live = any(k in reach for k in node.outputs if k)
                for position, key in enumerate(node.inputs):
                    if key and (live or position == data):
                        reach.add(key)
            for source, targets in self.graphs.forward.items():
                if any(t in reach for t in targets):
                    reach.add(source)
            if len(reach) == before:
                break
        return reach

    # -- backward --------------------------------------------------------------------------

    def sources(self, key: str) -> tuple[str, ...] | None:
        """Layers whose units reach value ``key`` (in input order), None when unknown.

        An explicit-stack depth-first walk (a chain of thousands of ops must not exhaust
        Python's recursion), memoised across calls; a cycle makes the answer unknown.
        """
        if not key:
            return ()
        memo = self._memo
        stack: list[tuple[str, list[str] | None]] = [(key, None)]
        expanded: set[str] = set()
        visits = 0
        while stack:
            current, deps = stack[-1]
            if current in memo:
                stack.pop()
                continue
            if deps is None:
                visits += 1
                if visits > MAX_VISITS:
                    return None
                done, value = self._step(current)
                if done:
                    memo[current] = value
                    stack.pop()
                    continue
                deps = value or []
                stack[-1] = (current, deps)
                expanded.add(current)
                # A dependency already expanded is an ancestor: a cycle, left unresolved.
                stack.extend(
                    (d, None) for d in reversed(deps) if d not in memo and d not in expanded
                )
                continue
            stack.pop()
            expanded.discard(current)
            names: list[str] = []
            for dep in deps:
                found = memo.get(dep)
                if found is None:
                    memo[current] = None
                    break
                names.extend(found)
            else:
                unique = tuple(dict.fromkeys(names))
                memo[current] = unique if len(unique) <= MAX_SOURCES else None
        return memo.get(key)

    def _step(self, key: str) -> tuple[bool, Any]:
        """(True, answer) when ``key`` decides on its own, else (False, keys to combine)."""
        if key in self.unit_outputs:
            return True, self.unit_outputs[key]
        if key in self.graphs.backward:
            return False, list(self.graphs.backward[key])
        if key in self.graphs.stored or self.folder.is_const(key):
            return True, ()
        found = self.graphs.producer.get(key)
        if found is None:
            return True, ()  # a graph input
        node, position = found
        if not node.standard and node.domain != "com.microsoft":
            return True, None
        if node.op == "DynamicQuantizeLinear":
            return (False, [node.input(0)]) if position == 0 else (True, ())
        if node.op == "Reshape" and node.input(1) and not self.folder.is_const(node.input(1)):
            return True, None  # a run-time shape: the unit mapping is not known
        if node.op in _BACK_THROUGH:
            return False, [node.input(0)] if node.input(0) else []
        if node.op in _ELEMENTWISE:
            return False, [k for k in node.inputs if k and not self.folder.is_const(k)]
        if node.op == "Concat":
            return False, [k for k in node.inputs if k]
        return True, None


def _squeezes_to(shape: tuple[int, ...], units: int) -> bool:
    return tuple(d for d in shape if d != 1) == (units,) or (units == 1 and shape in ((), (1,)))


def per_unit(shape: tuple[int, ...], units: int, trailing: int) -> bool:
    """True when a constant of ``shape`` adds one value per unit to a layer's output."""
    dims = list(shape)
    while len(dims) > 1 + trailing and dims[0] == 1:
        dims.pop(0)
    return tuple(dims) == (units, *([1] * trailing))
