"""The records of a recognised transformer: attention blocks with their heads, mixture-of-experts
blocks with their experts. Plain frozen data, built once after loading (see
:func:`steelyard.transformer.annotate`) and read by the head and expert rules."""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True, slots=True)
class Span:
    """A run ``[start, stop)`` of one layer's rows (``axis`` ``rows``) or inputs (``columns``)."""

    layer: str
    start: int
    stop: int
    axis: str = "rows"

    @property
    def size(self) -> int:
        """Rows or columns in the run."""
        return self.stop - self.start


@dataclass(frozen=True, slots=True)
class Head:
    """One query head: its query rows, the rows of the key/value head it reads (shared with the
    other query heads of its group under grouped-query attention) and its output columns."""

    index: int
    kv_index: int
    q: Span
    k: Span
    v: Span
    o: Span


@dataclass(frozen=True, slots=True)
class AttentionBlock:
    """One multi-head attention module."""

    name: str
    """The module's name (``model.layers.2.self_attn``), used to name its heads."""
    heads: tuple[Head, ...]
    kv_heads: int
    head_dim: int
    value_dim: int
    width: int
    """Inputs of the query projection (the model width)."""
    fused: str | None = None
    """The layout of a fused q/k/v projection (``q|k|v``, ``per-head``, ``per-group``), else None."""

    @property
    def output_layer(self) -> str:
        """The output projection's layer (where a head's findings are located)."""
        return self.heads[0].o.layer


@dataclass(frozen=True, slots=True)
class ExpertPart:
    """One weight matrix of one expert: a layer of the graph (one expert's slice of a stacked
    tensor is a layer of its own, see :mod:`steelyard.loaders.stacked_experts`)."""

    role: str
    """``gate``, ``up``, ``down`` or ``gate_up`` (a fused gate and up projection)."""
    layer: str
    tensor: str
    """The stored tensor the layer reads (shared by every expert of a stack)."""


@dataclass(frozen=True, slots=True)
class Expert:
    """One expert of a mixture-of-experts block."""

    index: int
    parts: tuple[ExpertPart, ...]
    shared: bool = False
    """A shared expert (always active, not routed)."""


@dataclass(frozen=True, slots=True)
class ExpertBlock:
    """One mixture-of-experts block: its router and its experts."""

    name: str
    router: str | None
    """The router's layer (one row per routed expert), when stored."""
    experts: tuple[Expert, ...]
    """Routed experts in router-row order."""
    shared: tuple[Expert, ...] = ()
    top_k: int | None = None


@dataclass(frozen=True)
class Structure:
    """What was recognised: the family, attention and expert blocks, tied embeddings and
    normalisation gains, and where the head counts came from."""

    family: str
    """``decoder``, ``encoder``, ``encoder-decoder``, ``vision`` or ``unknown``."""
    model_type: str
    source: str
    """Where the counts came from: ``config.json``, ``GGUF metadata``, ``Keras model config``,
    ``Keras weight shapes`` (a ``.weights.h5`` without its config) or ``names``."""
    attention: tuple[AttentionBlock, ...] = ()
    experts: tuple[ExpertBlock, ...] = ()
    tied_embeddings: bool | None = None
    norm_gains: tuple[str, ...] = ()
    """Stored tensors that are normalisation gains (γ of layer/RMS norms)."""
    fused_gate_up: tuple[str, ...] = ()
    """Layers whose rows are a gated feed-forward block's gate, then its up projection."""
    notes: tuple[str, ...] = ()
