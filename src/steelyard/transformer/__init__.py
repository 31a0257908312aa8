"""The transformer structure of a loaded checkpoint: attention heads and experts.

Runs once after loading and before the rules (:func:`annotate`, called by
:func:`steelyard.loaders.load`): the counts come from the model's own description (a
``config.json`` beside the file, read through the one side-file helper, or the GGUF metadata,
see :mod:`.hyper`), the blocks from the layer names (:mod:`.attention`, :mod:`.experts`); a
Keras file's attention layers declare both through its loader (:mod:`.keras_heads`). The
result is a :class:`~steelyard.transformer.model.Structure` on ``Checkpoint.transformer`` and
the layers' unit groupings on ``Checkpoint.unit_groups`` (``steelyard layers --format json``
shows them as ``unit_groups``). Nothing here reads a weight: names, shapes and counts only.
"""

from __future__ import annotations

import re
from collections import defaultdict
from dataclasses import replace
from pathlib import Path

from steelyard.graph import Checkpoint, Format, Layer, LayerKind, UnitGroup
from steelyard.transformer import attention, experts, keras_heads
from steelyard.transformer.hyper import Counts, Hyper, from_config, from_gguf
from steelyard.transformer.mlp import fused_gate_up
from steelyard.transformer.model import AttentionBlock, Span, Structure

_NORM_GAIN = re.compile(r"(norm|(^|[._])ln(_?\w+)?|layernorm)[^.]*\.(weight|gamma|scale)$", re.IGNORECASE)
_HEAD = re.compile(r"(^|\.)(lm_head|output|embed_out)\.weight$")


#: Formats whose folder may hold the model's ``config.json`` (a Hugging Face checkpoint, or an
#: ONNX export of one), read through the confined side-file reader for the counts.
_CONFIG_FORMATS = (Format.SAFETENSORS, Format.NPZ, Format.PYTORCH, Format.ONNX)


def _hyper(checkpoint: Checkpoint) -> Hyper:
    if checkpoint.format is Format.GGUF:
        return from_gguf(checkpoint.metadata)
    if checkpoint.format not in _CONFIG_FORMATS:
        return Hyper(model_type="", source="names", main=Counts())
    from steelyard.loaders.conventions import read_hf_config

    config = read_hf_config(Path(checkpoint.path).parent)
    if config is None:
        return Hyper(model_type="", source="names", main=Counts())
    return from_config(config)


def _module_named(layers: tuple[Layer, ...]) -> tuple[tuple[Layer, ...], dict[str, str]]:
    """Layers named by the module their weight belongs to where the graph names them after
    operators (an ONNX export names the layer ``/bert/encoder/layer.0/attention/self/query/MatMul``
    and its weight ``bert.encoder.layer.0.attention.self.query.weight``), so that one table of
    module names recognises every format; with the map back to the graph's names."""
    renamed: list[Layer] = []
    real: dict[str, str] = {}
    taken = {layer.name for layer in layers}
    for layer in layers:
        module = layer.weight.removesuffix(".weight")
        if "/" in layer.name and module != layer.weight and "/" not in module and module not in taken:
            renamed.append(replace(layer, name=module))
            real[module] = layer.name
            taken.add(module)
        else:
            renamed.append(layer)
    return tuple(renamed), real


def _renamed(block: AttentionBlock, real: dict[str, str]) -> AttentionBlock:
    """``block`` with its spans naming the graph's layers again."""
    if not real:
        return block

    def back(span: Span) -> Span:
        return replace(span, layer=real.get(span.layer, span.layer))

    heads = tuple(replace(h, q=back(h.q), k=back(h.k), v=back(h.v), o=back(h.o)) for h in block.heads)
    return replace(block, heads=heads)


