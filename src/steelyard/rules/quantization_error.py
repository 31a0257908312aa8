"""``quantization-error``: layers that will not survive low-bit quantization, and the per-layer
table of predicted quantization error.

**What it checks.** Each layer's canonical matrix ``W[units, fan_in]`` (the weight the
layer computes with) is quantized the way the simplest post-training schemes do it,
*round-to-nearest* (RTN) with *symmetric absmax* scales, and the error is measured:

* **8 bits per output channel.** For each row j, ``s_j = max_k |W_jk| / 127``,
  ``Q_jk = rint(W_jk / s_j)`` (an integer in [-127, 127]; ``rint`` rounds halves to even),
  ``Ŵ_jk = s_j·Q_jk``. This is the per-channel symmetric int8 weight scheme of LLM.int8()'s
  vector-wise quantization (Dettmers et al. 2022, "LLM.int8(): 8-bit Matrix Multiplication for
  Transformers at Scale", NeurIPS) and of the usual int8 weight formats (cited from memory).
* **4 bits in groups of ``group-size`` (128) along the input.** (0 counts as 1.) Each row is cut into
  consecutive groups of 128 inputs (the last one shorter when ``fan_in`` is not a multiple;
  a row shorter than a group is one group); per group ``s = max |W| / 7``,
  ``Q = rint(W/s)`` in [-7, 7] (15 levels, symmetric), ``Ŵ = s·Q``. Group-wise RTN at 4 bits
  with 128-wide groups is the baseline of the low-bit LLM literature (e.g. Frantar et al.
  2023, "GPTQ", ICLR, and Lin et al. 2024, "AWQ", MLSys, report RTN g128 as their baseline;
  cited from memory). GGUF's ``Q4_0`` differs in two details (blocks of 32, and the grid
  [-8, 7] scaled by the signed extreme) and ``Q8_0`` in three small ones (blocks of 32, the
  scale stored as float16, halves rounded away from zero: bf16-stored weights do produce
  exact ties, 4 of 4096 in the test fixture); the tests check ``Q8_0`` against the ``gguf``
  package's round trip with those details applied.

**Cost.** To keep the audit's time within its budget (``bench/transformer_rules.py``), a
layer with more than ``sample-elements`` (2^15) weights is measured on a seeded sample of
``sample-elements // fan_in`` of its rows (``numpy.random.default_rng(0)``, without
replacement); both schemes work row by row, so the sampled sums are unbiased estimates of the
whole matrix's, and the worst channel is the worst *measured* one (``rows_measured`` in the
table says how many). ``sample-elements`` 0 measures every row. Single extreme weights, which
a sample can miss, are ``essential-weight``'s business.

Scales and quotients are computed in float32; a group whose maximum is 0 quantizes to 0 with
no error. Per layer and scheme the rule reports the **relative error**
``‖W − Ŵ‖_F / ‖W‖_F`` and the **worst-channel error** ``max_j ‖W_j − Ŵ_j‖ / ‖W_j‖`` (rows with
``‖W_j‖ = 0`` skipped) with the channel it occurs in. Every quantity comes from the layer's
matrix while the audit holds it in memory (the same one pass per layer as every other rule),
row block by row block, in vectorised numpy.

**Why it matters.** Quantizing to 8 or 4 bits is how most language models ship; RTN is what
every scheme starts from and what cheap toolchains apply as is. A layer whose RTN error is far
beyond the rest of the model is the one that breaks the quantized model (its outputs drift
first), so it is the layer to keep at higher precision.

The plain relative error under-states what outlier *input channels* do: a column ``k``
a hundred times larger than the rest stretches every 4-bit scale of its groups so that the
other weights round to zero, yet it holds most of ``‖W‖_F`` itself, so ``‖W − Ŵ‖_F/‖W‖_F``
stays moderate (and *falls* as the outliers grow). Rescaling input channels is free
(multiply column k by c and the producing channel by 1/c; SmoothQuant, Xiao et al. 2023,
ICML, builds on this; cited from memory), so a weight-only measure of damage should not
depend on it. The rule therefore also measures the **balanced error**

    sqrt( Σ_jk (W − Ŵ)_jk² / C_k  /  #{k : C_k > 0} ),   C_k = Σ_j W_jk²,

the relative output error when every input channel contributes the same energy to the
output (activation RMS of channel k ∝ 1/sqrt(C_k)); for a layer without outlier columns it is
close to the plain relative error (all C_k alike). Columns whose RMS is below 1 % of the
median column's are left out (sum and count): inputs the layer barely reads would otherwise
count as wholly lost when they round to zero.

A layer is **quantization-sensitive** when its 4-bit balanced error is at least
``median-multiple`` (3) × the median 4-bit balanced error over all measured layers of the
model, and at least ``min-error`` (0.05). For i.i.d. Gaussian weights absmax g128 4-bit RTN
gives about 0.1 (step ``≈ 2.6σ/7``, error ``step/√12``): the median of a trained model sits
near there, so a layer far beyond it carries what RTN cannot represent, typically a few input
channels orders of magnitude above the rest (the "outlier features" of Dettmers et al. 2022)
that inflate every scale of their groups and round the other weights to zero.

**The table.** The per-layer table lists, in graph order: ``layer``, ``shape``
``[units, fan_in]``, ``int8_error``, ``int8_worst_channel_error``, ``int8_worst_channel``,
``int4_error``, ``int4_worst_channel_error``, ``int4_worst_channel``,
``int4_balanced_error``, ``rows_measured`` (quantized layers: ``stored`` and
``error_paid``). It is in the evidence (``table``) of the first quantization-sensitive
finding, and, with ``table = true``, in one informational finding on the checkpoint (no
layer, score 0) with ``median_int4_balanced_error``, ``group_size`` and ``scheme``. That
finding is off by default because an info finding on every model would fail every
``--fail-on info`` gate; the report has no other place for a rule's data yet.

**Quantized inputs.** A layer whose weights are already stored quantized (a tensor of role
quantized or of integer dtype, a view made from scales and zero points, or, in GGUF files,
values that lie exactly on a symmetric block grid: ``Q8_0``-like 8-bit or ``Q4_0``-like
4-bit blocks of 32) has already paid its quantization error. It can only be measured
against the float weights it was made from, and no loader has those next to the quantized
ones, so such a layer gets no prediction: its table row says ``stored`` (what was
recognised) and ``error_paid`` null, and a note of the report says the error already paid
could not be measured for want of the float reference.

**Severity and score.** Quantization-sensitive: warning, score
``scoring.score(units·fan_in / model parameters measured, balanced error / limit)``. The table: info, score 0.

**What to do.** Keep the flagged layers at 8 bits or in float (most quantization toolkits let
you exclude modules), or use an outlier-aware scheme (mixed-precision decomposition,
activation-aware scaling, finer groups) on them.
"""

