"""Per-layer measures between two matched layers, and the two ways a difference can be no
change at all: a pure permutation of units, and the rounding of a lower stored precision.

Everything is judged on the canonical view ``[out, in/groups, *kernel]`` the loaders expose, so
orientation never matters. Three outcomes decide a same-shape layer's status:

* **exact**: weights, bias and normalisation parameters are equal (NaN equal to NaN);
* **precision**: every element differs by no more than the rounding of the stored types
  (see :func:`tolerance`);
* **permuted**: NEW's rows (with their bias and normalisation entries) are OLD's rows in
  another order, found by hashing each row and matching hashes, then checked bit for bit.
  Such a permutation only leaves the function unchanged when every consumer's input columns
  are permuted the same way, which the caller verifies (see :mod:`steelyard.comparison`).
"""

from __future__ import annotations

import hashlib
import math
from collections import defaultdict, deque
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from steelyard.comparison.report import UnitChange
from steelyard.dtypes import FLOAT_DTYPES, INT_DTYPES
from steelyard.graph import Checkpoint, Layer, LayerKind
from steelyard.policy import Policy
from steelyard.rules import dead_unit
from steelyard.rules.base import AuditContext
from steelyard.stats import LayerStats, read_stored
from steelyard.stats.numerics import median_of

#: Units listed in a layer's "most changed units".
TOP_UNITS = 5
#: Elements per block when accumulating sums in float64 (bounded memory on huge layers).
_BLOCK_ELEMENTS = 2**22
#: Unit roundoff of float32, the type every canonical view is read in.
_U32 = 2.0**-24
_NORM_FIELDS = ("scale", "shift", "mean", "var")


# ---- one checkpoint's side ----------------------------------------------------------------
class Side:
    """One checkpoint with its statistics and the audit's dead-unit tests, cached per layer.

    The statistics are the ones the checkpoint's audit read (see :func:`statistics`), so
    the comparison reads no weight the audit already read."""

    def __init__(self, checkpoint: Checkpoint, policy: Policy, stats: LayerStats) -> None:
        self.checkpoint = checkpoint
        self.stats = stats
        self.context = AuditContext(
            checkpoint=checkpoint, stats=self.stats, policy=policy, gradients=None
        )
        self._dead: dict[str, frozenset[int]] = {}

    def matrix(self, layer: Layer) -> np.ndarray:
        """Canonical ``[units, fan_in]`` float32."""
        return self.stats.matrix(layer)

    def dtype(self, name: str | None) -> str | None:
        """Stored dtype name of a tensor, None when the tensor is not listed."""
        tensor = self.checkpoint.tensors.get(name) if name else None
        return tensor.dtype if tensor is not None else None

    def vectors(self, layer: Layer) -> dict[str, tuple[np.ndarray, str | None]]:
        """Per-unit 1-D parts: bias and normalisation parameters with their stored dtypes."""
        out: dict[str, tuple[np.ndarray, str | None]] = {}
        bias = self.stats.bias(layer)
        if bias is not None:
            out["bias"] = (bias, self.dtype(layer.bias))
        if layer.norm is not None:
            for part in _NORM_FIELDS:
                name = getattr(layer.norm, part)
                values = self.stats.tensor(name) if name else None
                if values is not None and values.shape == (layer.units,):
                    out[f"norm.{part}"] = (values, self.dtype(name))
        return out

    def dead(self, layer: Layer) -> frozenset[int]:
        """Units the audit's ``dead-unit`` tests call dead, with the policy's thresholds and
        input range (embeddings: none): the rule's own measurement, so the comparison calls
        a unit dead exactly when the audit would."""
        if layer.name not in self._dead:
            self._dead[layer.name] = dead_unit.dead_units(self.context, layer).units
        return self._dead[layer.name]

    def quant_step(self, layer: Layer) -> np.ndarray | None:
        """Per-row quantization step of an integer-stored weight, recovered from the stored
        integers (in the order the loader maps them to the canonical view) and the
        dequantized view; None when the weight is not integer, the loader's order is not
        known, or the step is not one per row (blocked scales)."""
        tensor = self.checkpoint.tensors.get(layer.weight)
        if tensor is None or tensor.dtype not in INT_DTYPES or tensor.dtype == "bool":
            return None
        stored = self.stats.stored_weight(layer)
        return None if stored is None else row_steps(stored, self.matrix(layer))


