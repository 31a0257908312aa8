"""One layer per expert from stacked expert tensors ``<block>.experts.<leaf>`` of shape
``[experts, a, b]``, as transformers 5 keeps mixture-of-experts weights in memory (and as some
models ship them): ``gate_up_proj`` (gate rows, then up rows), ``gate_proj``, ``up_proj``,
``down_proj``, with an optional ``<leaf>_bias [experts, out]``.

Each expert becomes a dense layer ``<block>.experts.<e>.<leaf>`` (the name the per-expert
module layout would give it), reading only its own slice of the stack. The orientation is
``[experts, out, in]`` (the weight ``F.linear`` takes) unless the stack's partner says the
other way round: ``gate_up`` ``[E, d, n]`` with ``down`` ``[E, m, d]`` (the inner widths
meeting at ``d`` on the outer axes) is ``[experts, in, out]``, as in GPT-OSS. A fused gate/up
stack stays one layer per expert (GPT-OSS interleaves the two, so the halves are not split).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping

import numpy as np

from steelyard.graph import Activation, Layer, LayerKind, Tensor, TensorRole
from steelyard.loaders.layer_parts import layer_geometry, make_layer, weight_source
from steelyard.streaming import float32_from_parts
from steelyard.tiled_copy import contiguous, transposed_from_parts

_LEAVES = ("gate_up_proj", "gate_proj", "up_proj", "down_proj")
#: Stacks with more experts than this are left whole (real models have up to ~512).
MAX_EXPERTS = 4096
#: Expert layers made from one file's stacks at most (the largest released MoE models have
#: under 50k expert matrices); a hostile header claiming millions of tiny stacks would
#: otherwise make millions of layers. Stacks past it stay whole (in no layer, so uncovered).
MAX_EXPERT_LAYERS = 2**17


class Quota:
    """How many more expert layers one file may get."""

    def __init__(self, limit: int | None = None) -> None:
        self.remaining = MAX_EXPERT_LAYERS if limit is None else limit


class _Slice:
    """``orient`` of one expert: index ``e`` of a stored-shape array, transposed when the stack
    is ``[experts, in, out]``."""

    def __init__(self, expert: int, transposed: bool) -> None:
        self.expert, self.transposed = expert, transposed

    def __call__(self, array: np.ndarray) -> np.ndarray:
        part = array[self.expert]
        return contiguous(part.T) if self.transposed else part


class _Read:
    """float32 canonical ``[out, in]`` of one expert, reading only its slice when it can."""

    def __init__(self, tensor: Tensor, expert: int, transposed: bool) -> None:
        self.tensor, self.expert, self.transposed = tensor, expert, transposed

    def __call__(self) -> np.ndarray:
        shape = self.tensor.shape[1:]
        tensor = self.tensor
        if tensor.read_span is not None:
            first = self.expert * shape[0] * shape[1]

            def widen(a: int, b: int, into: np.ndarray) -> None:
                tensor.widen_part(first + a, first + b, into)

            if self.transposed:  # [in, out]: read by stored rows, each slab transposed in place
                return transposed_from_parts(widen, (shape[0], shape[1]), 0, shape[1])
            block = float32_from_parts(widen, (shape[0], shape[1]))
        else:
            block = self.tensor.read_float32()[self.expert]
        return contiguous(block.T) if self.transposed else block


def _bias_reader(bias: Tensor, expert: int) -> Callable[[], np.ndarray]:
    def read() -> np.ndarray:
        return np.asarray(bias.read_float32()[expert], dtype=np.float32)

    return read


def _transposed(leaves: Mapping[str, Tensor]) -> bool:
    """Whether the block's stacks are ``[experts, in, out]`` (see the module docstring)."""
    gate_up, down = leaves.get("gate_up_proj"), leaves.get("down_proj")
    if gate_up is None or down is None or len(gate_up.shape) != 3 or len(down.shape) != 3:
        return False
    out_first = gate_up.shape[2] == down.shape[1]
    in_first = gate_up.shape[1] == down.shape[2]
    return in_first and not out_first


def expert_layers(
    module: str, leaves: Mapping[str, Tensor], tensors: Mapping[str, Tensor], quota: Quota
) -> list[Layer]:
    """The per-expert layers of one ``<block>.experts`` module's stacked tensors (``tensors``:
    every stored tensor, where the ``<leaf>_bias`` stacks are looked up by name; ``quota``:
    the file's remaining allowance of expert layers)."""
    if not module.endswith("experts"):
        return []
    transposed = _transposed(leaves)
    out: list[Layer] = []
    for leaf in _LEAVES:
        tensor = leaves.get(leaf)
        if (
            tensor is None
            or tensor.role is not TensorRole.PARAMETER
            or len(tensor.shape) != 3
            or not all(tensor.shape)
            or tensor.shape[0] > min(MAX_EXPERTS, quota.remaining)
        ):
            continue
        quota.remaining -= tensor.shape[0]
        units, fan_in = (tensor.shape[2], tensor.shape[1]) if transposed else (tensor.shape[1], tensor.shape[2])
        bias = tensors.get(f"{module}.{leaf}_bias")
        if bias is None or bias.shape != (tensor.shape[0], units) or bias.role is not TensorRole.PARAMETER:
            bias = None
        for expert in range(tensor.shape[0]):
            source = weight_source(
                tensor.name,
                _Read(tensor, expert, transposed),
                _Slice(expert, transposed),
                None if bias is None else bias.name,
                None if bias is None else _bias_reader(bias, expert),
            )
            name = f"{module}.{expert}.{leaf}"
            geometry = layer_geometry(units, fan_in)
            out.append(make_layer(name, LayerKind.DENSE, Activation.UNKNOWN, geometry, source))
    return out
