"""Comparing a float checkpoint with its quantized or GGUF export.

Two things differ between such files that are not changes of the model:

* **Names.** GGUF files name tensors in their own scheme (``blk.0.attn_q.weight`` for
  ``model.layers.0.self_attn.q_proj.weight``). The map between the schemes is the ``gguf``
  package's ``TensorNameMap`` for the file's architecture (``general.architecture``), the same
  table the reference converter writes names with; :func:`scheme_aliases` turns it into
  OLD-name → NEW-name aliases for :func:`steelyard.comparison.matching.match_layers`.
* **Row order of query and key projections.** Converters to GGUF for rotary-embedding models
  reorder the rows of each head of ``attn_q`` and ``attn_k`` from the two-halves layout to the
  interleaved one: within a head of ``d`` rows, row ``2j`` comes from ``j`` and row ``2j+1``
  from ``j + d/2`` (``reshape(heads, 2, d/2, in).swapaxes(1, 2)``; recalled from the llama.cpp
  converter's ``permute``, no other source). The model computes the same attention either way,
  so :func:`converter_rows` offers that reordering for each such pair and keeps it only when it
  fits the weights better than the stored order, and the comparison measures the pair with it
  undone instead of reporting a change.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np

from steelyard.comparison.diff import Side, Sums
from steelyard.comparison.matching import Pair
from steelyard.graph import Checkpoint, Format, Layer, LayerKind
from steelyard.stats.numerics import power_of_two_toward_one, times_exactly

#: Most singular directions the update's effective rank is resolved to on large layers.
RANK_LIMIT = 64
#: Share of ‖B − A‖²_F the effective rank's directions hold (common practice, no source).
RANK_SHARE = 0.99
#: Layers whose smaller side is at most this get an exact SVD of the update.
_EXACT_SIDE = 256

#: GGUF layer-name endings whose rows converters reorder, and which head count applies.
_ROTARY = {"attn_q": "heads", "attn_k": "kv_heads"}


def scheme_aliases(old: Checkpoint, new: Checkpoint) -> dict[str, str]:
    """OLD's weight tensor names in NEW's naming scheme, when exactly one side is GGUF and
    the ``gguf`` package knows the architecture; empty otherwise."""
    if (old.format is Format.GGUF) == (new.format is Format.GGUF):
        return {}
    native, other = (old, new) if old.format is Format.GGUF else (new, old)
    table = _name_map(native)
    if table is None:
        return {}
    translated = {}
    for layer in other.layers:
        for name in (layer.weight, *(n for n in (layer.bias,) if n)):
            mapped = table.get_name(name, try_suffixes=(".weight", ".bias"))
            if mapped is not None:
                translated[name] = mapped
    if native is new:
        return translated
    return {gguf_name: name for name, gguf_name in translated.items()}


def _name_map(checkpoint: Checkpoint) -> Any:
    try:
        import gguf
    except ImportError:
        return None
    architecture = str(checkpoint.metadata.get("general.architecture", ""))
    arch = {name: key for key, name in gguf.MODEL_ARCH_NAMES.items()}.get(architecture)
    blocks = checkpoint.metadata.get(f"{architecture}.block_count")
    if arch is None or not isinstance(blocks, int) or blocks < 0:
        return None
    return gguf.get_tensor_name_map(arch, blocks)


def converter_order(units: int, heads: int) -> np.ndarray | None:
    """Row ``i`` of the converted projection is row ``order[i]`` of the original, for
    ``heads`` heads of equal even size; None when the rows do not split that way."""
    if heads <= 0 or units % heads or (units // heads) % 2:
        return None
    return np.arange(units).reshape(heads, 2, units // heads // 2).swapaxes(1, 2).reshape(units)


def converter_rows(pairs: Sequence[Pair], old: Side, new: Side) -> dict[str, np.ndarray]:
    """For each same-shape query/key pair between a GGUF side and another, the row order
    that undoes the converter's reordering (NEW row ``i`` is OLD row ``rows[i]``), kept only
    where it brings the weights closer than the stored order does. Keyed by NEW's name."""
    if (old.checkpoint.format is Format.GGUF) == (new.checkpoint.format is Format.GGUF):
        return {}
    native = old if old.checkpoint.format is Format.GGUF else new
    heads = _head_counts(native.checkpoint)
    found: dict[str, np.ndarray] = {}
    for pair in pairs:
        if not pair.same_shape or pair.old is None or pair.new is None:
            continue
        gguf_layer = pair.new if native is new else pair.old
        count = heads.get(gguf_layer.name)
        order = converter_order(gguf_layer.units, count) if count else None
        if order is None:
            continue
        rows = order if native is new else np.argsort(order)
        a, b = old.matrix(pair.old), new.matrix(pair.new)
        with np.errstate(over="ignore", invalid="ignore"):
            stored = float(np.linalg.norm((b - a).astype(np.float64)))
            undone = float(np.linalg.norm((b - a[rows]).astype(np.float64)))
        if np.isfinite(undone) and undone < 0.5 * stored:
            found[pair.new.name] = rows
    return found


