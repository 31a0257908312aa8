"""The layer graph of a GGUF model, from its architecture metadata and ``blk.N.*`` names.

GGUF names tensors the same way for every architecture (``gguf.constants.TENSOR_NAMES``):
``token_embd``, ``output`` (the language-model head; absent when tied to the embedding),
``output_norm`` and per block ``blk.N.attn_q/k/v/output``, ``attn_qkv`` (fused),
``ffn_gate/up/down``, shared experts ``ffn_*_shexp``, the router ``ffn_gate_inp`` and expert
stacks ``ffn_gate_exps``/``ffn_up_exps``/``ffn_down_exps`` ([experts, out, in] in numpy order).
A 2-D weight ``[out, in]`` in numpy order is already canonical, so every 2-D layer is a
:class:`RowSlice` of its tensor and is streamed. An expert stack becomes one layer per expert
(``blk.N.ffn_up_exps.E``), read one expert at a time.

Links are made only where the architecture fixes them: gate and up feed down (SwiGLU/GeGLU
multiply them unit by unit), the value projection feeds the output projection (attention mixes
positions, not units) when there are as many value units as output inputs, i.e. without
grouped-query sharing. Nothing is linked across the residual stream, which sums every block's
output.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Mapping
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from steelyard.graph import (
    Activation,
    Layer,
    LayerKind,
    Link,
    Norm,
    NormKind,
    RowSlice,
    Tensor,
    TensorRole,
)
from steelyard.loaders.gguf.header import ArrayValue
from steelyard.loaders.layer_parts import layer_geometry, make_layer, weight_source
from steelyard.streaming import float32_from_parts

_BLOCK = re.compile(r"^blk\.(\d+)\.(.+)\.(weight|bias)$")
_EXPERTS = ("ffn_gate_exps", "ffn_up_exps", "ffn_down_exps")
_EMBEDDINGS = ("token_embd", "position_embd", "token_types")
#: Expert stacks with more experts than this are left whole (real models have up to ~512).
MAX_EXPERTS = 4096

# Feed-forward activations by architecture (common practice, no source: the activation each
# family's reference model uses). Gated families apply it to ffn_gate; the others to ffn_up.
_GELU_GATED = frozenset({"gemma", "gemma2", "gemma3", "gemma3n", "grok"})
_SILU_GATED = frozenset(
    {
        "llama", "llama4", "mistral3", "qwen", "qwen2", "qwen2moe", "qwen3", "qwen3moe",
        "phi3", "internlm2", "deepseek", "deepseek2", "olmo", "olmo2", "olmoe", "granite",
        "granitemoe", "minicpm", "minicpm3", "command-r", "cohere2", "stablelm", "baichuan",
        "orion", "exaone", "smollm3", "dbrx", "arctic", "xverse", "mixtral",
    }
)  # fmt: skip
_GELU_PLAIN = frozenset(
    {"gpt2", "gptj", "gptneox", "starcoder", "starcoder2", "bloom", "falcon", "mpt", "phi2", "bert"}
)


@dataclass(frozen=True)
class Meta:
    """The architecture metadata the graph needs."""

    arch: str
    values: Mapping[str, Any]

    def get(self, key: str, block: int | None = None) -> int | float | None:
        """``{arch}.{key}``, per block when the file stores one value per block."""
        value = self.values.get(f"{self.arch}.{key}")
        if isinstance(value, ArrayValue):
            if block is None or value.values is None or block >= len(value.values):
                return None
            value = value.values[block]
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            return None
        return value


class _Rows:
    """float32 view of rows ``[start, stop)`` of a tensor's flattened leading axes."""

    def __init__(self, tensor: Tensor, first: int, shape: tuple[int, int]) -> None:
        self.tensor, self.first, self.shape = tensor, first, shape

    def __call__(self) -> np.ndarray:
        tensor = self.tensor
        assert tensor.read_span is not None
        offset = self.first * self.shape[1]
        return float32_from_parts(lambda a, b, into: tensor.widen_part(offset + a, offset + b, into), self.shape)


class _Expert:
    """``orient`` of one expert's layer: index ``e`` of the stacked ``[E, out, in]`` array."""

    def __init__(self, expert: int) -> None:
        self.expert = expert

    def __call__(self, array: np.ndarray) -> np.ndarray:
        return array[self.expert]


def _readable(tensor: Tensor | None, dims: int) -> bool:
    """A float (or dequantizable) tensor of ``dims`` dimensions with no empty one."""
    return (
        tensor is not None
        and tensor.role is TensorRole.PARAMETER
        and tensor.read_span is not None
        and len(tensor.shape) == dims
        and all(tensor.shape)
    )