from __future__ import annotations

import functools
import threading
from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from steelyard.findings import Finding, Severity
from steelyard.graph import Format, Layer, LayerKind, TensorRole
from steelyard.numbers import count, percent
from steelyard.numbers import measured as value_shown
from steelyard.rules.base import (
    AuditContext,
    RuleSettings,
    RuleSpec,
    layer_finding,
    model_finding,
    threshold,
)
from steelyard.rules.scoring import score
from steelyard.stats.numerics import median_of, sums_of_squares
from steelyard.stats.passes import Blocks
from steelyard.streaming import row_blocks

_BLOCK_BYTES = 2**18
"""Row blocks this small keep a block's several temporaries in the cache."""
SCHEME = (
    "round-to-nearest, symmetric absmax scales: int8 per output channel (levels ±127), "
    "int4 per group of group-size inputs (levels ±7)"
)
#: GGUF block grids recognised on stored values: name → (block, levels of the absmax).
_GRIDS = (("Q8_0-like (8-bit blocks of 32)", 32, 127.0), ("Q4_0-like (4-bit blocks of 32)", 32, 8.0))


@dataclass(frozen=True)
class QuantizationErrorSettings:
    """Thresholds of ``quantization-error``."""

    median_multiple: float = threshold(3.0)
    min_error: float = threshold(0.05)
    group_size: int = threshold(128)
    table: bool = threshold(False)
    sample_elements: int = threshold(2**15)