def recognise(checkpoint: Checkpoint) -> Structure | None:
    """The attention and expert blocks of ``checkpoint``, or None when it has none."""
    hyper = _hyper(checkpoint)
    notes: list[str] = []
    if checkpoint.format in keras_heads.KERAS_FORMATS:
        blocks, source = keras_heads.find_blocks(checkpoint, notes)
        hyper = replace(hyper, source=source)
    else:
        by_module, real_name = _module_named(checkpoint.layers)
        blocks = [_renamed(b, real_name) for b in attention.find_blocks(by_module, hyper, notes)]
    moe = experts.find_blocks(checkpoint.layers, hyper, notes)
    fused = tuple(fused_gate_up(checkpoint.layers))
    if not blocks and not moe and not fused and not notes:
        return None
    tied = hyper.tied
    if tied is None:
        has_embedding = any(layer.kind is LayerKind.EMBEDDING for layer in checkpoint.layers)
        tied = has_embedding and not any(_HEAD.search(name) for name in checkpoint.tensors)
    gains = tuple(
        name
        for name, tensor in checkpoint.tensors.items()
        if len(tensor.shape) == 1 and _NORM_GAIN.search(name)
    )
    family = hyper.family
    if family == "unknown" and blocks:
        family = "decoder" if any(".attn" in b.name or "self_attn" in b.name for b in blocks) else "unknown"
    return Structure(
        family=family,
        model_type=hyper.model_type,
        source=hyper.source,
        attention=tuple(blocks),
        experts=tuple(moe),
        tied_embeddings=tied,
        norm_gains=gains,
        fused_gate_up=fused,
        notes=tuple(notes),
    )


def unit_groups(structure: Structure, checkpoint: Checkpoint) -> dict[str, tuple[UnitGroup, ...]]:
    """Layer name → the head and expert runs of its units or inputs."""
    groups: dict[str, list[UnitGroup]] = defaultdict(list)
    units = {layer.name: layer.units for layer in checkpoint.layers}
    for block in structure.attention:
        kv_done: set[int] = set()
        for head in block.heads:
            groups[head.q.layer].append(UnitGroup("head", head.index, "q", "rows", head.q.start, head.q.stop, block.name))
            if head.kv_index not in kv_done:
                kv_done.add(head.kv_index)
                for part, span in (("k", head.k), ("v", head.v)):
                    groups[span.layer].append(
                        UnitGroup("kv-head", head.kv_index, part, "rows", span.start, span.stop, block.name)
                    )
            groups[head.o.layer].append(
                UnitGroup("head", head.index, "o", "columns", head.o.start, head.o.stop, block.name)
            )
    for moe in structure.experts:
        for expert in (*moe.experts, *moe.shared):
            kind = "shared-expert" if expert.shared else "expert"
            for piece in expert.parts:
                groups[piece.layer].append(
                    UnitGroup(kind, expert.index, piece.role, "rows", 0, units[piece.layer], moe.name)
                )
        if moe.router is not None:
            for expert in moe.experts:
                groups[moe.router].append(
                    UnitGroup("expert", expert.index, "router", "rows", expert.index, expert.index + 1, moe.name)
                )
    for name, halves in fused_gate_up(checkpoint.layers).items():
        groups[name].extend(halves)
    return {name: tuple(sorted(runs, key=lambda g: (g.part, g.start))) for name, runs in groups.items()}


def annotate(checkpoint: Checkpoint) -> Checkpoint:
    """``checkpoint`` with its transformer structure and unit groupings (itself when none)."""
    structure = recognise(checkpoint)
    if structure is None:
        return checkpoint
    notes = checkpoint.notes
    if structure.attention or structure.experts:
        heads = sum(len(b.heads) for b in structure.attention)
        count = sum(len(b.experts) for b in structure.experts)
        notes = (
            *notes,
            f"transformer structure from {structure.source}: {len(structure.attention)} attention "
            f"blocks ({heads} heads), {len(structure.experts)} expert blocks ({count} experts)",
        )
    notes = (*notes, *structure.notes)
    return replace(checkpoint, transformer=structure, unit_groups=unit_groups(structure, checkpoint), notes=notes)


__all__ = ["annotate", "recognise", "unit_groups"]
