"""Reading a layer's weights: one streamed pass for its statistics, cached matrices, samples.

The first request for anything about a layer reads its weights in one pass: row blocks of
about :data:`~steelyard.streaming.CHUNK_BYTES` are converted to float32 and, on the way, give
the row sums of squares, the per-column sums a producer's column norms are made of, and the
NaN/±Inf counts of the weight tensor (see :mod:`steelyard.stats` for the float32/float64
accumulation). Matrices up to ``stream_bytes`` are assembled and cached; larger ones are
only streamed, and read whole again only when a rule asks for the full matrix.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterator
from dataclasses import dataclass

import numpy as np

from steelyard.dtypes import FLOAT_ITEMSIZE
from steelyard.graph import Checkpoint, ColumnSlice, Layer, RowSlice, Tensor
from steelyard.stats.low_rank import factor_sums
from steelyard.stats.memo import MatrixCache, Memo
from steelyard.stats.nonfinite import NonfiniteCounts, count_into
from steelyard.stats.numerics import FLOAT_NAMES, sorted_wide, sums_of_squares
from steelyard.stats.reading import locked
from steelyard.streaming import convert_into, row_blocks
from steelyard.tiled_copy import contiguous, transposed_from_parts

#: One block of a pass: rows [a, b) of the canonical matrix as float32.
Block = tuple[int, int, np.ndarray]
#: A layer read again, one pass of :data:`Block` per call (:meth:`WeightPasses.streamed`).
Blocks = Callable[[], Iterator[Block]]


def row_run(checkpoint: Checkpoint, layer: Layer) -> tuple[Tensor, int] | None:
    """(weight tensor, first stored row) when ``layer``'s canonical matrix is a contiguous run
    of its float weight tensor's rows, which can then be streamed by row spans."""
    tensor = checkpoint.tensors.get(layer.weight)
    orient = layer.orient
    if tensor is None or tensor.read_span is None or not isinstance(orient, RowSlice):
        return None
    if not tensor.shape or tensor.dtype not in FLOAT_NAMES:
        return None
    stop = tensor.shape[0] if orient.stop is None else min(orient.stop, tensor.shape[0])
    if stop - orient.start != layer.units or math.prod(tensor.shape[1:]) != layer.fan_in:
        return None
    return tensor, orient.start


def column_run(checkpoint: Checkpoint, layer: Layer) -> tuple[Tensor, int, int] | None:
    """(weight tensor, first stored column, the column after the last) when ``layer``'s
    canonical matrix is a run of its 2-D float weight tensor's columns, transposed (see
    :class:`ColumnSlice`), and made from that tensor alone."""
    tensor = checkpoint.tensors.get(layer.weight)
    orient = layer.orient
    if tensor is None or tensor.read_span is None or not isinstance(orient, ColumnSlice):
        return None
    if layer.aux or len(tensor.shape) != 2 or tensor.dtype not in FLOAT_NAMES:
        return None
    stop = tensor.shape[1] if orient.stop is None else min(orient.stop, tensor.shape[1])
    if stop - orient.start != layer.units or tensor.shape[0] != layer.fan_in:
        return None
    return tensor, orient.start, stop


def low_rank_run(checkpoint: Checkpoint, layer: Layer) -> tuple[np.ndarray, np.ndarray] | None:
    """The float64 factors ``(left [units, r], right [r, fan_in])`` of ``layer``'s canonical
    matrix when it is a run of rows of a low-rank product tensor (:attr:`Tensor.factors`)."""
    run = row_run(checkpoint, layer)
    if run is None or run[0].factors is None:
        return None
    left, right = run[0].factors()
    return left[run[1] : run[1] + layer.units], right


#: A streamed layer's rows are picked by reads of their own when fewer than one in this many
#: are wanted, instead of a pass over every row.
_FEW_ROWS = 8
#: Strided rows of a streamed layer this many stored bytes apart or more (a token table's
#: spectrum subsample) go through ``picked``, which reads them one by one when they are few:
#: a read of one row cost about 8 µs here, a pass about 4.4 GB/s (float32 rows), so one read
#: pays for itself when it skips some 35 KB (docs/performance.md, "Eighteenth session").
_ROW_READ_BYTES = 32 * 2**10


