"""How far a layer moved: relative Frobenius change and cosine against the previous and the
first checkpoint, computed by reading the layers side by side in row blocks.

**Why row blocks and not kept copies.** Keeping float32 copies of the first and previous
checkpoints would cost twice the model's float32 size for the whole run (56 GB for a 7B
model) even though memory would not grow with the number of checkpoints. Reading the same
rows of the current, previous and first checkpoint together costs three row blocks of about
:data:`~steelyard.streaming.CHUNK_BYTES` each, whatever the model's or the run's size. The
price is I/O: each checkpoint is audited once and read once more for drift, and the previous
and first checkpoints' layers are read again beside it (about four times the run's bytes in
all; the page cache serves much of it on a small run). A layer whose canonical matrix is not
one contiguous run of its stored tensor (a transposed Keras kernel, a quantized view) is read
whole through the loader's view instead, so memory is then bounded by three copies of the
largest such layer, still independent of the number of checkpoints.

The sums are accumulated in float64 over float32 blocks, as the comparison does
(:func:`steelyard.comparison.diff.sums`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from steelyard.comparison.diff import relative
from steelyard.graph import Checkpoint, Layer
from steelyard.run_timeline.result import Drift
from steelyard.stats.passes import row_run
from steelyard.stats.reading import locked
from steelyard.streaming import row_blocks
from steelyard.tiled_copy import contiguous


@dataclass(slots=True)
class _Sums:
    """Σa², Σb², Σ(b−a)², Σab of one reference ``a`` against the current ``b``."""

    ref_sq: float = 0.0
    cur_sq: float = 0.0
    diff_sq: float = 0.0
    dot: float = 0.0

    def add(self, ref: np.ndarray, cur: np.ndarray) -> None:
        a = ref.astype(np.float64)
        b = cur.astype(np.float64)
        with np.errstate(invalid="ignore", over="ignore"):  # Inf − Inf: reported as None
            delta = b - a
        self.ref_sq += float(np.einsum("ij,ij->", a, a))
        self.cur_sq += float(np.einsum("ij,ij->", b, b))
        self.diff_sq += float(np.einsum("ij,ij->", delta, delta))
        self.dot += float(np.einsum("ij,ij->", a, b))

    def drift(self) -> Drift:
        change = relative(self.diff_sq, self.ref_sq)
        cosine: float | None = None
        if self.ref_sq > 0 and self.cur_sq > 0 and math.isfinite(self.dot):
            value = self.dot / (math.sqrt(self.ref_sq) * math.sqrt(self.cur_sq))
            cosine = max(-1.0, min(1.0, value))
        return Drift(change if math.isfinite(change) else None, cosine)


def _streamable(checkpoint: Checkpoint, layer: Layer) -> tuple[int, int] | None:
    """(first stored row, stored elements per canonical row) when the canonical matrix is a
    contiguous run of the weight tensor's rows (the rule the statistics stream by)."""
    run = row_run(checkpoint, layer)
    return None if run is None else (run[1], layer.fan_in)


class RowReader:
    """Row blocks ``[a, b)`` of one layer's canonical float32 matrix, streamed when it can be."""

    def __init__(self, checkpoint: Checkpoint, layer: Layer) -> None:
        self.checkpoint = checkpoint
        self.layer = layer
        self._source = _streamable(checkpoint, layer)
        self._whole: np.ndarray | None = None

    def block(self, start: int, stop: int) -> np.ndarray:
        """Rows ``[start, stop)`` as float32 ``[stop − start, fan_in]``."""
        layer = self.layer
        if self._source is None:
            if self._whole is None:
                self._whole = locked(
                    None, lambda: contiguous(layer.matrix(), np.float32)
                )
                self._whole = self._whole.reshape(layer.units, layer.fan_in)
            return self._whole[start:stop]
        first, width = self._source
        tensor = self.checkpoint.tensors[layer.weight]
        out = np.empty((stop - start, width), dtype=np.float32)
        tensor.widen_part((first + start) * width, (first + stop) * width, out)
        return out


def comparable(reference: Checkpoint | None, layer: Layer) -> Layer | None:
    """The reference checkpoint's layer of the same name and canonical shape, if any."""
    if reference is None:
        return None
    other = reference.layer(layer.name)
    if other is None or (other.units, other.fan_in) != (layer.units, layer.fan_in):
        return None
    return other


def measure(
    current: Checkpoint,
    layer: Layer,
    previous: Checkpoint | None,
    first: Checkpoint | None,
) -> tuple[Drift | None, Drift | None]:
    """Drift of ``layer`` from the previous and from the first checkpoint (None where that
    checkpoint has no layer of that name and shape), in one side-by-side pass of row blocks.
    When the previous checkpoint is the first, its layer is read once for both."""
    origin = None if first is previous else first
    references: list[tuple[RowReader, _Sums] | None] = []
    for checkpoint in (previous, origin):
        other = comparable(checkpoint, layer)
        pair = (
            None if checkpoint is None or other is None else (RowReader(checkpoint, other), _Sums())
        )
        references.append(pair)
    active = [pair for pair in references if pair is not None]
    if active:
        rows = RowReader(current, layer)
        for a, b in row_blocks(layer.units, layer.fan_in):
            block = rows.block(a, b)
            for reader, sums in active:
                sums.add(reader.block(a, b), block)
    from_previous, from_first = (None if p is None else p[1].drift() for p in references)
    return from_previous, from_previous if first is previous else from_first
