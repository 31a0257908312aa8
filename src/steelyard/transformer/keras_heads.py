"""Attention blocks of Keras files (``.keras``, ``.weights.h5``, legacy ``.h5``).

The Keras loader turns each ``MultiHeadAttention`` or ``GroupQueryAttention`` layer into dense
layers ``<layer>/query``, ``/key``, ``/value`` and ``/attention_output`` whose rows (columns for
the output) run head by head, and records the layer's head counts, checked against its config
and its kernels' shapes, in ``Checkpoint.metadata`` (see
:mod:`steelyard.loaders.keras.attention`). The blocks are split as the name-found ones are
(:func:`steelyard.transformer.attention.separate_block`): query head ``h`` owns query rows
``[h·d_h, (h+1)·d_h)`` and output columns ``[h·d_v, (h+1)·d_v)``, and reads key/value head
``h // (H/G)``. A gated layer's ``gate`` projection belongs to no head span.
"""

from __future__ import annotations

from steelyard.graph import Checkpoint, Format
from steelyard.transformer.attention import separate_block
from steelyard.transformer.hyper import Counts
from steelyard.transformer.model import AttentionBlock

KERAS_FORMATS = (Format.KERAS, Format.KERAS_H5)


def find_blocks(checkpoint: Checkpoint, notes: list[str]) -> tuple[list[AttentionBlock], str]:
    """Every attention block the Keras loader declared, and where its counts came from
    (``Keras model config`` or ``Keras weight shapes``; ``names`` when there is none)."""
    from steelyard.loaders.keras.attention import KEY, AttentionFacts

    declared = checkpoint.metadata.get(KEY, ())
    by_name = {layer.name: layer for layer in checkpoint.layers}
    blocks: list[AttentionBlock] = []
    sources: set[str] = set()
    for facts in declared:
        if not isinstance(facts, AttentionFacts):
            continue
        parts = [by_name.get(n) for n in (facts.query, facts.key, facts.value, facts.output)]
        q, k, v, o = parts
        if q is None or k is None or v is None or o is None:
            notes.append(f"{facts.block}: its projections are not all layers: heads not recognised")
            continue
        counts = Counts(
            heads=facts.heads,
            kv_heads=facts.kv_heads,
            head_dim=facts.head_dim,
            value_dim=facts.value_dim,
            width=facts.width,
        )
        block = separate_block(facts.block, q, k, v, o, counts, notes)
        if block is not None:
            blocks.append(block)
            sources.add(facts.source)
    source = "names"
    if sources:
        source = "Keras " + " and ".join(sorted(sources))
    return blocks, source
