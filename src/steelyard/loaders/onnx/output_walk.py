"""The walk forward from a layer's output: what follows it (bias Add, normalisation,
activation), looking only through ops that keep channel identity.

Activations that exporters write out as several ops are recognised too: SiLU as
``x·Sigmoid(x)``, GELU as ``x·Φ(x)`` through Erf, its tanh approximation, and its sigmoid
approximation ``x·σ(1.702·x)``.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

from steelyard.graph import Activation, Norm, NormKind
from steelyard.loaders.onnx.lookthrough import Folder, View
from steelyard.loaders.onnx.node_graph import MAX_STEPS, Graphs
from steelyard.loaders.onnx.op_kinds import (
    ACTIVATIONS,
    CONTROL_FLOW,
    KEEP,
    NORMS,
    OTHER_NONLINEAR,
)
from steelyard.loaders.onnx.stored import Node


@dataclass
class Followed:
    """What the walk forward from a layer's output found."""

    activation: Activation
    bias: View | None = None
    norm: Norm | None = None


@dataclass
class OutputWalk:
    """Forward walks over a :class:`Graphs`, from the outputs of the nodes that became layers."""

    graphs: Graphs
    folder: Folder
    data_inputs: Mapping[int, int]
    """Node index → position of its data input, for every node that became a layer."""

    def next(self, key: str) -> tuple[list[tuple[Node, int]], list[str]]:
        """Consumers of ``key`` (control-flow nodes excluded) and the values it aliases."""
        nodes = [
            (n, p)
            for n, p in self.graphs.consumers.get(key, [])
            if not (n.standard and n.op in CONTROL_FLOW)
        ]
        return nodes, list(self.graphs.forward.get(key, []))

    def feeds_layer(self, node: Node, position: int) -> bool:
        """True when ``node`` is a layer and ``position`` is its data input."""
        return self.data_inputs.get(node.index) == position

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
            if node.op in NORMS and position == 0:
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
        if node.op in KEEP or node.op == "Concat":
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
        if node.op in ACTIVATIONS:
            return ACTIVATIONS[node.op]
        if node.op in OTHER_NONLINEAR:
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
        kind = NORMS[node.op]
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


def _squeezes_to(shape: tuple[int, ...], units: int) -> bool:
    return tuple(d for d in shape if d != 1) == (units,) or (units == 1 and shape in ((), (1,)))


def per_unit(shape: tuple[int, ...], units: int, trailing: int) -> bool:
    """True when a constant of ``shape`` adds one value per unit to a layer's output."""
    dims = list(shape)
    while len(dims) > 1 + trailing and dims[0] == 1:
        dims.pop(0)
    return tuple(dims) == (units, *([1] * trailing))
