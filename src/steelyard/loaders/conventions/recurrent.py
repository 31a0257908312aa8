"""Recurrent modules (``nn.LSTM``/``GRU``/``RNN`` and their cells, or the same matrices saved by
hand-written NumPy code), split into one layer per gate.

Recurrent matrices may be stacked PyTorch-style ``[G·H, in]`` or transposed ``[in, G·H]``; the
recurrent matrix's shape (``[G·H, H]`` or ``[H, G·H]``) tells which, and G (4: LSTM i,f,g,o;
3: GRU r,z,n; 1: plain RNN) follows from it.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from steelyard.graph import Activation, ColumnSlice, Layer, LayerKind
from steelyard.loaders.conventions.module_names import RECURRENT, Module
from steelyard.loaders.conventions.views import row_slice, stored_source
from steelyard.loaders.layer_parts import layer_geometry, make_layer

_GATES = {4: ("i", "f", "g", "o"), 3: ("r", "z", "n"), 1: ("h",)}
_GATE_ACT = {
    "i": Activation.SIGMOID,
    "f": Activation.SIGMOID,
    "o": Activation.SIGMOID,
    "r": Activation.SIGMOID,
    "z": Activation.SIGMOID,
    "g": Activation.TANH,
    "n": Activation.TANH,
    "h": Activation.TANH,
}


def recurrent_layers(module: Module) -> list[Layer]:
    """``weight_ih_l{k}`` / ``weight_hh_l{k}`` split into one layer per gate."""
    out: list[Layer] = []
    for leaf, weight in module.leaves.items():
        match = RECURRENT.match(leaf)
        if not match or match.group(1) != "weight" or len(weight.shape) != 2:
            continue
        _, which, depth, reverse = match.groups()
        level = f"_l{depth}" if depth is not None else ""
        suffix = f"_{which}{level}{reverse or ''}"
        hh = module.leaves.get(f"weight_hh{level}{reverse or ''}")
        # The pair decides the layout for both matrices (a square ``hh`` alone cannot).
        ih = module.leaves.get(
            f"weight_ih{level}{reverse or ''}", weight if which == "ih" else None
        )
        if ih is None or hh is None:
            continue
        layout = _recurrent_layout(ih.shape, hh.shape)
        if layout is None:
            continue
        hidden, count, transposed = layout
        gates = _GATES[count]
        fan = weight.shape[0] if transposed else weight.shape[1]
        bias = module.leaves.get(f"bias{suffix}")
        if bias is not None and bias.shape != (count * hidden,):
            bias = None
        for index, gate in enumerate(gates):
            sl = slice(index * hidden, (index + 1) * hidden)
            pick: Callable[[np.ndarray], np.ndarray] = (
                ColumnSlice(sl.start, sl.stop) if transposed else row_slice(sl)
            )
            name = f"{module.name + '.' if module.name else ''}{which}{level}{reverse or ''}.{gate}"
            source = stored_source(weight, pick, bias, row_slice(sl))
            activation, shape = _GATE_ACT[gate], layer_geometry(hidden, fan)
            out.append(make_layer(name, LayerKind.RECURRENT, activation, shape, source, gate=gate))
    return out


def _recurrent_layout(ih: tuple[int, ...], hh: tuple[int, ...]) -> tuple[int, int, bool] | None:
    """(hidden size, gate count, transposed) of a recurrent pair, or None.

    PyTorch stacks gates along rows: ``ih [G·H, in]``, ``hh [G·H, H]``; hand-written NumPy
    code often keeps ``x @ W`` order, ``[in, G·H]`` and ``[H, G·H]``. The recurrent matrix
    decides, since it is ``[G·H, H]`` or ``[H, G·H]``; a square one (G = 1) is read the
    PyTorch way unless only the transposed reading fits the input matrix.
    """
    if len(ih) != 2 or len(hh) != 2 or not hh[0] or not hh[1]:
        return None
    torch_fit = hh[0] % hh[1] == 0 and hh[0] // hh[1] in _GATES and ih[0] == hh[0]
    numpy_fit = hh[1] % hh[0] == 0 and hh[1] // hh[0] in _GATES and ih[1] == hh[1]
    if torch_fit:
        return hh[1], hh[0] // hh[1], False
    if numpy_fit:
        return hh[0], hh[1] // hh[0], True
    return None