@dataclass(frozen=True)
class RtnError:
    """Round-to-nearest error of one matrix under one scheme."""

    relative: float
    """‖W − Ŵ‖_F / ‖W‖_F (0 for an all-zero matrix)."""
    worst: float
    """max_j ‖W_j − Ŵ_j‖ / ‖W_j‖ over rows with a non-zero norm."""
    worst_channel: int
    """The row of ``worst`` (-1 when every row is zero)."""


def _grouped(block: np.ndarray, group: int | None) -> np.ndarray:
    """A float32 row block as ``[rows, groups, group]`` (one group per row when ``group`` is
    None or at least the row's width), the last group padded with zeros: they neither change
    a group's absmax nor add error (0 quantizes to 0)."""
    rows, width = block.shape
    if group is None or group >= width:
        return block.reshape(rows, 1, width)
    pad = (-width) % group
    padded = np.pad(block, ((0, 0), (0, pad))) if pad else block
    return padded.reshape(rows, -1, group)


def _dequantized(
    block: np.ndarray, levels: float, group: int | None, absmax: np.ndarray | None = None
) -> np.ndarray:
    """``Ŵ`` of a float32 row block: per row (``group`` None) or per ``group`` inputs;
    ``absmax`` is the groups' max |W| (``[rows, groups, 1]``) when the caller has it."""
    rows, width = block.shape
    shaped = _grouped(block, group)
    scale = np.abs(shaped).max(axis=2, keepdims=True) if absmax is None else absmax.copy()
    scale /= np.float32(levels)
    scale[scale == 0] = 1  # an all-zero group quantizes to 0 whatever its scale
    out = shaped / scale
    np.rint(out, out=out)
    # Weights at the top of the float32 range can round to a level whose value overflows
    # (127 · absmax/127 > float32 max): that error is then infinite, and the layer's errors
    # are left out of the model's median (see ``finish``), without numpy's warning.
    with np.errstate(over="ignore"):
        out *= scale
    return out.reshape(rows, -1)[:, :width]


QUIET_COLUMN = 1e-2
"""Columns whose RMS is below this share of the median column RMS are left out of the
balanced error: they are inputs the layer (almost) does not read (dead-unit's business),
and under the equal-contribution assumption their rounding to zero would count as total loss."""


def column_weights(matrix: np.ndarray) -> np.ndarray:
    """``1 / C_k`` per input column (``C_k`` its sum of squares), 0 for quiet columns (see
    :data:`QUIET_COLUMN`): the weights of the balanced error."""
    columns = sums_of_squares(np.asarray(matrix, dtype=np.float32), axis=0)
    out = np.zeros_like(columns)
    finite = columns[np.isfinite(columns)]
    floor = QUIET_COLUMN**2 * median_of(finite) if finite.size else 0.0
    np.divide(1.0, columns, out=out, where=(columns > floor) & (columns > 0))
    return out