@dataclass(frozen=True, slots=True)
class Summary:
    """What one pass over a layer's weights leaves behind."""

    row_squares: np.ndarray
    """Σ_k W[j, k]² per unit, float64."""
    column_squares: np.ndarray | None
    """Σ_j W[j, k]² per group and fan-in position ``[groups, fan_in]``, float64; only for
    layers some producer reads column norms from."""


class WeightPasses:
    """Reads each layer's canonical weights for the statistics (thread-safe)."""

    def __init__(
        self,
        checkpoint: Checkpoint,
        memo: Memo,
        cache: MatrixCache,
        counts: NonfiniteCounts,
        columns_for: frozenset[str],
        stream_bytes: int,
    ) -> None:
        self.checkpoint = checkpoint
        self.cache = cache
        self.stream_bytes = stream_bytes
        self._memo = memo
        self._counts = counts
        self._columns_for = columns_for

    def streamable(self, layer: Layer) -> tuple[Tensor, int] | None:
        """(weight tensor, first stored row) when the canonical matrix is a run of its rows."""
        return row_run(self.checkpoint, layer)

    def summary(self, layer: Layer) -> Summary:
        """The layer's pass summary, running the pass the first time."""
        key = (layer.name, "summary")
        found = self._memo.get(key)
        if found is None:
            with self._memo.lock_for((layer.name, "load")):
                found = self._memo.get(key)
                if found is None:
                    low = _low_rank_summary(self.checkpoint, layer, layer.name in self._columns_for)
                    if low is not None:  # no pass: the factors bound every entry
                        self._memo.put(key, low[0])
                        if low[1] is not None:
                            self._counts.record(low[1], (0, 0, 0))
                    else:
                        keep = 4 * layer.units * layer.fan_in <= self.stream_bytes
                        matrix = self._pass(layer, keep)
                        if matrix is not None:
                            self.cache.put(("matrix", layer.name), matrix)
                    found = self._memo.get(key)
        assert isinstance(found, Summary)
        return found

    def matrix(self, layer: Layer) -> np.ndarray:
        """Canonical ``W[units, fan_in]`` as float32 (read once while it fits the cache)."""
        key = ("matrix", layer.name)
        cached = self.cache.get(key)
        if cached is not None:
            return cached
        with self._memo.lock_for((layer.name, "load")):
            cached = self.cache.get(key)
            if cached is not None:
                return cached
            if self._memo.get((layer.name, "summary")) is None:
                array = self._pass(layer, keep=True)
                assert array is not None
            else:
                array = self._read_matrix(layer)
            self.cache.put(key, array)
            return array

    def sample(self, layer: Layer, size: int, seed: int) -> np.ndarray:
        """See :meth:`steelyard.stats.LayerStats.sample`."""
        units, fan_in = layer.units, layer.fan_in
        total = units * fan_in
        # Sorted in float32 (or by bf16 keys) and widened after: the same values, faster.
        if total <= size:
            return sorted_wide(self.matrix(layer))
        # With replacement: i.i.d. draws from the layer's weights, the case the rules' sample
        # statistics are stated for, in 60 µs for 20,000; numpy's draw without replacement
        # took 130-210 µs and, below 20 × size weights, a permutation of all the positions.
        positions = np.random.default_rng(seed).integers(0, total, size)
        blocks = self.streamed(layer)
        if blocks is None:
            # In memory the positions need no order (the values are sorted after): sorting
            # them took twice as long as the gather and the value sort together.
            flat = self.matrix(layer).reshape(-1)
            return sorted_wide(flat[positions])
        positions.sort()  # streamed: each row block takes its run of positions
        picked = np.empty(size, dtype=np.float32)
        for a, b, block in blocks():
            lo, hi = np.searchsorted(positions, (a * fan_in, b * fan_in))
            picked[lo:hi] = block.reshape(-1)[positions[lo:hi] - a * fan_in]
        return sorted_wide(picked)

    def streamed(self, layer: Layer) -> Blocks | None:
        """See :meth:`steelyard.stats.LayerStats.streamed`; the one place that decides whether
        a layer is read by passes (``sample``, ``rows`` and ``picked`` ask it too)."""
        source = self.streamable(layer)
        units, fan_in = layer.units, layer.fan_in
        # A low-rank product is never assembled, however small: its summary comes from the
        # factors, and a rule's pass over it computes each row block once, for that pass.
        if source is None:
            return None
        if 4 * units * fan_in <= self.stream_bytes and source[0].factors is None:
            return None
        if self.cache.get(("matrix", layer.name)) is not None:
            return None

        def blocks() -> Iterator[Block]:
            scratch = np.empty(0, dtype=np.float32)
            yield from self._stream_rows(source, units, fan_in, None, scratch, None)

        return blocks

    def picked(self, layer: Layer, index: np.ndarray) -> np.ndarray:
        """See :meth:`steelyard.stats.LayerStats.picked`."""
        blocks = self.streamed(layer)
        if blocks is None:
            return np.ascontiguousarray(self.matrix(layer)[index])
        out = np.empty((index.size, layer.fan_in), dtype=np.float32)
        source = self.streamable(layer)
        if source is not None and index.size * _FEW_ROWS <= layer.units:
            return _read_rows(source, index, out)  # a few rows (a sample's): each on its own
        for a, b, block in blocks():
            lo, hi = np.searchsorted(index, (a, b))
            out[lo:hi] = block[index[lo:hi] - a]
        return out

    def rows(self, layer: Layer, start: int, step: int) -> np.ndarray:
        """See :meth:`steelyard.stats.LayerStats.rows`."""
        units, fan_in = layer.units, layer.fan_in
        blocks = None if step == 1 else self.streamed(layer)
        if blocks is not None and _far_apart(self.streamable(layer), step, fan_in):
            return self.picked(layer, np.arange(start, units, step))
        if blocks is None:
            # A view: BLAS reads rows a stride apart at their leading dimension, so the
            # spectrum search on it gives the copy's values bit for bit without the copy
            # (2816 × 1024, every 4th row: 1.7 ms against 1.9-2.4 ms with the copy).
            view = self.matrix(layer)[start::step]
            view.flags.writeable = False  # the cached matrix is every rule's
            return view
        picked = np.empty((len(range(start, units, step)), fan_in), dtype=np.float32)
        for a, b, block in blocks():
            first = a + (start - a) % step  # the first kept row at or after a
            if first < b:
                picked[(first - start) // step : (b - 1 - start) // step + 1] = block[first - a :: step]
        return picked

    def _pass(self, layer: Layer, keep: bool) -> np.ndarray | None:
        """Read the layer's weights once and store their summary (and the weight tensor's
        counts); returns the matrix when it was assembled (always when ``keep``)."""
        units, fan_in = layer.units, layer.fan_in
        rows = np.zeros(units, dtype=np.float64)
        groups = max(1, layer.groups)
        columns = (
            np.zeros((groups, fan_in), dtype=np.float64)
            if layer.name in self._columns_for
            else None
        )
        per_group = max(1, units // groups)
        source = self.streamable(layer)
        tensor: Tensor | None = None
        counts = [0, 0, 0]
        full: np.ndarray | None
        blocks: Iterator[Block]
        if source is None:
            whole = self._read_whole(layer)
            full = whole
            tensor = self._rearranged(layer)
            blocks = iter([(a, b, whole[a:b]) for a, b in row_blocks(units, fan_in)])
        else:
            stored, first = source
            covers = first == 0 and units == stored.shape[0]
            tensor = stored if covers else None  # counts only for whole tensors
            full = np.empty((units, fan_in), dtype=np.float32) if keep else None
            scratch = None if keep else np.empty(0, dtype=np.float32)
            stored_wide = FLOAT_ITEMSIZE[stored.dtype] > 4
            blocks = self._stream_rows(
                source, units, fan_in, full, scratch, counts if covers and stored_wide else None
            )
        # float32 blocks of float32-or-narrower tensors are counted from their row sums.
        by_rows = tensor is not None and FLOAT_ITEMSIZE[tensor.dtype] <= 4
        for a, b, block in blocks:
            squares = sums_of_squares(block, axis=1)
            rows[a:b] = squares
            if by_rows:
                bad = ~np.isfinite(squares)
                if bad.any():
                    count_into(block[bad], counts)
            if columns is not None:
                for group in range(a // per_group, min(groups, (b - 1) // per_group + 1)):
                    lo, hi = max(a, group * per_group), min(b, (group + 1) * per_group)
                    columns[group] += sums_of_squares(block[lo - a : hi - a], axis=0)
        self._memo.put((layer.name, "summary"), Summary(rows, columns))
        if tensor is not None:
            self._counts.record(tensor, (counts[0], counts[1], counts[2]))
        return full

    def _rearranged(self, layer: Layer) -> Tensor | None:
        """The weight tensor when the loader's view only rearranges it: an ``orient``, no
        other tensor the weights are made from, every element used, float32 or narrower (so
        the widened view holds exactly its NaN and ±Inf)."""
        tensor = self.checkpoint.tensors.get(layer.weight)
        if tensor is None or layer.orient is None or layer.aux:
            return None
        if FLOAT_ITEMSIZE.get(tensor.dtype, 8) > 4 or tensor.size != layer.units * layer.fan_in:
            return None
        return tensor

    def _read_whole(self, layer: Layer) -> np.ndarray:
        """The canonical matrix through the loader's view, under the read lock: a view may
        read tensors other than the weight (a weight-norm gain, quantization scales). A run of
        a tensor's columns is read by spans instead, transposed a slab at a time."""
        columns = column_run(self.checkpoint, layer)
        if columns is not None:
            tensor, start, stop = columns
            shape = (tensor.shape[0], tensor.shape[1])
            return transposed_from_parts(tensor.widen_part, shape, start, stop)
        return locked(None, lambda: contiguous(layer.matrix(), np.float32))

    def _stream_rows(
        self,
        source: tuple[Tensor, int],
        units: int,
        fan_in: int,
        full: np.ndarray | None,
        scratch: np.ndarray | None,
        counts: list[int] | None,
    ) -> Iterator[Block]:
        tensor, first = source
        assert tensor.read_span is not None
        for a, b in row_blocks(units, fan_in):
            start, stop = (first + a) * fan_in, (first + b) * fan_in
            if full is not None:
                block = full[a:b]
            else:
                assert scratch is not None
                if scratch.size < (b - a) * fan_in:
                    scratch = np.empty((b - a) * fan_in, dtype=np.float32)
                block = scratch[: (b - a) * fan_in].reshape(b - a, fan_in)
            if counts is not None:  # float64 storage: counted as stored
                stored = tensor.read_part(start, stop)
                convert_into(stored, block)
                count_into(stored, counts)
            else:
                tensor.widen_part(start, stop, block)
            yield a, b, block

    def _read_matrix(self, layer: Layer) -> np.ndarray:
        source = self.streamable(layer)
        if source is None:
            return self._read_whole(layer)
        full = np.empty((layer.units, layer.fan_in), dtype=np.float32)
        for _block in self._stream_rows(source, layer.units, layer.fan_in, full, None, None):
            pass
        return full


def _low_rank_summary(
    checkpoint: Checkpoint, layer: Layer, with_columns: bool
) -> tuple[Summary, Tensor | None] | None:
    """A low-rank product's summary from its factors, without a pass
    (:func:`steelyard.stats.low_rank.factor_sums`), with its tensor when the layer covers it
    (whose non-finite counts are then zero: the factors bound every entry); None when the
    layer is no such product or the factors cannot stand for a pass."""
    factors = low_rank_run(checkpoint, layer)
    sums = None if factors is None or layer.groups != 1 else factor_sums(*factors, with_columns)
    if sums is None:
        return None
    rows, columns = sums
    summary = Summary(rows, None if columns is None else columns.reshape(1, -1))
    tensor, first = row_run(checkpoint, layer) or (None, 0)
    covers = tensor is not None and first == 0 and layer.units == tensor.shape[0]
    return summary, tensor if covers else None


def _far_apart(source: tuple[Tensor, int] | None, step: int, fan_in: int) -> bool:
    """Whether every ``step``-th row of a streamed layer lies ``_ROW_READ_BYTES`` or more of
    stored bytes from the next (worth reading one by one)."""
    if source is None:
        return False
    return step * fan_in * FLOAT_ITEMSIZE.get(source[0].dtype, 4) >= _ROW_READ_BYTES


def _read_rows(source: tuple[Tensor, int], index: np.ndarray, out: np.ndarray) -> np.ndarray:
    """Rows ``index`` of a streamable layer into ``out``, one read each: the same values a
    pass gives, without reading the rows between them."""
    tensor, first = source
    fan_in = out.shape[1]
    for position, row in enumerate(index.tolist()):
        tensor.widen_part((first + row) * fan_in, (first + row + 1) * fan_in, out[position])
    return out
