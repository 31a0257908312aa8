"""GGUF files (versions 2 and 3): header parsed by hand, tensors dequantized by ``gguf``.

``header`` checks every count, length and offset the file claims before anything is built;
``tensors`` reads tensors lazily (block-quantized ones dequantized in bounded runs of blocks
with ``gguf.quants.dequantize``); ``layers`` builds the graph from the architecture metadata
and the ``blk.N.*`` names. The ``gguf`` package is optional: it is imported only when a GGUF
file is read.
"""

from __future__ import annotations

from collections import Counter
from dataclasses import replace
from pathlib import Path
from typing import Any

from steelyard import budget
from steelyard.errors import LoadError
from steelyard.graph import Checkpoint, Format, Layer, Tensor, mark_outputs
from steelyard.loaders.gguf.header import ArrayValue, Header, read_header
from steelyard.loaders.gguf.layers import Meta, build
from steelyard.loaders.gguf.tensors import DataFile, make_tensor, type_name
from steelyard.loaders.signatures import gguf_file

_MISSING = "reading GGUF needs the gguf package: pip install 'steelyard[gguf]'"


class GgufLoader:
    """Single ``.gguf`` files, recognised by their magic bytes."""

    format = Format.GGUF

    def sniff(self, path: Path, head: bytes) -> bool:
        return gguf_file(path, head)

    def load(self, path: Path) -> Checkpoint:
        try:
            import gguf  # noqa: F401
        except ImportError:
            raise LoadError(path, _MISSING) from None
        ledger = budget.Ledger(path)
        header = read_header(path, ledger)
        data = DataFile(path, header)
        tensors: dict[str, Tensor] = {info.name: make_tensor(data, info) for info in header.tensors}
        arch = header.metadata.get("general.architecture")
        meta = Meta(arch if isinstance(arch, str) else "", header.metadata)
        layers, layer_notes = build(tensors, meta)
        for layer in layers:
            budget.check_units(path, layer.units, f"layer {layer.name!r}")
        ledger.check_time("the GGUF layer graph")
        kinds = Counter(type_name(info.type_id) for info in header.tensors)
        notes = [_summary(header, meta, tensors), _types(kinds)]
        unread = sorted(
            {type_name(i.type_id) for i in header.tensors if tensors[i.name].read_span is None}
        )
        if unread:
            notes.append(
                f"tensors of type {', '.join(unread)} are counted but not audited: the installed "
                "gguf package cannot dequantize them"
            )
        return Checkpoint(
            path=str(path),
            format=self.format,
            tensors=tensors,
            layers=_keep_heads(mark_outputs(layers)),
            file_size=header.file_size,
            files=(str(path),),
            notes=(*notes, *layer_notes),
            metadata=_kept_metadata(header.metadata),
        )


def _keep_heads(layers: tuple[Layer, ...]) -> tuple[Layer, ...]:
    """Only the language-model head is a model output: ffn_down and attn_output feed the
    residual stream, which links do not follow."""
    return tuple(
        layer if layer.is_output == (layer.name == "output") else replace(
            layer, is_output=layer.name == "output"
        )
        for layer in layers
    )


def _summary(header: Header, meta: Meta, tensors: dict[str, Tensor]) -> str:
    """One line: version, architecture, blocks, heads, experts, vocabulary, file type."""
    parts = [f"GGUF v{header.version}", f"architecture {meta.arch or 'not stated'}"]
    for key, label in (
        ("block_count", "blocks"),
        ("attention.head_count", "heads"),
        ("attention.head_count_kv", "key/value heads"),
        ("expert_count", "experts"),
        ("expert_used_count", "experts used"),
    ):
        raw = meta.values.get(f"{meta.arch}.{key}")
        if isinstance(raw, ArrayValue) and raw.values is not None:
            # Per-block values (e.g. head counts that vary by block): their distinct values.
            parts.append(f"{label} {'/'.join(str(v) for v in sorted(set(raw.values)))}")
        elif meta.get(key) is not None:
            parts.append(f"{label} {meta.get(key)}")
    vocab = vocabulary_size(header, meta, tensors)
    if vocab is not None:
        parts.append(f"vocabulary {vocab}")
    file_type = header.metadata.get("general.file_type")
    if isinstance(file_type, int) and not isinstance(file_type, bool):
        parts.append(f"file type {_file_type(file_type)}")
    return ", ".join(parts)


def vocabulary_size(header: Header, meta: Meta, tensors: dict[str, Tensor]) -> int | None:
    """``{arch}.vocab_size``, else the tokenizer's token list, else the embedding's rows."""
    value = meta.get("vocab_size")
    if isinstance(value, int):
        return value
    tokens = header.metadata.get("tokenizer.ggml.tokens")
    if isinstance(tokens, ArrayValue):
        return tokens.length
    embedding = tensors.get("token_embd.weight")
    return embedding.shape[0] if embedding is not None and len(embedding.shape) == 2 else None


def _file_type(value: int) -> str:
    from gguf.constants import LlamaFileType

    try:
        return LlamaFileType(value).name
    except ValueError:
        return str(value)


def _types(kinds: Counter[str]) -> str:
    listed = ", ".join(f"{name} ×{count}" for name, count in sorted(kinds.items()))
    return (
        f"GGUF tensor types: {listed or 'none'}; block-quantized tensors are read as float32, "
        "dequantized block by block with the gguf package"
    )


__all__ = ["GgufLoader", "vocabulary_size"]


#: Longest per-block array kept from the metadata (head counts per block; a model has far
#: fewer blocks than this).
_MAX_BLOCK_ARRAY = 4096


def _kept_metadata(metadata: dict[str, Any]) -> dict[str, Any]:
    """Scalar metadata, plus the small integer arrays that describe blocks one by one
    (``{arch}.attention.head_count`` and ``head_count_kv`` may be per-block arrays)."""
    kept: dict[str, Any] = {}
    for key, value in metadata.items():
        if isinstance(value, (int, float, str)):
            kept[key] = value
        elif (
            key.endswith((".attention.head_count", ".attention.head_count_kv"))
            and isinstance(value, ArrayValue)
            and value.values is not None
            and 0 < len(value.values) <= _MAX_BLOCK_ARRAY
            and all(isinstance(v, int) and not isinstance(v, bool) for v in value.values)
        ):
            kept[key] = tuple(value.values)
    return kept
