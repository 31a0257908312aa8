"""Attention blocks found by name in the layer graph, split into heads with the counts.

A block is a set of sibling layers named like the query, key, value and output projections of
one family (table :data:`_SEPARATE`), or a fused q/k/v projection (:data:`_FUSED`) and its
output projection. The output projection is a sibling (``o_proj``, ``out_proj``, ``dense``,
``c_proj``...) or, for BERT and ViT, ``<attention>.output.dense`` beside ``<attention>.self``.
Heads then follow from the counts (common practice in every implementation, e.g. the
``transformers`` attention classes and llama.cpp): query head ``h`` owns query rows
``[h·d_h, (h+1)·d_h)`` and output columns ``[h·d_v, (h+1)·d_v)``; with ``H`` query heads and
``G`` key/value heads, query head ``h`` reads key/value head ``h // (H/G)`` (``repeat_kv``
repeats each key/value head for consecutive query heads). Fused projections are laid out
``q|k|v`` (GPT-2 ``c_attn``, Phi-3 ``qkv_proj``, ``Wqkv``, timm ``qkv``), per head
``[q_h, k_h, v_h]`` (GPT-NeoX and BLOOM ``query_key_value``) or per key/value group
``[q…, k_g, v_g]`` (Falcon's new decoder architecture). GGUF converters reorder query and key
rows only within each head for their rotary layout, so head membership is unchanged.
"""

from __future__ import annotations

from collections.abc import Mapping

from steelyard.graph import Layer, LayerKind
from steelyard.transformer.hyper import Counts, Hyper
from steelyard.transformer.model import AttentionBlock, Head, Span

#: (query, key, value) leaf names of separate projections, and the output leaves tried.
_SEPARATE: tuple[tuple[str, str, str, tuple[str, ...]], ...] = (
    ("q_proj", "k_proj", "v_proj", ("o_proj", "out_proj", "dense", "c_proj", "o")),
    ("query", "key", "value", ("dense", "out", "o_proj", "out_proj")),
    ("q", "k", "v", ("o", "attn_output", "out_proj")),
    ("attn_q", "attn_k", "attn_v", ("attn_output",)),
    ("wq", "wk", "wv", ("wo",)),
    ("q_lin", "k_lin", "v_lin", ("out_lin",)),
)
#: Fused projection leaf → its output leaves.
_FUSED: dict[str, tuple[str, ...]] = {
    "c_attn": ("c_proj",),
    "qkv_proj": ("o_proj", "out_proj", "dense"),
    "qkv": ("proj", "out_proj", "o_proj"),
    "Wqkv": ("out_proj", "o_proj"),
    "query_key_value": ("dense",),
}
_PER_HEAD_MODELS = frozenset({"gpt_neox", "bloom", "persimmon", "gptj_fused"})


def _split(name: str) -> tuple[str, str]:
    parent, _, leaf = name.rpartition(".")
    return parent, leaf


def _output(by_name: Mapping[str, Layer], parent: str, leaves: tuple[str, ...]) -> Layer | None:
    grand, _ = _split(parent)
    for candidate in (
        *(f"{parent}.{leaf}" for leaf in leaves),
        f"{grand}.output.dense",  # BERT, ViT: attention.self.* → attention.output.dense
        *(f"{grand}.{leaf}" for leaf in leaves),  # a GGUF fused attn_qkv.q/k/v → attn_output
    ):
        layer = by_name.get(candidate)
        if layer is not None and layer.kind is LayerKind.DENSE:
            return layer
    return None


def _block_name(parent: str, leaf: str) -> str:
    """``blk.N`` (GGUF) and ``blk.N.attn_qkv`` both become ``blk.N.attn``."""
    if leaf.startswith("attn_") or parent.endswith(".attn_qkv"):
        return parent.removesuffix(".attn_qkv") + ".attn"
    return parent


def find_blocks(layers: tuple[Layer, ...], hyper: Hyper, notes: list[str]) -> list[AttentionBlock]:
    """Every attention block whose projections match the counts (a note for each that does not)."""
    by_name = {layer.name: layer for layer in layers}
    blocks: list[AttentionBlock] = []
    seen: set[str] = set()
    for layer in layers:
        if layer.kind is not LayerKind.DENSE or layer.name in seen:
            continue
        parent, leaf = _split(layer.name)
        for q_leaf, k_leaf, v_leaf, o_leaves in _SEPARATE:
            if leaf != q_leaf:
                continue
            k = by_name.get(f"{parent}.{k_leaf}")
            v = by_name.get(f"{parent}.{v_leaf}")
            o = _output(by_name, parent, o_leaves)
            if k is None or v is None or o is None:
                continue
            name = _block_name(parent, leaf)
            block = separate_block(name, layer, k, v, o, hyper.counts_for(name), notes)
            if block is not None:
                blocks.append(block)
                seen.update((layer.name, k.name, v.name, o.name))
            break
        if leaf in _FUSED:
            o = _output(by_name, parent, _FUSED[leaf])
            if o is None:
                continue
            layout = _fused_layout(leaf, hyper)
            block = _fused(parent, layer, o, layout, hyper.counts_for(parent), notes)
            if block is not None:
                blocks.append(block)
                seen.update((layer.name, o.name))
    return blocks


