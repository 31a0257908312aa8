"""Mixture-of-experts blocks found by name: per-expert modules, stacked expert tensors, GGUF
expert stacks, routers and shared experts.

Names recognised (common practice, no source; the module names of the ``transformers`` MoE
classes and of ``gguf.constants.TENSOR_NAMES``):

* per-expert modules ``<block>.experts.<e>.<leaf>`` (Mixtral ``w1``/``w3``/``w2``, Qwen-MoE and
  DeepSeek ``gate_proj``/``up_proj``/``down_proj``) and ``<block>.experts.expert_<e>.<leaf>``
  (Switch Transformers ``wi``/``wo``);
* stacked tensors ``<block>.experts.gate_up_proj`` / ``gate_proj`` / ``up_proj`` /
  ``down_proj`` of shape ``[experts, a, b]``, which the loader already split into one layer
  per expert named ``<block>.experts.<e>.<leaf>`` (:mod:`steelyard.loaders.stacked_experts`);
* GGUF ``blk.N.ffn_{gate,up,down}_exps.<e>`` (the loader's per-expert layers);
* the router ``<block>.gate`` / ``<block>.router`` / ``<block>.router.classifier`` /
  ``blk.N.ffn_gate_inp``: a dense layer with one unit per expert;
* shared experts ``<block>.shared_expert.*`` / ``<block>.shared_experts.*`` / ``blk.N.ffn_*_shexp``.
"""

from __future__ import annotations

import re
from collections import defaultdict
from collections.abc import Mapping

from steelyard.graph import Layer, LayerKind
from steelyard.transformer.hyper import Hyper
from steelyard.transformer.model import Expert, ExpertBlock, ExpertPart

_MODULE = re.compile(r"^(?P<block>.+)\.experts\.(?:expert_)?(?P<e>\d+)\.(?P<leaf>[\w.]+)$")
_GGUF = re.compile(r"^(?P<block>blk\.\d+)\.ffn_(?P<leaf>gate|up|down)_exps\.(?P<e>\d+)$")
_SHARED = re.compile(r"^(?P<block>.+)\.(?:shared_experts?)\.(?P<leaf>\w+)$")
_GGUF_SHARED = re.compile(r"^(?P<block>blk\.\d+)\.ffn_(?P<leaf>gate|up|down)_shexp$")
_ROLES = {
    "w1": "gate", "w3": "up", "w2": "down", "gate_proj": "gate", "up_proj": "up",
    "down_proj": "down", "wi": "up", "wo": "down", "wi_0": "gate", "wi_1": "up", "fc1": "up",
    "fc2": "down", "gate": "gate", "up": "up", "down": "down", "gate_up_proj": "gate_up",
    "mlp.wi": "up", "mlp.wo": "down",
}  # fmt: skip
_ROUTERS = (".gate", ".router", ".router.classifier", ".router.layer")


def _block(match: re.Match[str]) -> str:
    """The block's name: the module, or ``blk.N.ffn`` for GGUF (as attention is ``blk.N.attn``)."""
    block = match["block"]
    return f"{block}.ffn" if re.fullmatch(r"blk\.\d+", block) else block


def _router(by_name: Mapping[str, Layer], block: str, experts: int) -> str | None:
    candidates = [block + suffix for suffix in _ROUTERS]
    if block.startswith("blk.") and block.endswith(".ffn"):
        candidates.append(f"{block}_gate_inp")
    for name in candidates:
        layer = by_name.get(name)
        if layer is not None and layer.kind is LayerKind.DENSE and layer.units == experts:
            return name
    return None


def find_blocks(layers: tuple[Layer, ...], hyper: Hyper, notes: list[str]) -> list[ExpertBlock]:
    """Every mixture-of-experts block (experts in index order, router and shared experts)."""
    by_name = {layer.name: layer for layer in layers}
    parts: dict[str, dict[int, list[ExpertPart]]] = defaultdict(lambda: defaultdict(list))
    shared: dict[str, list[ExpertPart]] = defaultdict(list)
    for layer in layers:
        if layer.kind is not LayerKind.DENSE:
            continue
        match = _MODULE.match(layer.name) or _GGUF.match(layer.name)
        if match:
            role = _ROLES.get(match["leaf"])
            if role is not None:
                parts[_block(match)][int(match["e"])].append(ExpertPart(role, layer.name, layer.weight))
            continue
        match = _SHARED.match(layer.name) or _GGUF_SHARED.match(layer.name)
        if match and match["leaf"] in _ROLES:
            shared[_block(match)].append(ExpertPart(_ROLES[match["leaf"]], layer.name, layer.weight))
    blocks: list[ExpertBlock] = []
    for block, experts in parts.items():
        count = max(experts) + 1
        if sorted(experts) != list(range(count)):
            notes.append(f"{block}: experts are not numbered 0..{count - 1}; block not recognised")
            continue
        router = _router(by_name, block, count)
        if router is None:
            notes.append(f"{block}: no router with {count} rows found; experts compared without it")
        made = tuple(Expert(e, tuple(experts[e])) for e in range(count))
        extra = (Expert(0, tuple(shared[block]), shared=True),) if shared.get(block) else ()
        blocks.append(ExpertBlock(block, router, made, extra, hyper.main.top_k))
    return blocks
