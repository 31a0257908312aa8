"""How inferred layers relate, from names and shapes: the groups of a convolution (from its
producer's channel count), the norm beside a layer, and producer → consumer links.

A link is only made when the shapes agree *and* the names make it likely; attention
projections are left unlinked.

A convolution whose weight is ``[C·m, 1, k…]`` reads one input channel per filter: unless it
is the first layer (a one-channel input), it is depthwise, and its groups are the channel
count of the layer feeding it (the numbered sibling before it, else the convolution before it
in stored order) when that count divides its filters. A grouped ``[out, in/g, k…]`` weight gets
``g = producer channels / (in/g)`` only from a producer its name makes known.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import replace
from typing import Any

from steelyard.graph import Activation, Layer, LayerKind, Link, Norm
from steelyard.loaders.conventions.module_layers import unit_count
from steelyard.loaders.conventions.module_names import Module, split_name
from steelyard.loaders.conventions.numbering import Siblings, natural_key, numbered_leaf

#: Producer → consumer leaf names that mark the two halves of a feed-forward block.
_PAIRS: tuple[tuple[str, str], ...] = (
    ("fc1", "fc2"),
    ("c_fc", "c_proj"),
    ("up_proj", "down_proj"),
    ("gate_proj", "down_proj"),
    ("w1", "w2"),
    ("w3", "w2"),
    ("wi", "wo"),
    ("wi_0", "wo"),
    ("wi_1", "wo"),
    ("fc_in", "fc_out"),
    ("dense_h_to_4h", "dense_4h_to_h"),
    ("lin1", "lin2"),
    ("linear1", "linear2"),
)


def infer_groups(layers: list[Layer], notes: list[str]) -> list[Layer]:
    """Groups of convolutions whose weight reads fewer input channels than their producer
    has (see the module docstring for the rule)."""
    by_name = {layer.name: layer for layer in layers}
    siblings = Siblings(by_name)
    # Natural name order, not stored order: safetensors sorts its keys, so "seq.10" would
    # otherwise come before "seq.2".
    ordered = sorted(layers, key=lambda layer: natural_key(layer.name))
    before: dict[str, Layer | None] = {}
    last: Layer | None = None
    for layer in ordered:
        before[layer.name] = last
        if layer.kind in (LayerKind.CONV, LayerKind.CONV_TRANSPOSE):
            last = layer
    out: list[Layer] = []
    changed: list[str] = []
    unknown: list[str] = []
    for layer in layers:
        previous = before.get(layer.name)
        if layer.kind is LayerKind.CONV and layer.groups == 1:
            parent, leaf = split_name(layer.name)
            named = siblings.previous(parent, leaf)
            producer = by_name.get(named) if named is not None else None
            if producer is not None and producer.kind not in (
                LayerKind.CONV,
                LayerKind.CONV_TRANSPOSE,
            ):
                producer = None
            if producer is None and layer.in_per_group == 1:
                producer = previous  # depthwise: the convolution before it in stored order
            groups = 1
            if producer is not None and producer.units % layer.in_per_group == 0:
                groups = producer.units // layer.in_per_group
            if groups > 1 and layer.units % groups == 0:
                layer = replace(layer, groups=groups)
                changed.append(
                    f"{layer.name} ({groups}, from {producer.name if producer else '?'})"
                )
            elif layer.in_per_group == 1 and producer is None:
                unknown.append(layer.name)
        out.append(layer)
    if unknown:
        notes.append(
            "one input channel per filter and no known producer (depthwise, or a one-channel "
            "input?), groups taken as 1: "
            + ", ".join(unknown[:5])
            + ("…" if len(unknown) > 5 else "")
        )
    if changed:
        notes.append(
            "groups inferred from the producer's channel count: "
            + ", ".join(changed[:5])
            + ("…" if len(changed) > 5 else "")
        )
    return out


def _sibling_norm(name: str, parent: str, leaf: str, norms: Mapping[str, Norm]) -> str | None:
    """The norm module that normalises this layer's units, by PyTorch naming habits."""
    prefix = f"{parent}." if parent else ""
    candidates: list[str] = []
    # The trailing digits, by stripping: a regex search for them backtracks quadratically
    # over a long run of digits that is not at the end.
    digits = leaf[len(leaf.rstrip("0123456789")) :]
    numbered = numbered_leaf(leaf)
    if numbered is not None and not numbered[0]:
        candidates.append(f"{prefix}{numbered[2] + 1}")
    if digits and digits != leaf:
        for stem in ("bn", "norm", "gn", "ln", "batchnorm", "bn_"):
            candidates.append(f"{prefix}{stem}{digits}")
    if leaf in ("conv", "dense"):
        candidates += [f"{prefix}bn", f"{prefix}norm", f"{prefix}LayerNorm", f"{prefix}layer_norm"]
    if leaf == "dense":
        candidates += [f"{prefix}LayerNorm"]
    for candidate in candidates:
        if candidate in norms:
            return candidate
    return None


