"""ONNX LSTM, GRU and RNN nodes as layer drafts: one per direction, matrix (W input, R
recurrent) and gate, in ONNX gate order (LSTM ``i o f c``, GRU ``z r h``, RNN ``h``), named
``<node>.W.<gate>`` / ``<node>.R.<gate>`` (``<node>.reverse.W.<gate>`` for the second
direction). W gets the ``Wb`` half of ``B``, R the ``Rb`` half. Consumers of ``Y``/``Y_h`` link
to the gate that forms the hidden state (:data:`HIDDEN_GATE`), and R layers link to it too.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from steelyard.graph import Activation, LayerKind
from steelyard.loaders.onnx.layer_draft import Draft, f32
from steelyard.loaders.onnx.lookthrough import Folder
from steelyard.loaders.onnx.stored import Node

_GATES = {"LSTM": ("i", "o", "f", "c"), "GRU": ("z", "r", "h"), "RNN": ("h",)}
#: The gate whose units form the hidden state a recurrent layer outputs.
HIDDEN_GATE = {"LSTM": "o", "GRU": "h", "RNN": "h"}
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


def _rows(direction: int, rows: slice) -> Callable[[np.ndarray], np.ndarray]:
    """Select one direction's gate rows of a recurrent W/R/B tensor."""

    def select(array: np.ndarray) -> np.ndarray:
        return array[direction, rows]

    return select


def recurrent_drafts(
    folder: Folder, node: Node, base_name: Callable[[Node, str], str], notes: list[str]
) -> list[Draft]:
    """The drafts of one LSTM/GRU/RNN node (none, with a note, when its shapes disagree with
    its attributes); ``base_name(node, weight)`` names the layers."""
    op = node.op
    w, r = folder.fold(node.input(1)), folder.fold(node.input(2))
    b = folder.fold(node.input(3)) if node.input(3) else None
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
        notes.append(f"{op} {node.label!r}: weight shapes do not match its attributes")
        return []
    names = node.get_strs("activations") or _DEFAULT_GATE_ACTS[op] * directions
    per_direction = len(_DEFAULT_GATE_ACTS[op])
    base = base_name(node, w.source)
    drafts: list[Draft] = []
    for d in range(directions):
        prefix = base if d == 0 else f"{base}.reverse"
        acts = names[d * per_direction : (d + 1) * per_direction]
        for g, gate in enumerate(gates):
            act_name = acts[1 if gate in ("c", "h") and op != "RNN" else 0] if acts else ""
            activation = _RECURRENT_ACTS.get(act_name, Activation.UNKNOWN)
            for which, matrix, offset, width in (("W", w, 0, fan), ("R", r, rows, hidden)):
                sl = slice(g * hidden, (g + 1) * hidden)
                draft = Draft(
                    node=node,
                    name=f"{prefix}.{which}.{gate}",
                    kind=LayerKind.RECURRENT,
                    weight=matrix,
                    units=hidden,
                    in_per_group=width,
                    kernel=(),
                    groups=1,
                    view=f32(matrix.read, _rows(d, sl)),
                    data=node.input(0),
                    out="",
                    want_bias=False,
                    activation=activation,
                    gate=gate,
                )
                if which == "R":
                    draft.own_inputs = (f"{prefix}.W.{HIDDEN_GATE[op]}",)
                if b is not None:
                    bs = slice(offset + g * hidden, offset + (g + 1) * hidden)
                    draft.bias = b.source
                    draft.bias_view = f32(b.read, _rows(d, bs))
                drafts.append(draft)
    return drafts
