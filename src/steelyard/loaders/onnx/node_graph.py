"""The ONNX node graph: scoped value names, stored tensors, producers and consumers.

:class:`Graphs` walks the main graph and every If/Loop/Scan body. Value names are resolved
per scope (a body may use outer names and may shadow them), and each value gets a key that
is unique in the whole model: its own name when free, else ``<subgraph path>/<name>``.
Stored tensors (initializers, sparse initializers, Constant outputs) are keyed the same way.

The walks over its edges that layers need are :mod:`~steelyard.loaders.onnx.output_walk`
(what follows a layer's output) and :mod:`~steelyard.loaders.onnx.input_walk` (which layers
feed a layer's input).
"""

from __future__ import annotations

from collections import defaultdict
from pathlib import Path
from typing import Any

from steelyard.errors import LoadError
from steelyard.loaders.onnx.file_bytes import FileBytes
from steelyard.loaders.onnx.op_kinds import CONTROL_FLOW
from steelyard.loaders.onnx.stored import Node, Stored, constant, sparse, tensor, text

#: Deepest subgraph nesting walked (protobuf's own recursion limit stops far deeper files).
MAX_NESTING = 32
#: Steps any single forward walk may take.
MAX_STEPS = 256


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
        if not node.standard or node.op not in CONTROL_FLOW:
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