def _vector(tensor: Tensor, first: int, count: int) -> Callable[[], np.ndarray]:
    def read() -> np.ndarray:
        assert tensor.read_span is not None
        return float32_from_parts(lambda a, b, into: tensor.widen_part(first + a, first + b, into), (count,))

    return read


def _layer(
    name: str,
    weight: Tensor,
    bias: Tensor | None,
    kind: LayerKind,
    activation: Activation,
    rows: tuple[int, int] | None = None,
    expert: int | None = None,
) -> Layer:
    """A dense/embedding layer over rows of a 2-D weight or one expert of a 3-D stack."""
    if expert is None:
        start, stop = rows if rows is not None else (0, weight.shape[0])
        units, fan_in = stop - start, weight.shape[1]
        first = start
        orient: Callable[[np.ndarray], np.ndarray] = RowSlice(start, stop if rows else None)
        bias_first = start
    else:
        units, fan_in = weight.shape[1], weight.shape[2]
        first = expert * units
        orient = _Expert(expert)
        bias_first = expert * units
    bias_view = None
    if bias is not None:
        if bias.size < bias_first + units or not _readable(bias, len(bias.shape)):
            bias = None
        else:
            bias_view = _vector(bias, bias_first, units)
    source = weight_source(
        weight.name,
        _Rows(weight, first, (units, fan_in)),
        orient,
        None if bias is None else bias.name,
        bias_view,
    )
    return make_layer(name, kind, activation, layer_geometry(units, fan_in), source)


def _ffn_activations(arch: str, gated: bool) -> tuple[Activation, Activation]:
    """(activation of ffn_gate, activation of ffn_up)."""
    if gated:
        if arch in _GELU_GATED:
            return Activation.GELU, Activation.IDENTITY
        if arch in _SILU_GATED:
            return Activation.SILU, Activation.IDENTITY
        return Activation.UNKNOWN, Activation.IDENTITY
    return Activation.UNKNOWN, Activation.GELU if arch in _GELU_PLAIN else Activation.UNKNOWN


def build(
    tensors: Mapping[str, Tensor], meta: Meta
) -> tuple[list[Layer], list[str]]:
    """Layers (in file order, links and norms set) and notes for the report."""
    notes: list[str] = []
    layers: list[Layer] = []
    blocks: dict[int, dict[str, Tensor]] = {}
    for name, tensor in tensors.items():
        match = _BLOCK.match(name)
        if match:
            blocks.setdefault(int(match.group(1)), {})[f"{match.group(2)}.{match.group(3)}"] = tensor
    head = tensors.get("output.weight")
    for stem in _EMBEDDINGS:
        weight = tensors.get(f"{stem}.weight")
        if _readable(weight, 2):
            assert weight is not None
            layers.append(_layer(stem, weight, None, LayerKind.EMBEDDING, Activation.IDENTITY))
    for number in sorted(blocks):
        layers += _block(number, blocks[number], meta, notes)
    if _readable(head, 2):
        assert head is not None
        lm_head = _layer("output", head, tensors.get("output.bias"), LayerKind.DENSE, Activation.SOFTMAX)
        layers.append(replace(lm_head, is_output=True))
    elif head is None and "token_embd.weight" in tensors:
        notes.append("no output.weight: the output head is tied to token_embd.weight")
    return layers, notes


def _block(number: int, parts: dict[str, Tensor], meta: Meta, notes: list[str]) -> list[Layer]:
    prefix = f"blk.{number}."
    made: dict[str, Layer] = {}
    gated = "ffn_gate.weight" in parts or "ffn_gate_exps.weight" in parts
    gate_act, up_act = _ffn_activations(meta.arch, gated)
    acts = {
        "attn_q": Activation.UNKNOWN,
        "attn_k": Activation.UNKNOWN,
        "attn_v": Activation.IDENTITY,
        "attn_output": Activation.IDENTITY,
        "ffn_gate": gate_act,
        "ffn_up": up_act,
        "ffn_down": Activation.IDENTITY,
        "ffn_gate_shexp": gate_act,
        "ffn_up_shexp": up_act,
        "ffn_down_shexp": Activation.IDENTITY,
        "ffn_gate_exps": gate_act,
        "ffn_up_exps": up_act,
        "ffn_down_exps": Activation.IDENTITY,
        "ffn_gate_inp": (
            Activation.SIGMOID if meta.get("expert_gating_func") == 2 else Activation.SOFTMAX
        ),
    }
    for key, weight in parts.items():
        if not key.endswith(".weight"):
            continue
        leaf = key[: -len(".weight")]
        bias = parts.get(f"{leaf}.bias")
        name = prefix + leaf
        if leaf in _EXPERTS and _readable(weight, 3) and weight.shape[0] <= MAX_EXPERTS:
            for expert in range(weight.shape[0]):
                made[f"{name}.{expert}"] = _layer(
                    f"{name}.{expert}", weight, bias, LayerKind.DENSE, acts[leaf], expert=expert
                )
        elif leaf == "attn_qkv" and _readable(weight, 2):
            made.update(_fused_qkv(name, weight, bias, meta, number, notes))
        elif _readable(weight, 2) and not leaf.endswith("norm"):
            made[name] = _layer(
                name, weight, bias, LayerKind.DENSE, acts.get(leaf, Activation.UNKNOWN)
            )
    _link_block(prefix, made, parts, meta, number)
    return list(made.values())