def attach_norms(
    layers: list[Layer], modules: Mapping[str, Module], norms: Mapping[str, Norm]
) -> list[Layer]:
    """Each layer with the norm beside it (by naming habit) when its unit count matches."""
    out: list[Layer] = []
    for layer in layers:
        if layer.kind in (LayerKind.RECURRENT, LayerKind.EMBEDDING):
            out.append(layer)
            continue
        parent, leaf = split_name(layer.name)
        found = _sibling_norm(layer.name, parent, leaf, norms)
        if found is not None and unit_count(modules[found]) == layer.units:
            out.append(replace(layer, norm=norms[found]))
        else:
            out.append(layer)
    return out


def link_layers(layers: list[Layer], hidden_act: Activation | None) -> tuple[list[Layer], bool]:
    """Producer → consumer links where shapes agree and names make it likely."""
    by_name = {layer.name: layer for layer in layers}
    siblings = Siblings(by_name)
    sources: dict[str, list[str]] = {}
    activations: dict[str, Activation] = {}
    for layer in layers:
        if layer.kind not in (LayerKind.DENSE, LayerKind.CONV, LayerKind.CONV_TRANSPOSE):
            continue
        parent, leaf = split_name(layer.name)
        prefix = f"{parent}." if parent else ""
        found: list[str] = []
        for producer_leaf, consumer_leaf in _PAIRS:
            if leaf == consumer_leaf and f"{prefix}{producer_leaf}" in by_name:
                found.append(f"{prefix}{producer_leaf}")
        # BERT-style: <block>.intermediate.dense → <block>.output.dense
        if layer.name.endswith(".output.dense") and ".attention." not in layer.name:
            block = layer.name[: -len(".output.dense")]
            if f"{block}.intermediate.dense" in by_name:
                found.append(f"{block}.intermediate.dense")
        # Numbered siblings: convN → convN+1, fcN → fcN+1, seq.N → next numbered layer.
        previous = siblings.previous(parent, leaf)
        if previous is not None and not found:
            found.append(previous)
        found = [
            name
            for name in found
            if by_name[name].units == layer.in_per_group * layer.groups
            and by_name[name].kind is not LayerKind.EMBEDDING
        ]
        if found:
            sources[layer.name] = found
            if hidden_act is not None:
                for name in found:
                    producer_leaf = split_name(name)[1]
                    if producer_leaf in ("up_proj", "w3", "wi_1"):
                        activations[name] = Activation.IDENTITY
                    elif name.endswith("intermediate.dense") or producer_leaf in dict(_PAIRS):
                        activations[name] = hidden_act
    linked: list[Layer] = []
    for layer in layers:
        update: dict[str, Any] = {}
        if layer.name in sources:
            update.update(inputs_from=tuple(sources[layer.name]), linked_by=Link.INFERRED)
        if layer.name in activations:
            update["activation"] = activations[layer.name]
        linked.append(replace(layer, **update) if update else layer)
    return linked, bool(sources)
