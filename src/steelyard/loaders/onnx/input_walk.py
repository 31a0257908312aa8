"""The walk back from a layer's input: which layers' units reach it (the layer's links), and
which values reach some layer at all (to tell a model's heads from layers whose consumer is
unknown). It passes through ops that keep channel identity, element-wise ops and Concat.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from steelyard.loaders.onnx.lookthrough import Folder
from steelyard.loaders.onnx.node_graph import MAX_NESTING, Graphs
from steelyard.loaders.onnx.op_kinds import BACK_THROUGH, ELEMENTWISE

#: Values one backward walk may visit before the answer is "unknown".
MAX_VISITS = 100_000
#: Most layers one value may be traced back to (a Concat of that many layer outputs is
#: "unknown"); keeps the memoised answers linear in the model's size.
MAX_SOURCES = 1024


@dataclass
class InputWalk:
    """Backward walks over a :class:`Graphs`, to the layers whose units reach a value."""

    graphs: Graphs
    folder: Folder
    data_inputs: Mapping[int, int]
    """Node index → position of its data input, for every node that became a layer."""
    unit_outputs: Mapping[str, tuple[str, ...]]
    """Value key → names of the layers whose units it carries (empty for embeddings)."""
    _memo: dict[str, tuple[str, ...] | None] = field(default_factory=dict)

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
        if node.op in BACK_THROUGH:
            return False, [node.input(0)] if node.input(0) else []
        if node.op in ELEMENTWISE:
            return False, [k for k in node.inputs if k and not self.folder.is_const(k)]
        if node.op == "Concat":
            return False, [k for k in node.inputs if k]
        return True, None