def _fused_layout(leaf: str, hyper: Hyper) -> str:
    if leaf == "query_key_value":
        if hyper.falcon_layout is not None:
            return hyper.falcon_layout
        if hyper.model_type in _PER_HEAD_MODELS:
            return "per-head"
    return "q|k|v"


def _dims(
    name: str, counts: Counts, q_rows: int, k_rows: int | None, notes: list[str]
) -> tuple[int, int, int] | None:
    """(heads, key/value heads, head width) or None (with a note)."""
    heads = counts.heads
    if heads is None:
        notes.append(f"{name}: no head count in config.json or metadata: heads not recognised")
        return None
    head_dim = counts.head_dim or (q_rows // heads if q_rows % heads == 0 else None)
    if not head_dim or heads * head_dim != q_rows:
        notes.append(f"{name}: {q_rows} query rows do not split into {heads} heads")
        return None
    kv = counts.kv_heads or heads
    if k_rows is not None and kv * head_dim != k_rows and k_rows % head_dim == 0:
        kv = k_rows // head_dim  # a config without a key/value head count (or a stale one)
    if heads % kv:
        notes.append(f"{name}: {heads} query heads do not share {kv} key/value heads evenly")
        return None
    return heads, kv, head_dim


def separate_block(
    name: str, q: Layer, k: Layer, v: Layer, o: Layer, counts: Counts, notes: list[str]
) -> AttentionBlock | None:
    """The block of separate projections ``q``, ``k``, ``v``, ``o`` split into heads by
    ``counts``; None (with a note) when their shapes do not fit the counts."""
    dims = _dims(name, counts, q.units, k.units, notes)
    if dims is None:
        return None
    heads, kv, head_dim = dims
    if k.units != kv * head_dim or v.units % kv or o.fan_in % heads:
        notes.append(f"{name}: projection shapes do not match {heads} heads of width {head_dim}")
        return None
    value_dim = v.units // kv
    if o.fan_in != heads * value_dim:
        notes.append(f"{name}: output projection inputs ({o.fan_in}) are not {heads} heads × {value_dim}")
        return None
    group = heads // kv
    made = tuple(
        Head(
            index=h,
            kv_index=h // group,
            q=Span(q.name, h * head_dim, (h + 1) * head_dim),
            k=Span(k.name, (h // group) * head_dim, (h // group + 1) * head_dim),
            v=Span(v.name, (h // group) * value_dim, (h // group + 1) * value_dim),
            o=Span(o.name, h * value_dim, (h + 1) * value_dim, axis="columns"),
        )
        for h in range(heads)
    )
    return AttentionBlock(name, made, kv, head_dim, value_dim, q.fan_in)


def _fused(
    name: str, qkv: Layer, o: Layer, layout: str, counts: Counts, notes: list[str]
) -> AttentionBlock | None:
    heads = counts.heads
    if heads is None:
        notes.append(f"{name}: no head count in config.json or metadata: heads not recognised")
        return None
    if o.fan_in % heads:
        notes.append(f"{name}: output projection inputs ({o.fan_in}) do not split into {heads} heads")
        return None
    head_dim = counts.head_dim or o.fan_in // heads
    if head_dim <= 0:
        notes.append(f"{name}: output projection inputs ({o.fan_in}) are fewer than {heads} heads")
        return None
    kv = counts.kv_heads or heads
    rows = qkv.units
    if layout == "per-head":
        kv = heads
    if (heads + 2 * kv) * head_dim != rows and rows % head_dim == 0:
        kv = (rows // head_dim - heads) // 2 if (rows // head_dim - heads) % 2 == 0 else kv
    if (
        kv <= 0
        or heads % kv
        or (layout == "per-head" and kv != heads)  # q, k, v per head: one key/value head each
        or (heads + 2 * kv) * head_dim != rows
        or o.fan_in != heads * head_dim
    ):
        notes.append(f"{name}: fused q/k/v rows ({rows}) do not match {heads} heads of width {head_dim}")
        return None
    group = heads // kv
    out: list[Head] = []
    for h in range(heads):
        g = h // group
        if layout == "per-head":
            base = 3 * h * head_dim
            q0, k0, v0 = base, base + head_dim, base + 2 * head_dim
        elif layout == "per-group":
            base = g * (group + 2) * head_dim
            q0 = base + (h % group) * head_dim
            k0, v0 = base + group * head_dim, base + (group + 1) * head_dim
        else:
            q0 = h * head_dim
            k0 = heads * head_dim + g * head_dim
            v0 = (heads + kv) * head_dim + g * head_dim
        out.append(
            Head(
                index=h,
                kv_index=g,
                q=Span(qkv.name, q0, q0 + head_dim),
                k=Span(qkv.name, k0, k0 + head_dim),
                v=Span(qkv.name, v0, v0 + head_dim),
                o=Span(o.name, h * head_dim, (h + 1) * head_dim, axis="columns"),
            )
        )
    return AttentionBlock(name, tuple(out), kv, head_dim, head_dim, qkv.fan_in, fused=layout)