def statistics(checkpoint: Checkpoint, cache_bytes: int = 256 * 2**20) -> LayerStats:
    """Statistics for one side of a comparison: handed to the side's audit (the ``stats=``
    argument of :func:`steelyard.checkpoint_audit.audit_checkpoint`) and keeping matrices after the
    audit's rules are done, within ``cache_bytes``, for the comparison's measures."""
    return LayerStats(checkpoint, cache_bytes=cache_bytes, retain=True)


def row_steps(quantized: np.ndarray, values: np.ndarray) -> np.ndarray | None:
    """Step ``s_j`` with ``values[j] = s_j·(quantized[j] − z_j)`` for each row, or None when
    no such per-row affine map fits (ONNX DequantizeLinear: y = (x − zero_point)·scale)."""
    q = quantized.astype(np.float64)
    d = values.astype(np.float64)
    if q.ndim != 2 or q.shape != d.shape or q.shape[1] == 0 or not np.all(np.isfinite(d)):
        return None
    rows = np.arange(q.shape[0])
    low, high = q.argmin(axis=1), q.argmax(axis=1)
    span = q[rows, high] - q[rows, low]
    with np.errstate(divide="ignore", invalid="ignore"):
        step = np.where(span > 0, (d[rows, high] - d[rows, low]) / span, np.nan)
    known = step[np.isfinite(step)]
    fill = median_of(np.abs(known)) if known.size else 0.0
    step = np.where(np.isfinite(step), step, 0.0)
    predicted = d[rows, low][:, None] + step[:, None] * (q - q[rows, low][:, None])
    scale = np.maximum(np.abs(d).max(axis=1, keepdims=True), 1e-30)
    if np.any(np.abs(predicted - d) > 1e-5 * scale):
        return None
    return np.where(span > 0, np.abs(step), fill)


# ---- precision ----------------------------------------------------------------------------
def _finfo(dtype: str) -> Any:
    """Float type facts for numpy and ml_dtypes types alike."""
    import ml_dtypes  # lazily: its import costs about a second (docs/performance.md)

    return ml_dtypes.finfo(FLOAT_DTYPES[dtype])  # type: ignore[no-untyped-call]


def _mantissa(dtype: str) -> int:
    return int(_finfo(dtype).nmant)


def _float_contribution(dtype: str, magnitude: np.ndarray) -> np.ndarray:
    """How far a value stored in ``dtype`` can sit from its wider original."""
    nmant = _mantissa(dtype)
    if nmant > 23:
        return _U32 * magnitude  # wider than float32: only the read into float32 rounds
    if nmant == 23:
        return np.zeros_like(magnitude)  # float32 is taken as the original
    info = _finfo(dtype)
    # round to nearest: |fl(x) − x| <= u·|x| with u = eps/2, plus half the smallest
    # subnormal below the normal range (IEEE 754 §4.3 rounding, stated for binary formats)
    return float(info.eps) / 2 * magnitude + float(info.smallest_subnormal) / 2


@dataclass(frozen=True, slots=True)
class Stored:
    """One side of a part: values as compared (float32) and how they were stored."""

    values: np.ndarray
    dtype: str | None
    step: np.ndarray | None = None
    """Quantization step per element (broadcastable) for integer storage."""


def tolerance(old: Stored, new: Stored) -> tuple[np.ndarray, str] | None:
    """Elementwise bound on |new − old| that rounding to the stored types can explain, and
    the name of the lower type; None when the stored types cannot explain any difference
    (equal types, unknown types, or an integer type whose step is unknown)."""
    if old.dtype is None or new.dtype is None or old.dtype == new.dtype:
        return None
    magnitude = np.maximum(np.abs(old.values), np.abs(new.values)).astype(np.float64)
    total = np.zeros_like(magnitude)
    ranks: list[tuple[int, str]] = []
    for side in (old, new):
        if side.dtype is not None and side.dtype in FLOAT_DTYPES:
            total = total + _float_contribution(side.dtype, magnitude)
            ranks.append((_mantissa(side.dtype), side.dtype))
        elif side.dtype is not None and side.dtype in INT_DTYPES and side.step is not None:
            # |q·s − x| <= s/2 per element, plus the float32 arithmetic of (q − z)·s
            total = total + np.asarray(side.step, dtype=np.float64) / 2 + _U32 * magnitude
            ranks.append((-1, side.dtype))
        else:
            return None
    return total, min(ranks)[1]


