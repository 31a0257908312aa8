"""Head and expert counts from a ``config.json`` beside the model or from GGUF metadata.

Hugging Face configs spell the same quantity many ways (common practice, no source; the names
below are those of the ``transformers`` configuration classes): heads ``num_attention_heads``,
``n_head``, ``num_heads``, ``encoder_attention_heads``/``decoder_attention_heads`` (BART),
``n_heads``; key/value heads ``num_key_value_heads``, ``n_head_kv``, ``num_kv_heads``,
``multi_query`` (Falcon: one key/value head); head width ``head_dim``, ``d_kv`` (T5); experts
``num_local_experts`` (Mixtral), ``num_experts`` (Qwen-MoE, Switch), ``n_routed_experts``
(DeepSeek); experts per token ``num_experts_per_tok``, ``moe_top_k``. Multimodal configs nest
the text and vision parts (``text_config``, ``vision_config``), which are read the same way.
GGUF files store ``{arch}.attention.head_count``, ``head_count_kv``, ``key_length``,
``value_length``, ``embedding_length``, ``expert_count`` and ``expert_used_count``
(``gguf.constants.Keys``); head counts may be per-block arrays.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

_HEADS = ("num_attention_heads", "n_head", "num_heads", "n_heads", "encoder_attention_heads")
_KV = ("num_key_value_heads", "n_head_kv", "num_kv_heads", "n_kv_heads", "multi_query_group_num")
_DIM = ("head_dim", "d_kv", "attention_head_size", "kv_channels")
_WIDTH = ("hidden_size", "n_embd", "d_model", "dim")
_EXPERTS = ("num_local_experts", "num_experts", "n_routed_experts", "moe_num_experts")
_TOP_K = ("num_experts_per_tok", "moe_top_k", "num_selected_experts", "top_k")
_ENCODER_ONLY = {"bert", "roberta", "xlm-roberta", "distilbert", "electra", "albert", "deberta",
                 "deberta-v2", "modernbert", "camembert", "ernie", "mpnet"}  # fmt: skip
_ENCODER_DECODER = {"t5", "mt5", "umt5", "bart", "mbart", "marian", "pegasus", "whisper",
                    "switch_transformers", "longt5", "m2m_100", "nllb-moe", "blenderbot"}  # fmt: skip
_VISION = {"vit", "deit", "beit", "dinov2", "clip_vision_model", "siglip_vision_model", "swin",
           "vit_mae", "dino"}  # fmt: skip


def _int(value: Any) -> int | None:
    return value if isinstance(value, int) and not isinstance(value, bool) and value > 0 else None


def _first(config: Mapping[str, Any], keys: tuple[str, ...]) -> int | None:
    for key in keys:
        found = _int(config.get(key))
        if found is not None:
            return found
    return None


@dataclass(frozen=True)
class Counts:
    """Attention and expert sizes of one stack of blocks (an encoder or a decoder)."""

    heads: int | None = None
    kv_heads: int | None = None
    head_dim: int | None = None
    value_dim: int | None = None
    width: int | None = None
    experts: int | None = None
    top_k: int | None = None


@dataclass(frozen=True)
class Hyper:
    """What the model's own description says: family, per-stack counts, tied embeddings."""

    model_type: str
    source: str
    main: Counts
    decoder: Counts | None = None
    """Different counts for the decoder of an encoder-decoder model (BART), else None."""
    vision: Counts | None = None
    tied: bool | None = None
    falcon_layout: str | None = None
    """Falcon's fused q/k/v layout: ``per-group`` (new decoder architecture), ``q|k|v``
    (multi-query) or ``per-head``."""
    per_block: tuple[Counts, ...] = ()
    """Counts of block ``N`` at index ``N`` when they differ from block to block (GGUF stores
    per-block arrays of head counts for such models); empty when one set fits all."""

    @property
    def family(self) -> str:
        """Decoder, encoder, encoder-decoder or vision (from the model type)."""
        if self.model_type in _ENCODER_ONLY:
            return "encoder"
        if self.model_type in _ENCODER_DECODER:
            return "encoder-decoder"
        if self.model_type in _VISION:
            return "vision"
        return "decoder" if self.model_type else "unknown"

    def counts_for(self, block: str) -> Counts:
        """The counts that apply to the attention block named ``block``."""
        lowered = block.lower()
        index = _block_index(lowered)
        if self.per_block and index is not None and index < len(self.per_block):
            return self.per_block[index]
        if self.vision is not None and ("vision" in lowered or "visual" in lowered):
            return self.vision
        if self.decoder is not None and "decoder" in lowered:
            return self.decoder
        return self.main


