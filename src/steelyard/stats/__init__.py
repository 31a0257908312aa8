"""Per-layer quantities that several rules need, computed once per audit and cached.

Rules never read each other's output, but they do share the *inputs*: the canonical matrix,
its row norms, the batch-norm-folded weights, consumer column blocks. Reading and converting
a tensor is the expensive part of an audit, so it happens here, once, and the comparison
reuses the audit's statistics instead of reading again.

:class:`LayerStats` is the one façade rules and the comparison use; the parts behind it:

* :mod:`.memo`: once-only results shared between threads, and the byte-bounded LRU cache;
* :mod:`.reading`: the read path (streamed when the loader allows, else under one lock);
* :mod:`.passes`: one streamed pass per layer, cached matrices, seeded samples;
* :mod:`.nonfinite`: NaN/±Inf counts, once per tensor, shared with the ``nonfinite`` rule;
* :mod:`.folding`: folding an inference-form batch norm into the layer before it;
* :mod:`.topology`: producers, consumers and consumer column layouts.

**One pass per layer.** The first request for anything about a layer (its matrix, its row
norms, the column norms a producer needs from it) reads its weights in one pass: row blocks
of about :data:`~steelyard.streaming.CHUNK_BYTES` are converted to float32 and, on the way,
give the row sums of squares, the per-column sums of squares a producer's ``column_norms``
are made of, and the NaN/±Inf counts of the weight tensor. Sums of squares accumulate in
float32, which BLAS-style SIMD does several times faster than float64 (relative error about
1e-6 on rows 16k wide, far inside every rule's tolerance); rows or columns whose float32 sum
could have overflowed or underflowed (outside 1e-30 … 1e30, or not finite) are summed again
in float64, so huge and tiny weights keep exact norms. A finite float64 sum of squares
proves its row finite, so the NaN/±Inf counts only look at rows whose sum is not (tensors
stored as float64, whose values may not fit float32, are counted as stored). Matrices up to
:data:`STREAM_BYTES` (float32) are assembled and kept in a bounded LRU cache for the rules
that need every weight; larger ones are only streamed, and are read whole again only if a
rule asks for the full matrix.

**Lifecycle.** The audit visits layers in order and calls :meth:`LayerStats.release` when a
layer's rules are done, which drops its matrices; small results (norm vectors, counts) stay
for the rest of the audit. Statistics made with ``retain=True`` (the comparison's) keep
matrices until the cache budget evicts them, so the comparison after the audit finds them.

**Threads.** Every method may be called from several threads at once: each quantity is
computed by one thread while the others wait for it, so results never depend on the number
of threads. Tensors whose loader does not declare thread-safe reads (no ``read_span``) are
read under one lock (:data:`.reading.READ_LOCK`), which gradient support takes too.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import TypeVar

import numpy as np

from steelyard.graph import Checkpoint, Layer, Tensor, TensorRole
from steelyard.stats.folding import Folded, fold_bias, fold_scale
from steelyard.stats.memo import MatrixCache, Memo
from steelyard.stats.nonfinite import Counts, NonfiniteCounts, NonfiniteScan, scan
from steelyard.stats.numerics import row_norms, sums_of_squares
from steelyard.stats.passes import Blocks, WeightPasses, low_rank_run
from steelyard.stats.reading import locked, read_float32, read_stored, stored_weight
from steelyard.stats.spread import NormSpread, norm_spread
from steelyard.stats.topology import Topology
from steelyard.streaming import CHUNK_BYTES

T = TypeVar("T")

#: Bytes of materialised matrices kept between rules; evicted ones are re-read when asked for.
MATRIX_CACHE_BYTES = 512 * 2**20
#: Float32 matrices above this size are streamed for their statistics and never cached.
STREAM_BYTES = 128 * 2**20
#: Stored tensors up to this many float32 bytes (vectors: biases, norm parameters) are kept
#: once read; larger ones are read on each request.
SMALL_TENSOR_BYTES = 2**20
#: Folded row norms below this are |a_j|·‖w_j‖; no folded weight of such a row can leave
#: float32 (its largest is 3.4e38), so the folded rows would measure the same.
_FOLDED_SAFE = 1e38


class LayerStats:
    """Cached per-layer statistics over one checkpoint (safe to share between threads)."""

    def __init__(
        self,
        checkpoint: Checkpoint,
        cache_bytes: int = MATRIX_CACHE_BYTES,
        stream_bytes: int = STREAM_BYTES,
        retain: bool = False,
    ) -> None:
        self.checkpoint = checkpoint
        self.retain = retain
        self._memo = Memo()
        self._topology = Topology(checkpoint)
        self._counts = NonfiniteCounts(self._memo)
        self._passes = WeightPasses(
            checkpoint,
            self._memo,
            MatrixCache(cache_bytes),
            self._counts,
            self._topology.read_by_producers,
            stream_bytes,
        )

    # ---- bookkeeping ----------------------------------------------------------------------
    def _memoized(self, layer: Layer, key: str, compute: Callable[[], T]) -> T:
        return self._memo.once((layer.name, key), compute)

    def shared(self, key: str, factory: Callable[[], T]) -> T:
        """A per-audit object a rule builds once and reuses for every layer (e.g. bounds)."""
        return self._memo.once(("shared", key), factory)

    def release(self, layer: Layer) -> None:
        """Drop the layer's materialised matrices; called when its rules are done (kept, up
        to the cache budget, when the statistics were made with ``retain=True``)."""
        if not self.retain:
            self._passes.cache.drop(lambda key: isinstance(key, tuple) and key[1] == layer.name)

    # ---- raw data -------------------------------------------------------------------------
    def matrix(self, layer: Layer) -> np.ndarray:
        """Canonical ``W[units, fan_in]`` as float32 (read once while it fits the cache)."""
        return self._passes.matrix(layer)

    def streamed(self, layer: Layer) -> Blocks | None:
        """For a layer too large to cache whose loader streams it (a large token table): a
        function that reads it again, one pass of float32 row blocks ``(first row, end row,
        block)`` per call, in one reused buffer (copy what you keep). None when
        :meth:`matrix` holds the layer or would assemble it anyway: use that instead. Rules
        that need every weight of such a layer read it this way, so that no rule holds a
        whole table in float32 (a 128,256 × 4,096 vocabulary would take 2.1 GB). A low-rank
        product (an adapter's ΔW, see :meth:`factors`) is streamed whatever its size."""
        return self._passes.streamed(layer)

    def factors(self, layer: Layer) -> tuple[np.ndarray, np.ndarray] | None:
        """``(left [units, r], right [r, fan_in])``, float64, when the layer's matrix is the
        low-rank product ``left @ right`` rounded to float32 (an adapter's update read on its
        own): a rule can then bound or compute from the factors what a pass over the
        product would cost units·fan_in for. None for every other layer."""
        return low_rank_run(self.checkpoint, layer)

    def picked(self, layer: Layer, index: np.ndarray) -> np.ndarray:
        """The rows at ``index`` (sorted, distinct) of ``W[units, fan_in]`` as contiguous
        float32; for a streamed layer read row by row when fewer than one row in eight is
        wanted, else gathered from one streamed pass (the same values either way)."""
        return self._passes.picked(layer, index)

    def rows(self, layer: Layer, start: int, step: int) -> np.ndarray:
        """Rows ``start``, ``start + step``, … of ``W[units, fan_in]`` as float32 rows, each
        contiguous: a read-only view of the matrix when it is in memory, else (a layer too
        large to cache) picked from row blocks as they stream past, so a row subsample of a
        large embedding costs its own memory only and the table is never assembled."""
        return self._passes.rows(layer, start, step)

    def sample(self, layer: Layer, size: int, seed: int) -> np.ndarray:
        """A seeded uniform sample of ``size`` of the layer's weights (all of them when it has
        no more), sorted, float64. The positions are ``default_rng(seed).integers(0,
        units·fan_in, size)``: drawn with replacement, so the values are i.i.d. draws from
        the layer's own weights; a layer too large to cache is streamed in row blocks for them
        instead of being assembled, so the result never depends on how it was read."""
        return self._passes.sample(layer, size, seed)

    def bias(self, layer: Layer) -> np.ndarray | None:
        """Bias as float32 ``[units]``."""
        source = self.checkpoint.tensors.get(layer.bias) if layer.bias else None
        return self._memoized(layer, "bias", lambda: locked(source, layer.bias_vector))

    def tensor(self, name: str) -> np.ndarray | None:
        """A stored tensor as float32, or None when absent (small ones read once)."""
        tensor = self.checkpoint.tensors.get(name)
        if tensor is None:
            return None
        if 4 * tensor.size > SMALL_TENSOR_BYTES:
            return read_float32(tensor)
        return self._memo.once(("tensor", name), lambda: _frozen(read_float32(tensor)))

    def stored_weight(self, layer: Layer) -> np.ndarray | None:
        """See :func:`steelyard.stats.reading.stored_weight`."""
        return stored_weight(self.checkpoint.tensors.get(layer.weight), layer)

    # ---- tensor health --------------------------------------------------------------------
    def nonfinite(self, tensor: Tensor) -> Counts:
        """NaN, +Inf and −Inf counts of a tensor (bf16/fp16/fp8 judged after widening to
        float32, wider floats as stored; integer tensors after conversion)."""
        return self._counts.count(tensor)

    def nonfinite_scan(self, tensor: Tensor) -> NonfiniteScan | None:
        """Positions and counts of a tensor's non-finite values (None when it has none); the
        tensor is read for them only when its counts say it holds some."""
        if not any(self.nonfinite(tensor)):
            return None
        return scan(tensor)

    def scan_targets(self) -> list[Tensor]:
        """Every floating tensor an audit reads: parameters and stored optimizer moments."""
        out = [t for t in self.checkpoint.tensors.values() if t.role is TensorRole.PARAMETER]
        state = self.checkpoint.optimizer
        if state is not None:
            for slots in state.slots.values():
                out += [s for s in (slots.first_moment, slots.second_moment) if s is not None]
        return out

    # ---- norms ----------------------------------------------------------------------------
    def row_norms(self, layer: Layer) -> np.ndarray:
        """L2 norm of each unit's incoming weight vector (float64 accumulation)."""
        return self._memoized(
            layer, "rows", lambda: np.sqrt(self._passes.summary(layer).row_squares)
        )

    def spread(self, layer: Layer) -> NormSpread:
        """The summary of the units' norms every report row carries (see :func:`.spread.norm_spread`)."""
        return self._memoized(layer, "spread", lambda: norm_spread(self.row_norms(layer)))

    def fold_scale(self, layer: Layer) -> np.ndarray | None:
        """a_j = γ_j/sqrt(var_j+ε) of the batch norm folded into ``layer`` (float32), or None
        (see :func:`.folding.fold_scale`)."""
        return fold_scale(layer, self.tensor)

    def fold_parts(self, layer: Layer) -> tuple[np.ndarray | None, np.ndarray, bool]:
        """(a_j, folded bias, folded?) without the folded weights: a rule that can use the
        raw matrix with per-row factors a_j (float32; None when nothing is folded) saves the
        folded copy. ``a_j·W[j]`` in float32 is :meth:`folded`'s row j bit for bit."""
        if not self._foldable(layer):
            bias = self.bias(layer)
            return None, np.zeros(layer.units, np.float32) if bias is None else bias, False
        scale = self.fold_scale(layer)
        bias = self._memoized(layer, "folded-bias", lambda: self._fold_bias(layer))
        return scale, bias, True

    def folded(self, layer: Layer) -> Folded:
        """Weights with a following inference-form batch norm folded in (else raw)."""
        scale, bias, folded = self.fold_parts(layer)
        if scale is None or not folded:
            return Folded(self.matrix(layer), bias, False)
        key = ("folded", layer.name)
        cache = self._passes.cache
        matrix = cache.get(key)
        if matrix is None:
            with self._memo.lock_for((layer.name, "fold")):
                matrix = cache.get(key)
                if matrix is None:
                    # Folded weights beyond float32 become ±Inf (Inf·0 NaN), as the folded
                    # layer would compute them; the rules treat such rows as non-finite.
                    with np.errstate(over="ignore", invalid="ignore"):
                        matrix = np.multiply(self.matrix(layer), scale[:, None], dtype=np.float32)
                    cache.put(key, matrix)
        return Folded(matrix, bias, True)

    def folded_row_norms(self, layer: Layer) -> np.ndarray:
        """Row L2 norms of :meth:`folded` (the raw row norms when nothing is folded)."""
        if not self._foldable(layer):
            return self.row_norms(layer)
        return self._memoized(layer, "folded-rows", lambda: self._folded_norms(layer))

    def _folded_norms(self, layer: Layer) -> np.ndarray:
        # ‖a_j·w_j‖ = |a_j|·‖w_j‖, from the one pass's sums: no folded copy is made for a
        # rule that needs only the norms (the folded float32 rows differ from a_j·w_j by one
        # rounding per weight, ~6e-8 of the norm). Where a folded weight could leave float32
        # (or a norm is not finite), the folded rows themselves are measured.
        scale = self.fold_scale(layer)
        assert scale is not None
        norms = np.abs(scale.astype(np.float64)) * self.row_norms(layer)
        if np.isfinite(norms).all() and float(norms.max(initial=0.0)) < _FOLDED_SAFE:
            return norms
        return row_norms(self.folded(layer).matrix)

    def _foldable(self, layer: Layer) -> bool:
        if layer.norm is None or layer.norm.var is None:
            return False
        return self._memoized(layer, "foldable", lambda: self.fold_scale(layer) is not None)

    def _fold_bias(self, layer: Layer) -> np.ndarray:
        scale = self.fold_scale(layer)
        assert scale is not None
        return fold_bias(layer, scale, self.bias(layer), self.tensor)

    def norm_scale(self, layer: Layer) -> np.ndarray | None:
        """γ of the normalisation over this layer's units, if any."""
        if layer.norm is None or layer.norm.scale is None:
            return None
        gamma = self.tensor(layer.norm.scale)
        return gamma if gamma is not None and gamma.shape == (layer.units,) else None

    # ---- graph ----------------------------------------------------------------------------
    def consumers(self, layer: Layer) -> list[Layer]:
        """Layers that take this layer's units as inputs."""
        return self._topology.consumers(layer)

    def producers(self, layer: Layer) -> list[Layer]:
        """Layers whose units this layer takes as inputs (known ones only)."""
        return self._topology.producers(layer)

    def inputs_non_negative(self, layer: Layer) -> bool:
        """Every input is known to be >= 0 (all producers end in a non-negative activation)."""
        return self._topology.inputs_non_negative(layer)

    def consumer_block(self, producer: Layer, consumer: Layer) -> np.ndarray | None:
        """What ``consumer`` does with each of ``producer``'s units: ``[producer.units, k]``.

        Row j holds every weight of the consumer that reads unit j (over its own units and
        kernel positions). None when the channel mapping between the two is not known.
        """
        return self._topology.consumer_block(producer, consumer, self.matrix)

    def consumer_block_width(self, producer: Layer, consumer: Layer) -> int | None:
        """Columns of :meth:`consumer_block` (weights per producer unit), without reading."""
        return self._topology.consumer_block_width(producer, consumer)

    def column_norms(self, producer: Layer, consumer: Layer) -> np.ndarray | None:
        """L2 norm of the consumer weights that read each producer unit.

        Computed from the consumer's per-column sums of squares (kept from its one pass),
        so asking for them never materialises the consumer's matrix.
        """
        return self._memoized(
            consumer, f"columns:{producer.name}", lambda: self._columns(producer, consumer)
        )

    def _columns(self, producer: Layer, consumer: Layer) -> np.ndarray | None:
        if self._topology.channel_map(producer, consumer) is None:
            return None  # decided without reading the consumer
        squares = self._passes.summary(consumer).column_squares
        assert squares is not None, "a consumer's pass keeps its column sums"
        return self._topology.column_norms(producer, consumer, squares)


def _frozen(array: np.ndarray) -> np.ndarray:
    """``array`` made read-only: a kept result is shared by every rule that asks for it."""
    array.setflags(write=False)
    return array


__all__ = [
    "CHUNK_BYTES",
    "MATRIX_CACHE_BYTES",
    "STREAM_BYTES",
    "Counts",
    "Folded",
    "LayerStats",
    "NonfiniteScan",
    "fold_scale",
    "locked",
    "read_float32",
    "read_stored",
    "sums_of_squares",
]
