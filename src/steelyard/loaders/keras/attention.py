"""Keras attention layers (``MultiHeadAttention``, ``GroupQueryAttention``) as dense layers,
and the head counts they declare.

Both are made of ``EinsumDense`` sub-layers (Keras docs of ``keras.layers.MultiHeadAttention``
and ``GroupQueryAttention``; the equations are in their ``build``): ``query``, ``key``,
``value`` (and, with ``use_gate``, ``gate``) have kernels ``[d, heads, head_dim]`` and biases
``[heads, head_dim]``; ``attention_output`` has a kernel ``[heads, value_dim, *output_shape]``
and a bias ``[*output_shape]``. Each sub-layer becomes one layer ``<attention>/<sub-layer>`` in
canonical ``[units, fan_in]`` form by flattening its head axes in stored (C) order: unit
``h·head_dim + j`` of ``query`` is ``kernel[:, h, j]``, input ``h·value_dim + j`` of
``attention_output`` is ``kernel[h, j, ...]``. So head ``h`` owns a run of rows (q, k, v) or of
columns (output), which is what :mod:`steelyard.transformer` needs. Under grouped-query
attention the key and value have ``num_key_value_heads`` heads, each repeated for
``num_query_heads / num_key_value_heads`` consecutive query heads (``ops.repeat`` on the head
axis).

Where the variables are stored: ``.weights.h5`` keeps each sub-layer in a group of the
attention layer named after the attribute that holds it (``query_dense``; ``_query_dense``
for GroupQueryAttention and for the gate), a legacy ``.h5`` names them
``<layer>/<sub-layer>/kernel``. Keras orders them ``query, key, gate, value,
attention_output``, kernel before bias.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from steelyard.graph import Tensor
from steelyard.loaders.keras.config_values import flag

#: Sub-layers in Keras' variable order, and the ``.weights.h5`` attribute each is kept under.
PARTS: tuple[tuple[str, str], ...] = (
    ("query", "query_dense"),
    ("key", "key_dense"),
    ("gate", "gate_dense"),
    ("value", "value_dense"),
    ("attention_output", "output_dense"),
)


@dataclass(frozen=True)
class AttentionFacts:
    """What one Keras attention layer declares about its heads (names, shapes and counts; no
    weight is read). Kept on ``Checkpoint.metadata[KEY]`` for :mod:`steelyard.transformer`."""

    block: str
    """The attention layer's display name (its sub-layers are ``<block>/query``…)."""
    cls: str
    heads: int
    kv_heads: int
    head_dim: int
    value_dim: int
    width: int
    """Inputs of the query projection."""
    query: str
    key: str
    value: str
    output: str
    gate: str | None
    source: str
    """``model config`` (counts checked against the config) or ``weight shapes`` (no config)."""


#: ``Checkpoint.metadata`` key of the tuple of :class:`AttentionFacts`.
KEY = "keras.attention"


def roles(config: Mapping[str, Any] | None) -> list[str]:
    """Stored variables of an attention layer in Keras' order (``query/kernel``…). Without a
    config the optional gate counts as present (callers then only match names)."""
    conf = config or {}
    bias = flag(conf, "use_bias", True)
    gate = flag(conf, "use_gate", config is None)
    out: list[str] = []
    for part, _ in PARTS:
        if part == "gate" and not gate:
            continue
        out.extend([f"{part}/kernel", *([f"{part}/bias"] if bias else [])])
    return out


def group_keys(part: str) -> tuple[str, ...]:
    """``.weights.h5`` keys a sub-layer may be stored under inside its attention layer."""
    attribute = dict(PARTS)[part]
    return (attribute, f"_{attribute}")


def role_of_name(weight_name: str) -> str:
    """``mha/query/kernel`` (or Keras 2's ``…/query/kernel:0``) → ``query/kernel``."""
    parts = weight_name.split("/")
    leaf = parts[-1].split(":")[0]
    return f"{parts[-2]}/{leaf}" if len(parts) > 1 else leaf


def heads_first(kernel: np.ndarray) -> np.ndarray:
    """``[d, heads, head_dim]`` → ``[heads·head_dim, d]`` (query, key, value, gate)."""
    return np.asarray(kernel.reshape(kernel.shape[0], -1).T)