def _counts(config: Mapping[str, Any], heads_key: tuple[str, ...] = _HEADS) -> Counts:
    heads = _first(config, heads_key)
    kv = _first(config, _KV)
    if kv is None and config.get("multi_query") is True:
        kv = 1
    if kv is None and config.get("new_decoder_architecture") is True:
        kv = _int(config.get("num_kv_heads"))
    dim = _first(config, _DIM)
    return Counts(
        heads=heads,
        kv_heads=kv if kv is not None else heads,
        head_dim=dim,
        value_dim=dim,
        width=_first(config, _WIDTH),
        experts=_first(config, _EXPERTS),
        top_k=_first(config, _TOP_K),
    )


def from_config(config: Mapping[str, Any]) -> Hyper:
    """Counts from a Hugging Face ``config.json`` (already parsed)."""
    model_type = str(config.get("model_type", "")).lower()
    text = config.get("text_config")
    base: Mapping[str, Any] = text if isinstance(text, Mapping) else config
    main = _counts(base)
    decoder = None
    if _int(config.get("decoder_attention_heads")) is not None:
        decoder = _counts(config, ("decoder_attention_heads",))
        decoder = Counts(**{**decoder.__dict__, "kv_heads": decoder.heads})
    vision_config = config.get("vision_config")
    vision = _counts(vision_config) if isinstance(vision_config, Mapping) else None
    tied = config.get("tie_word_embeddings")
    falcon = None
    if model_type == "falcon":
        if config.get("new_decoder_architecture") is True:
            falcon = "per-group"
        elif config.get("multi_query", True) is True:
            falcon = "q|k|v"
        else:
            falcon = "per-head"
    return Hyper(
        model_type=model_type,
        source="config.json",
        main=main,
        decoder=decoder,
        vision=vision,
        tied=tied if isinstance(tied, bool) else None,
        falcon_layout=falcon,
    )


def from_gguf(metadata: Mapping[str, Any]) -> Hyper:
    """Counts from GGUF metadata. Head counts may be one value or a per-block array (models
    whose blocks have different numbers of heads); with arrays, each block gets its own."""
    arch = str(metadata.get("general.architecture", ""))

    def get(key: str) -> int | None:
        return _int(metadata.get(f"{arch}.{key}"))

    width = get("embedding_length")
    key_dim = get("attention.key_length")
    value_dim = get("attention.value_length")
    experts, top_k = get("expert_count"), get("expert_used_count")

    def counts(heads: int | None, kv: int | None) -> Counts:
        dim = key_dim
        if dim is None and heads and width and width % heads == 0:
            dim = width // heads
        return Counts(heads, kv or heads, dim, value_dim or dim, width, experts, top_k)

    heads_value = metadata.get(f"{arch}.attention.head_count")
    kv_value = metadata.get(f"{arch}.attention.head_count_kv")
    if isinstance(heads_value, (list, tuple)) or isinstance(kv_value, (list, tuple)):
        blocks = max(len(v) for v in (heads_value, kv_value) if isinstance(v, (list, tuple)))
        per_block = tuple(
            counts(_int(_at(heads_value, n)), _int(_at(kv_value, n))) for n in range(blocks)
        )
        main = next((c for c in per_block if c.heads), counts(None, None))
        return Hyper(model_type=arch, source="GGUF metadata", main=main, per_block=per_block)
    main = counts(_int(heads_value), _int(kv_value))
    return Hyper(model_type=arch, source="GGUF metadata", main=main)


def _at(value: Any, index: int) -> Any:
    """``value[index]`` of a per-block array, or the one value every block shares."""
    if isinstance(value, (list, tuple)):
        return value[index] if index < len(value) else None
    return value


def _block_index(name: str) -> int | None:
    """N of a GGUF block name ``blk.N...``; None for other names."""
    if not name.startswith("blk."):
        return None
    number = name[4:].split(".", 1)[0]
    return int(number) if number.isdigit() else None