def _equal(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    return (a == b) | (np.isnan(a) & np.isnan(b))


@dataclass(frozen=True, slots=True)
class PartCheck:
    """How one part (weights, bias, a normalisation vector) of a layer compares."""

    exact: bool
    within: bool
    """Every element equal or within the rounding of the stored types."""
    moved: int
    """Elements beyond that rounding (or unequal when the types cannot explain them)."""
    elements: int
    lower: str | None


def _rows_of(step: np.ndarray | None, rows: slice, count: int) -> np.ndarray | None:
    if step is None or step.ndim == 0 or step.shape[0] != count:
        return step
    return step[rows]


def check_part(old: Stored, new: Stored) -> PartCheck:
    """Compare one part elementwise, in blocks of rows (bounded memory on huge layers)."""
    a, b = old.values, new.values
    size = int(b.size)
    if a.shape != b.shape:
        return PartCheck(False, False, size, size, None)
    if np.array_equal(a, b, equal_nan=True):
        return PartCheck(True, True, 0, size, None)
    count = a.shape[0] if a.ndim else 1
    block = max(1, _BLOCK_ELEMENTS // max(1, size // max(1, count)))
    moved = 0
    lower: str | None = None
    explained = True
    for start in range(0, count, block):
        rows = slice(start, start + block)
        first = a[rows].astype(np.float64) if a.ndim else a.astype(np.float64)
        second = b[rows].astype(np.float64) if b.ndim else b.astype(np.float64)
        same = _equal(first, second)
        if bool(same.all()):
            continue
        bound = tolerance(
            Stored(first, old.dtype, _rows_of(old.step, rows, count)),
            Stored(second, new.dtype, _rows_of(new.step, rows, count)),
        )
        if bound is None:
            explained = False
            moved += int((~same).sum())
            continue
        limit, lower = bound
        with np.errstate(invalid="ignore"):
            within = same | (np.abs(second - first) <= limit)
        moved += int((~within).sum())
    return PartCheck(False, moved == 0 and explained, moved, size, lower if explained else None)


# ---- permutations -------------------------------------------------------------------------
def _canonical_bits(rows: np.ndarray) -> np.ndarray:
    """Rows with −0.0 folded into +0.0 and one NaN pattern, so equal values hash equally."""
    clean = np.ascontiguousarray(rows, dtype=np.float32) + np.float32(0.0)
    clean[np.isnan(clean)] = np.float32(np.nan)
    return clean


def row_permutation(new_rows: np.ndarray, old_rows: np.ndarray) -> np.ndarray | None:
    """``perm`` with ``new_rows[i] == old_rows[perm[i]]`` bit for bit, or None.

    Rows are hashed and matched greedily (equal rows are interchangeable, so the first free
    one is taken, which keeps unchanged duplicates in place); the result is then verified
    element by element.
    """
    if new_rows.shape != old_rows.shape:
        return None
    old_bits, new_bits = _canonical_bits(old_rows), _canonical_bits(new_rows)
    slots: dict[bytes, deque[int]] = defaultdict(deque)
    for index in range(old_bits.shape[0]):
        slots[hashlib.blake2b(old_bits[index].tobytes(), digest_size=16).digest()].append(index)
    perm = np.empty(new_bits.shape[0], dtype=np.int64)
    for index in range(new_bits.shape[0]):
        queue = slots.get(hashlib.blake2b(new_bits[index].tobytes(), digest_size=16).digest())
        if not queue:
            return None
        perm[index] = queue.popleft()
    if not np.array_equal(new_bits.view(np.uint32), old_bits[perm].view(np.uint32)):
        return None  # a hash collision: refuse rather than guess
    return perm


def input_columns(
    layer: Layer, producers: Sequence[Layer], perms: Mapping[str, np.ndarray]
) -> tuple[np.ndarray | None, bool]:
    """Column index map that reorders OLD's canonical matrix into NEW's input order.

    ``perms`` holds, per producer in NEW, the permutation of its units. Returns ``(None,
    True)`` when no producer was permuted, ``(columns, True)`` when the map is known, and
    ``(None, False)`` when a producer was permuted in a way this layer's columns cannot be
    followed through (several producers, groups, unknown channel layout).
    """
    moved = [p for p in producers if p.name in perms]
    if not moved:
        return None, True
    if len(producers) != 1 or len(layer.inputs_from) != 1 or layer.kind is LayerKind.EMBEDDING:
        return None, False
    producer = producers[0]
    perm = perms[producer.name]
    channels = producer.units
    if layer.groups == 1 and layer.in_per_group == channels:
        width = math.prod(layer.kernel)
        columns = (perm[:, None] * width + np.arange(width)[None, :]).reshape(-1)
        return columns, True
    if layer.kind is LayerKind.DENSE and layer.groups == 1 and layer.fan_in % channels == 0:
        spatial = layer.fan_in // channels
        if layer.channels_last_inputs:
            # flattened channels-last: input s·C + c belongs to channel c
            columns = (np.arange(spatial)[:, None] * channels + perm[None, :]).reshape(-1)
        else:
            columns = (perm[:, None] * spatial + np.arange(spatial)[None, :]).reshape(-1)
        return columns, True
    return None, False


# ---- measures -----------------------------------------------------------------------------
@dataclass(frozen=True, slots=True)
class Sums:
    """Float64 sums over a pair of matrices, overall and per row."""

    old_sq: float
    new_sq: float
    diff_sq: float
    dot: float
    row_old_sq: np.ndarray
    row_diff_sq: np.ndarray
    max_abs: float = 0.0
    """Largest |b − a| of any element (NaN when an element is not finite on either side)."""
    flat_old: np.ndarray | None = None
    """Rows whose weights are all equal (zero included) in OLD."""
    flat_new: np.ndarray | None = None
    """Rows whose weights are all equal (zero included) in NEW."""


def sums(old: np.ndarray, new: np.ndarray) -> Sums:
    """Σa², Σb², Σ(b−a)², Σab and the per-row Σa², Σ(b−a)², accumulated in float64 by
    blocks of rows so huge layers never need a float64 copy."""
    units, width = new.shape
    block = max(1, _BLOCK_ELEMENTS // max(1, width))
    row_old = np.empty(units, np.float64)
    row_new = np.empty(units, np.float64)
    row_diff = np.empty(units, np.float64)
    flat_old = np.zeros(units, bool)
    flat_new = np.zeros(units, bool)
    dot = 0.0
    largest = 0.0
    for start in range(0, units, block):
        a = old[start : start + block].astype(np.float64)
        b = new[start : start + block].astype(np.float64)
        with np.errstate(invalid="ignore"):  # Inf − Inf: NaN, a non-finite change
            delta = b - a
        row_old[start : start + block] = np.einsum("ij,ij->i", a, a)
        row_new[start : start + block] = np.einsum("ij,ij->i", b, b)
        row_diff[start : start + block] = np.einsum("ij,ij->i", delta, delta)
        dot += float(np.einsum("ij,ij->", a, b))
        if delta.size:
            largest = max(largest, float(np.max(np.abs(delta))))
            flat_old[start : start + block] = np.ptp(a, axis=1) == 0
            flat_new[start : start + block] = np.ptp(b, axis=1) == 0
    return Sums(
        float(row_old.sum()), float(row_new.sum()), float(row_diff.sum()), dot, row_old, row_diff,
        largest, flat_old, flat_new,
    )


def relative(diff_sq: float, base_sq: float) -> float:
    """sqrt(diff) / sqrt(base): 0 when both are 0, inf when only the base is."""
    if not (math.isfinite(diff_sq) and math.isfinite(base_sq)):
        return math.nan
    if base_sq > 0:
        return math.sqrt(diff_sq) / math.sqrt(base_sq)
    return 0.0 if diff_sq == 0 else math.inf


def cosine(measured: Sums) -> float | None:
    """Cosine of the flattened weights; None when either side is all zero or non-finite."""
    if not (measured.old_sq > 0 and measured.new_sq > 0) or not math.isfinite(measured.dot):
        return None
    value = measured.dot / (math.sqrt(measured.old_sq) * math.sqrt(measured.new_sq))
    return max(-1.0, min(1.0, value))


def top_units(measured: Sums, new: np.ndarray, count: int = TOP_UNITS) -> tuple[UnitChange, ...]:
    """The units with the largest row-wise relative change (unchanged units never listed)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        change = np.sqrt(measured.row_diff_sq) / np.sqrt(measured.row_old_sq)
    change = np.where(measured.row_diff_sq == 0, 0.0, change)
    change = np.where(np.isnan(change), np.inf, change)
    order = np.argsort(-change, kind="stable")[:count]
    new_norms = np.sqrt(np.einsum("ij,ij->i", new[order], new[order], dtype=np.float64))
    return tuple(
        UnitChange(int(u), float(change[u]), float(math.sqrt(measured.row_old_sq[u])), float(n))
        for u, n in zip(order, new_norms, strict=True)
        if change[u] > 0
    )


def fan_in_summary(norms: np.ndarray) -> tuple[float, float, float]:
    """Min, median and max of the finite row norms (NaN when none is finite)."""
    finite = norms[np.isfinite(norms)]
    if not finite.size:
        return (math.nan, math.nan, math.nan)
    return (float(finite.min()), median_of(finite), float(finite.max()))


@dataclass(frozen=True, slots=True)
class Nonfinite:
    """Elements non-finite in NEW but finite in OLD, and the units holding them."""

    count: int = 0
    units: tuple[int, ...] = ()


def new_nonfinite(parts: Sequence[tuple[np.ndarray | None, np.ndarray]]) -> Nonfinite:
    """``parts`` are (OLD aligned or None, NEW) with rows = units; None means no OLD values."""
    count = 0
    units: set[int] = set()
    for old, new in parts:
        bad = ~np.isfinite(new)
        if old is not None and old.shape == new.shape:
            bad &= np.isfinite(old)
        hits = int(bad.sum())
        if hits:
            count += hits
            rows = bad.reshape(bad.shape[0], -1).any(axis=1) if bad.ndim > 1 else bad
            units.update(int(u) for u in np.flatnonzero(rows))
    return Nonfinite(count, tuple(sorted(units)))


@dataclass
class Alignment:
    """How NEW's layer lines up with OLD's: column map, row permutation and the outcome."""

    columns: np.ndarray | None = None
    """Column ``k`` of NEW reads OLD's column ``columns[k]`` (None: identity)."""
    rows: np.ndarray | None = None
    """Row ``i`` of NEW is OLD's row ``rows[i]`` (None: identity)."""
    outcome: str = "changed"
    """``exact``, ``precision``, ``permuted`` (rows reordered) or ``changed``."""
    lower: str | None = None
    moved: int = 0
    elements: int = 0
    note: str = ""
    checks: dict[str, PartCheck] = field(default_factory=dict)
    convention: np.ndarray | None = None
    """A row order a converter applied by convention (rotary query/key rows in GGUF), undone
    before measuring: not a change of the model, so never verified against consumers."""


def aligned_old(
    side: Side, layer: Layer, columns: np.ndarray | None, rows: np.ndarray | None
) -> np.ndarray:
    """OLD's canonical matrix with NEW's column order and (optionally) row order."""
    matrix = side.matrix(layer)
    if columns is not None:
        matrix = matrix[:, columns]
    if rows is not None:
        matrix = matrix[rows]
    return matrix


def compare_parts(
    old_side: Side,
    old: Layer,
    new_side: Side,
    new: Layer,
    columns: np.ndarray | None,
    rows: np.ndarray | None,
) -> tuple[dict[str, PartCheck], str]:
    """Check weights, bias and normalisation parts; a note when the parts differ in kind."""
    checks: dict[str, PartCheck] = {}
    old_step = old_side.quant_step(old) if old_side.dtype(old.weight) in INT_DTYPES else None
    new_step = new_side.quant_step(new) if new_side.dtype(new.weight) in INT_DTYPES else None
    if old_step is not None and rows is not None:
        old_step = old_step[rows]
    checks["weight"] = check_part(
        Stored(
            aligned_old(old_side, old, columns, rows),
            old_side.dtype(old.weight),
            None if old_step is None else old_step[:, None],
        ),
        Stored(
            new_side.matrix(new),
            new_side.dtype(new.weight),
            None if new_step is None else new_step[:, None],
        ),
    )
    old_vectors, new_vectors = old_side.vectors(old), new_side.vectors(new)
    note = ""
    zero = np.zeros(new.units, np.float32)
    for key in sorted(set(old_vectors) | set(new_vectors)):
        if key != "bias" and (key not in old_vectors or key not in new_vectors):
            note = f"{key} exists in {'NEW' if key in new_vectors else 'OLD'} only"
            checks[key] = PartCheck(False, False, 0, 0, None)
            continue
        # a missing bias is a zero bias (stored like the other side's, so no rounding slack)
        old_values, old_dtype = old_vectors.get(key, (zero, None))
        new_values, new_dtype = new_vectors.get(key, (zero, old_dtype))
        old_dtype = old_dtype if key in old_vectors else new_dtype
        if rows is not None and key in old_vectors:
            old_values = old_values[rows]
        checks[key] = check_part(
            Stored(
                old_values, old_dtype, _vector_step(old_side, old_values, old_dtype, key, old, rows)
            ),
            Stored(
                new_values, new_dtype, _vector_step(new_side, new_values, new_dtype, key, new, None)
            ),
        )
    return checks, note


def _vector_step(
    side: Side,
    values: np.ndarray,
    dtype: str | None,
    key: str,
    layer: Layer,
    rows: np.ndarray | None,
) -> np.ndarray | None:
    """Per-element step of an integer-stored bias: |dequantized / stored| (zero point 0, as
    for ONNX QLinearConv's bias), the median step where the stored integer is 0."""
    if dtype not in INT_DTYPES or key != "bias" or layer.bias is None:
        return None
    stored = read_stored(side.checkpoint.tensors[layer.bias]).astype(np.float64).reshape(-1)
    if rows is not None and stored.size == rows.size:
        stored = stored[rows]
    if stored.size != values.size:
        return None
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.abs(values.astype(np.float64) / stored)
    known = ratio[np.isfinite(ratio) & (stored != 0)]
    fill = median_of(known) if known.size else 0.0
    return np.where((stored != 0) & np.isfinite(ratio), ratio, fill)


def align(
    old_side: Side,
    old: Layer,
    new_side: Side,
    new: Layer,
    perms: Mapping[str, np.ndarray],
    allow_rows: bool,
    convention: np.ndarray | None = None,
) -> Alignment:
    """Decide exact / precision / permuted / changed for one same-shape pair, given the
    permutations already found for NEW's producers (and a converter's row order to undo)."""
    columns, followed = input_columns(new, new_side.stats.producers(new), perms)
    result = Alignment(columns=columns, convention=convention)
    if not followed:
        result.note = "an input layer was permuted in a way this layer's columns cannot be followed"
    checks, note = compare_parts(old_side, old, new_side, new, columns, convention)
    result.checks, result.note = checks, result.note or note
    result.moved = sum(c.moved for c in checks.values())
    result.elements = sum(c.elements for c in checks.values())
    if all(c.exact for c in checks.values()):
        result.outcome = "exact"
        return result
    if all(c.within for c in checks.values()):
        result.outcome = "precision"
        lowers = sorted({c.lower for c in checks.values() if c.lower}, key=_rank_of)
        result.lower = lowers[0] if lowers else None
        return result
    if not allow_rows or not followed or new.kind is LayerKind.EMBEDDING or note or convention is not None:
        return result
    rows = _find_rows(old_side, old, new_side, new, columns)
    if rows is not None and not np.array_equal(rows, np.arange(rows.size)):
        result.rows = rows
        result.outcome = "permuted"
        result.moved = 0
    return result


def _rank_of(dtype: str) -> int:
    return _mantissa(dtype) if dtype in FLOAT_DTYPES else -1


def _find_rows(
    old_side: Side, old: Layer, new_side: Side, new: Layer, columns: np.ndarray | None
) -> np.ndarray | None:
    """Row permutation of weights together with bias and normalisation vectors."""
    old_norms = np.sort(old_side.stats.row_norms(old))
    new_norms = np.sort(new_side.stats.row_norms(new))
    # cheap refusal: permuted rows keep their norms (up to the float32 summation order of
    # the columns, about 1e-6 relative; the exact check follows)
    if not np.allclose(old_norms, new_norms, rtol=1e-4, atol=0.0, equal_nan=True):
        return None
    old_parts = [aligned_old(old_side, old, columns, None)]
    new_parts = [new_side.matrix(new)]
    old_vectors, new_vectors = old_side.vectors(old), new_side.vectors(new)
    for key in sorted(set(old_vectors) & set(new_vectors)):
        old_parts.append(old_vectors[key][0][:, None])
        new_parts.append(new_vectors[key][0][:, None])
    return row_permutation(np.hstack(new_parts), np.hstack(old_parts))