def heads_last(kernel: np.ndarray) -> np.ndarray:
    """``[heads, value_dim, *out]`` → ``[prod(out), heads·value_dim]`` (attention output)."""
    return np.asarray(kernel.reshape(kernel.shape[0] * kernel.shape[1], -1).T)


def flat(bias: np.ndarray) -> np.ndarray:
    """A bias ``[heads, head_dim]`` or ``[*out]`` as one vector, in the units' order."""
    return np.asarray(bias.reshape(-1))


class AttentionShapeError(ValueError):
    """A stored shape that does not fit the attention layer (the factory names the file)."""


@dataclass(frozen=True)
class Dims:
    """Head counts and widths of one attention layer, from its stored kernels."""

    heads: int
    kv_heads: int
    head_dim: int
    value_dim: int
    width: int


def dims(weights: Mapping[str, Tensor], config: Mapping[str, Any], have_config: bool) -> Dims:
    """The layer's heads from its kernels' shapes, checked against each other, against the
    biases and (with a config) against the counts the config declares."""
    shapes = {p: weights[f"{p}/kernel"].shape for p in ("query", "key", "value", "attention_output")}
    q, k, v, o = shapes.values()
    if len(q) != 3 or len(k) != 3 or len(v) != 3 or len(o) < 3 or 0 in (*q, *k, *v, *o):
        raise AttentionShapeError(
            f"kernels {q}, {k}, {v}, {o}: expected non-empty [d, heads, width] and "
            "[heads, width, out…]"
        )
    heads, head_dim, kv, value_dim = q[1], q[2], k[1], v[2]
    if k[2] != head_dim or v[1] != kv or o[0] != heads or o[1] != value_dim or heads % kv:
        raise AttentionShapeError(
            f"query {q}, key {k}, value {v} and output {o} kernels do not share their heads"
        )
    gate = weights.get("gate/kernel")
    if gate is not None and gate.shape != (q[0], heads, value_dim):
        raise AttentionShapeError(f"gate kernel {gate.shape} does not match {heads} heads")
    for part, _ in PARTS:
        kernel, bias = weights.get(f"{part}/kernel"), weights.get(f"{part}/bias")
        if kernel is not None and bias is not None:
            wanted = kernel.shape[2:] if part == "attention_output" else kernel.shape[1:]
            if bias.shape != wanted:
                raise AttentionShapeError(f"{part} bias {bias.shape} does not match kernel {kernel.shape}")
    found = Dims(heads, kv, head_dim, value_dim, q[0])
    if have_config:
        declared = _declared(config)
        wrong = [
            f"{key} {value} (stored {getattr(found, key)})"
            for key, value in declared.items()
            if value != getattr(found, key)
        ]
        if wrong:
            raise AttentionShapeError("the config declares " + ", ".join(wrong))
    return found


def _declared(config: Mapping[str, Any]) -> dict[str, int]:
    """The counts the config states (only those it states as positive integers)."""

    def count(key: str) -> int | None:
        value = config.get(key)
        ok = isinstance(value, int) and not isinstance(value, bool) and value > 0
        return value if ok else None

    out: dict[str, int | None]
    if "num_query_heads" in config:  # GroupQueryAttention
        out = {
            "heads": count("num_query_heads"),
            "kv_heads": count("num_key_value_heads"),
            "head_dim": count("head_dim"),
            "value_dim": count("head_dim"),
        }
    else:
        heads, key_dim = count("num_heads"), count("key_dim")
        out = {"heads": heads, "kv_heads": heads, "head_dim": key_dim}
        out["value_dim"] = count("value_dim") or key_dim
    return {key: value for key, value in out.items() if value is not None}


def facts(name: str, cls: str, found: Dims, gated: bool, have_config: bool) -> AttentionFacts:
    """The record of attention layer ``name`` whose sub-layers are ``<name>/<part>``."""
    return AttentionFacts(
        block=name,
        cls=cls,
        heads=found.heads,
        kv_heads=found.kv_heads,
        head_dim=found.head_dim,
        value_dim=found.value_dim,
        width=found.width,
        query=f"{name}/query",
        key=f"{name}/key",
        value=f"{name}/value",
        output=f"{name}/attention_output",
        gate=f"{name}/gate" if gated else None,
        source="model config" if have_config else "weight shapes",
    )