def _fused_qkv(
    name: str, weight: Tensor, bias: Tensor | None, meta: Meta, number: int, notes: list[str]
) -> dict[str, Layer]:
    """Split a fused ``attn_qkv`` into its q, k and v rows when the head counts say where."""
    heads = meta.get("attention.head_count", number) or meta.get("attention.head_count")
    kv = meta.get("attention.head_count_kv", number) or meta.get("attention.head_count_kv")
    width = meta.get("embedding_length")
    rows = weight.shape[0]
    if isinstance(heads, int) and heads > 0:
        kv = kv if isinstance(kv, int) and kv > 0 else heads
        key_dim = meta.get("attention.key_length")
        if not isinstance(key_dim, int) and isinstance(width, int) and width % heads == 0:
            key_dim = width // heads
        value_dim = meta.get("attention.value_length")
        value_dim = value_dim if isinstance(value_dim, int) else key_dim
        if isinstance(key_dim, int) and isinstance(value_dim, int):
            q, k, v = heads * key_dim, kv * key_dim, kv * value_dim
            if q + k + v == rows:
                spans = {"q": (0, q), "k": (q, q + k), "v": (q + k, rows)}
                acts = {"q": Activation.UNKNOWN, "k": Activation.UNKNOWN, "v": Activation.IDENTITY}
                return {
                    f"{name}.{part}": _layer(
                        f"{name}.{part}", weight, bias, LayerKind.DENSE, acts[part], rows=span
                    )
                    for part, span in spans.items()
                }
    notes.append(f"{name}: fused q/k/v rows ({rows}) do not match the head counts; kept whole")
    return {name: _layer(name, weight, bias, LayerKind.DENSE, Activation.UNKNOWN)}


def _link_block(
    prefix: str, made: dict[str, Layer], parts: Mapping[str, Tensor], meta: Meta, number: int
) -> None:
    def link(consumer: str, producers: list[str]) -> None:
        layer = made.get(consumer)
        if layer is None:
            return
        found = tuple(
            p for p in producers if p in made and made[p].units == layer.in_per_group
        )
        if found:
            made[consumer] = replace(layer, inputs_from=found, linked_by=Link.CONFIG)

    for suffix in ("", "_shexp"):
        link(f"{prefix}ffn_down{suffix}", [f"{prefix}ffn_gate{suffix}", f"{prefix}ffn_up{suffix}"])
    experts = parts.get("ffn_down_exps.weight")
    if experts is not None and len(experts.shape) == 3:
        for e in range(experts.shape[0]):
            link(
                f"{prefix}ffn_down_exps.{e}",
                [f"{prefix}ffn_gate_exps.{e}", f"{prefix}ffn_up_exps.{e}"],
            )
    link(f"{prefix}attn_output", [f"{prefix}attn_v", f"{prefix}attn_qkv.v"])
    # Post-norms (Gemma 2/3) normalise the output projections' units themselves.
    eps = meta.get("attention.layer_norm_rms_epsilon")
    for norm, target in (("post_attention_norm", "attn_output"), ("post_ffw_norm", "ffn_down")):
        scale = parts.get(f"{norm}.weight")
        layer = made.get(prefix + target)
        if scale is not None and layer is not None and scale.shape == (layer.units,):
            made[prefix + target] = replace(
                layer,
                norm=Norm(
                    NormKind.RMS,
                    scale=scale.name,
                    eps=float(eps) if isinstance(eps, (int, float)) else 1e-6,
                ),
            )