def _head_counts(checkpoint: Checkpoint) -> dict[str, int]:
    """GGUF query/key layer name → the number of heads its rows hold."""
    counts: dict[str, int] = {}
    structure = checkpoint.transformer
    if structure is None:
        return counts
    for block in structure.attention:
        spans = {"attn_q": {h.q.layer for h in block.heads}, "attn_k": {h.k.layer for h in block.heads}}
        for role, which in _ROTARY.items():
            number = len(block.heads) if which == "heads" else block.kv_heads
            for name in spans[role]:
                if name.endswith(role):
                    counts[name] = number
    return counts


def precision_measures(
    measured: Sums, a: np.ndarray, b: np.ndarray, old: Side, before: Layer, new: Side,
    layer: Layer, same: bool,
) -> dict[str, Any]:
    """The per-layer measures a comparison across precisions needs, as ``LayerDiff`` fields:
    stored types, the worst element's error, rows NEW flattened, the update's effective rank."""
    out: dict[str, Any] = {"stored_old": stored_type(old, before), "stored_new": stored_type(new, layer)}
    if math.isfinite(measured.max_abs) and measured.diff_sq > 0:
        out["max_abs_change"] = measured.max_abs
    if measured.flat_old is not None and measured.flat_new is not None:
        out["rows_flattened"] = tuple(int(i) for i in np.flatnonzero(measured.flat_new & ~measured.flat_old))
    if not same and layer.kind is not LayerKind.EMBEDDING and math.isfinite(measured.diff_sq) and measured.diff_sq > 0:
        with np.errstate(over="ignore"):
            update = b - a
        if not np.isfinite(update).all():
            # finite weights whose difference leaves float32: the rank is the same for half of it
            update = b * np.float32(0.5) - a * np.float32(0.5)
        rank, limit = energy_rank(update)
        out["update_rank"], out["update_rank_above"] = rank, limit
    return out


def stored_type(side: Side, layer: Layer) -> str | None:
    """What the file stored the layer's weight as: its packed or block type, else its dtype."""
    tensor = side.checkpoint.tensors.get(layer.weight)
    if tensor is None:
        return None
    return tensor.stored_type or tensor.dtype


def _unit_scaled(matrix: np.ndarray) -> np.ndarray:
    """``matrix`` brought to a largest magnitude in [0.5, 1) by a power of two when that lies
    outside [2^-32, 2^32], where the sketch's float32 products could overflow or vanish (the
    rank is the same for any multiple)."""
    factor = power_of_two_toward_one(float(np.max(np.abs(matrix), initial=0.0)), 2.0**32)
    return matrix if factor == 1.0 else times_exactly(matrix, factor)


def energy_rank(delta: np.ndarray, share: float = RANK_SHARE, limit: int = RANK_LIMIT) -> tuple[int | None, int | None]:
    """(rank, None): the fewest singular directions holding ``share`` of ‖delta‖²_F, or
    (None, limit) when more than ``limit`` are needed. Small layers get an exact SVD; larger
    ones a randomized range finder with one power iteration (Halko, Martinsson & Tropp 2011,
    "Finding structure with randomness", Algorithm 4.4), whose captured energy never exceeds
    the truth, so a rank it reports is never too small by more than the directions it
    missed, and a sketch that cannot hold ``share`` says "above the limit" rather than guess."""
    matrix = _unit_scaled(np.asarray(delta, dtype=np.float32))
    total = float(np.einsum("ij,ij->", matrix, matrix, dtype=np.float64))
    if not math.isfinite(total) or total == 0:
        return None, None
    if min(matrix.shape) <= _EXACT_SIDE:
        values = np.linalg.svd(matrix.astype(np.float64), compute_uv=False)
    else:
        rng = np.random.default_rng(0)
        sketch = matrix @ rng.standard_normal((matrix.shape[1], limit + 8)).astype(np.float32)
        basis, _ = np.linalg.qr(sketch)
        basis, _ = np.linalg.qr(matrix @ (matrix.T @ basis))
        values = np.linalg.svd((basis.T @ matrix).astype(np.float64), compute_uv=False)
    energy = np.cumsum(values**2)
    needed = share * total
    if energy[-1] < needed * (1 - 1e-9):
        return None, limit
    rank = int(np.searchsorted(energy, needed * (1 - 1e-9))) + 1
    if min(matrix.shape) > _EXACT_SIDE and rank > limit:
        return None, limit
    return rank, None