@functools.lru_cache(maxsize=64)
def sampled_rows(units: int, fan_in: int, budget: int, seed: int = 0) -> np.ndarray | None:
    """The rows measured: all (None) when ``units·fan_in <= budget`` or ``budget`` is 0,
    else ``max(1, budget // fan_in)`` rows drawn without replacement by
    ``numpy.random.default_rng(seed)``, sorted (read-only: drawn once per shape, as the
    experts of a mixture-of-experts model share a few shapes)."""
    if budget <= 0 or units * fan_in <= budget:
        return None
    count = max(1, min(units, budget // max(1, fan_in)))
    rows = np.sort(np.random.default_rng(seed).choice(units, size=count, replace=False))
    rows.flags.writeable = False
    return rows


def rtn_errors(
    matrix: np.ndarray, group_size: int, rows: np.ndarray | None = None, picked: bool = False
) -> tuple[RtnError, RtnError, float]:
    """(int8 per channel, int4 per group, int4 balanced error) of round-to-nearest on
    ``W[units, fan_in]``, as defined on this rule's page, over ``rows`` (default: all; the
    worst channel is then the worst measured one), in cache-sized row blocks. ``picked``:
    ``matrix`` already holds just those rows."""
    if rows is not None and not picked:
        matrix = np.asarray(matrix, dtype=np.float32)[rows]
    units, fan_in = matrix.shape
    norms = np.zeros(units, np.float64)
    errors = (np.zeros(units, np.float64), np.zeros(units, np.float64))
    inverse = column_weights(matrix)
    balanced = 0.0
    for a, b in row_blocks(units, fan_in, _BLOCK_BYTES):
        block = np.asarray(matrix[a:b], dtype=np.float32)
        # Sums of squares as the shared pass takes them (float32, float64 where float32 may
        # have overflowed or underflowed): einsum with a float64 result casts through a buffer
        # and took 3.5 × as long on these blocks.
        norms[a:b] = sums_of_squares(block, axis=1)
        # One absmax pass serves both schemes: a row's max is the max of its groups' maxima.
        group_max = np.abs(_grouped(block, group_size)).max(axis=2, keepdims=True)
        row_max = group_max.max(axis=1, keepdims=True)
        for index, (levels, group, absmax) in enumerate(
            ((127.0, None, row_max), (7.0, group_size, group_max))
        ):
            diff = block - _dequantized(block, levels, group, absmax)
            errors[index][a:b] = sums_of_squares(diff, axis=1)
        balanced += float(sums_of_squares(diff, axis=0) @ inverse)
    columns_live = int(np.count_nonzero(inverse))
    # Σ_jk W_jk²/C_k = number of columns counted, so that is the balanced denominator.
    balanced_error = float(np.sqrt(balanced / columns_live)) if columns_live else 0.0
    total = float(norms.sum())
    # Both schemes at once: [2, units] relative row errors (0 on all-zero rows).
    squares = np.stack(errors)
    relative = np.sqrt(squares.sum(axis=1) / total) if total > 0 else np.zeros(2)
    live = norms > 0
    ratios = np.zeros_like(squares)
    np.sqrt(np.divide(squares, norms, out=ratios, where=live), out=ratios, where=live)
    worst_rows = np.argmax(ratios, axis=1)
    out: list[RtnError] = []
    for index in range(2):
        worst_channel, worst = int(worst_rows[index]), float(ratios[index, worst_rows[index]])
        if not live.any():
            worst_channel, worst = -1, 0.0
        elif rows is not None:
            worst_channel = int(rows[worst_channel])
        out.append(RtnError(float(relative[index]), worst, worst_channel))
    return out[0], out[1], balanced_error


def _on_grid(rows: np.ndarray, block: int, levels: float) -> bool:
    """Whether every weight of ``rows`` lies on the symmetric grid of its block (Inf and NaN
    blocks are on none)."""
    shaped = np.asarray(rows, np.float32).reshape(rows.shape[0], -1, block)
    scale = np.abs(shaped).max(axis=2, keepdims=True) / np.float32(levels)
    safe = np.where(scale > 0, scale, np.float32(1))
    with np.errstate(invalid="ignore", over="ignore"):
        steps = shaped / safe
    return float(np.max(np.abs(steps - np.rint(steps)), initial=0.0)) <= 1e-3


def stored_grid(matrix: np.ndarray | Blocks) -> str | None:
    """The GGUF-style symmetric block grid every weight lies on (``W/(absmax/L)`` an integer
    in each block of 32 along the input, to float32 rounding), or None; of a matrix, or of
    a layer read by passes of row blocks (:meth:`steelyard.stats.LayerStats.streamed`).

    Checked in cache-sized row blocks, stopping at the first block off the grid: weights
    stored as floats fail on the first one (a 330M-parameter F16 file: 4.8 s for the two
    grids over whole matrices, about 1 ms per layer this way)."""
    for name, block, levels in _GRIDS:
        if all(
            rows is not None and _on_grid(rows, block, levels)
            for rows in _grid_parts(matrix, block)
        ):
            return name
    return None


def _grid_parts(matrix: np.ndarray | Blocks, block: int) -> Iterator[np.ndarray | None]:
    """Cache-sized row blocks of ``matrix``; None when its width is no multiple of the
    grid's block (it then lies on no such grid)."""
    parts = [(0, 0, matrix)] if isinstance(matrix, np.ndarray) else matrix()
    for _first, _end, rows in parts:
        if rows.shape[1] % block:
            yield None
            return
        for a, b in row_blocks(rows.shape[0], rows.shape[1], _BLOCK_BYTES):
            yield rows[a:b]


def quantized_kind(
    ctx: AuditContext, layer: Layer, matrix: np.ndarray | Blocks | None
) -> str | None:
    """How ``layer``'s weights are already stored quantized, or None when they are float."""
    tensor = ctx.checkpoint.tensors.get(layer.weight)
    if tensor is not None:
        if tensor.stored_type is not None:  # decoded from a packed or block-quantized store
            return tensor.stored_type
        if tensor.role is TensorRole.QUANTIZED:
            return f"quantized tensor ({tensor.dtype})"
        if tensor.dtype.startswith(("i", "u")):
            return f"integer tensor ({tensor.dtype})"
    if layer.aux and any(
        (aux := ctx.checkpoint.tensors.get(name)) is not None and aux.dtype.startswith(("i", "u"))
        for name in layer.aux
    ):
        return "made from integer weights and scales"
    if ctx.checkpoint.format is Format.GGUF and matrix is not None:
        return stored_grid(matrix)
    return None


@dataclass
class _Store:
    lock: threading.Lock = field(default_factory=threading.Lock)
    rows: dict[str, dict[str, Any]] = field(default_factory=dict)


def _store(ctx: AuditContext) -> _Store:
    return ctx.stats.shared(f"{RULE.name}:rows", _Store)


def check_layer(
    ctx: AuditContext, settings: RuleSettings[QuantizationErrorSettings], layer: Layer
) -> Iterator[Finding]:
    """Measure one layer's predicted RTN errors (kept for :func:`finish`)."""
    if layer.kind is LayerKind.RECURRENT or layer.units < 1 or layer.fan_in < 1:
        return
    limits = settings.for_layer(layer)
    # A table too large to cache is read by passes (the grid check) and its sampled rows
    # gathered from one, never assembled whole in float32.
    streamed = ctx.stats.streamed(layer)
    matrix = ctx.stats.matrix(layer) if streamed is None else None
    row: dict[str, Any] = {"layer": layer.name, "shape": [layer.units, layer.fan_in]}
    kind = quantized_kind(ctx, layer, matrix if streamed is None else streamed)
    if kind is not None:
        row.update(stored=kind, error_paid=None)
        ctx.notes.add(
            RULE.name,
            "error already paid not measured: the weights are stored quantized and the file "
            "holds no float reference to measure it against",
            layer.name,
        )
    elif not np.isfinite(ctx.stats.row_norms(layer)).all():
        ctx.notes.add(RULE.name, "not measured: the weights hold NaN or Inf", layer.name)
        return
    else:
        rows = sampled_rows(layer.units, layer.fan_in, limits.sample_elements)
        group = max(1, limits.group_size)
        if matrix is not None:
            int8, int4, balanced = rtn_errors(matrix, group, rows)
        elif rows is None:  # every row is measured: the table in one piece after all
            int8, int4, balanced = rtn_errors(ctx.stats.matrix(layer), group)
        else:
            int8, int4, balanced = rtn_errors(ctx.stats.picked(layer, rows), group, rows, picked=True)
        row.update(
            int8_error=int8.relative,
            int8_worst_channel_error=int8.worst,
            int8_worst_channel=int8.worst_channel,
            int4_error=int4.relative,
            int4_worst_channel_error=int4.worst,
            int4_worst_channel=int4.worst_channel,
            int4_balanced_error=balanced,
            group_size=max(1, limits.group_size),
            rows_measured=layer.units if rows is None else int(rows.size),
        )
    store = _store(ctx)
    with store.lock:
        store.rows[layer.name] = row
    yield from ()


def finish(
    ctx: AuditContext, settings: RuleSettings[QuantizationErrorSettings]
) -> Iterator[Finding]:
    """Flag layers far beyond the model's median 4-bit error; add the table."""
    store = _store(ctx)
    with store.lock:
        rows = [store.rows[x.name] for x in ctx.checkpoint.layers if x.name in store.rows]
    measured = [r for r in rows if "int4_error" in r]
    if not rows:
        return
    finite = [r["int4_balanced_error"] for r in measured if np.isfinite(r["int4_balanced_error"])]
    median = median_of(finite) if finite else None
    size = sum(r["shape"][0] * r["shape"][1] for r in measured)
    carried = False
    for row in measured:
        layer = ctx.checkpoint.layer(row["layer"])
        assert layer is not None
        limits = settings.for_layer(layer)
        error = row["int4_balanced_error"]
        if median is None or not np.isfinite(error):
            continue
        limit = max(limits.median_multiple * median, limits.min_error)
        if error < limit:
            continue
        yield layer_finding(
            RULE.name,
            layer,
            severity=Severity.WARNING,
            score=score(layer.units * layer.fan_in / max(1, size), error / limit),
            message=(
                f"4-bit round-to-nearest (groups of {count(row['group_size'])}) has a balanced "
                f"error of {percent(error)}, "
                + (f"{value_shown(error / median)}× the model's median " if median > 0
                   else "where the model's median is ")
                + f"{percent(median)} (limit {percent(limit)}); plain relative error "
                f"{percent(row['int4_error'])}, worst channel {row['int4_worst_channel']} "
                f"{percent(row['int4_worst_channel_error'])}; at 8 bits per channel "
                f"{percent(row['int8_error'])}"
            ),
            hint="keep this layer at 8 bits or in float when quantizing the model, or use an "
            "outlier-aware scheme (finer groups, mixed precision, activation-aware scales)",
            evidence={
                **row,
                "median_int4_balanced_error": median,
                "limit": limit,
                # The whole model's table rides on the first flagged layer's finding.
                **({"table": rows} if not carried else {}),
            },
        )
        carried = True
    if settings.rule_wide.table:
        yield model_finding(
            RULE.name,
            severity=Severity.INFO,
            score=0.0,
            message=(
                f"predicted quantization error of {count(len(measured))} layers"
                + (f" (median balanced 4-bit error {percent(median)})" if median is not None else "")
                + (f"; {count(len(rows) - len(measured))} stored quantized" if len(rows) > len(measured) else "")
                + ": see the evidence table"
            ),
            hint="informational: which layers lose most under 8- and 4-bit round-to-nearest",
            evidence={
                "scheme": SCHEME,
                "group_size": settings.rule_wide.group_size,
                "median_int4_balanced_error": median,
                "table": rows,
            },
        )


RULE = RuleSpec(
    name="quantization-error",
    severity=Severity.WARNING,
    settings=QuantizationErrorSettings,
    summary="a layer whose low-bit rounding error is far beyond the rest of the model will "
    "break when the model is quantized",
    doc=__doc__ or "",
    per_layer=check_layer,
    finish=finish,
)
