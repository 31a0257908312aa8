"""Per-layer quantities that several rules need, computed once per audit and cached.

Rules never read each other's output, but they do share the *inputs*: the canonical matrix,
its row norms, the batch-norm-folded weights, consumer column blocks. Reading and converting
a tensor is the expensive part of an audit, so it happens here, once.

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
for the rest of the audit.

**Threads.** Every method may be called from several threads at once: each quantity is
computed by one thread while the others wait for it, so results never depend on the number
of threads. Tensors whose loader does not declare thread-safe reads (no ``read_span``) are
read under one lock.
"""

from __future__ import annotations

import math
import threading
from collections import OrderedDict
from collections.abc import Callable, Hashable, Iterator
from dataclasses import dataclass
from typing import TypeVar

import numpy as np

from steelyard.graph import Checkpoint, Layer, LayerKind, NormKind, RowSlice, Tensor, TensorRole
from steelyard.streaming import CHUNK_BYTES, chunks, convert_into, row_blocks

T = TypeVar("T")

#: Bytes of materialised matrices kept between rules; evicted ones are re-read when asked for.
MATRIX_CACHE_BYTES = 512 * 2**20
#: Float32 matrices above this size are streamed for their statistics and never cached.
STREAM_BYTES = 128 * 2**20

#: NaN, +Inf and −Inf counts of one tensor.
Counts = tuple[int, int, int]


@dataclass(frozen=True, slots=True)
class Folded:
    """A layer's weights with an inference-form batch norm folded in."""

    matrix: np.ndarray
    """``W'[units, fan_in]`` = W·γ/sqrt(var+ε)."""
    bias: np.ndarray
    """``b'`` = (b−μ)·γ/sqrt(var+ε) + β."""
    folded: bool
    """False when no batch norm follows (then these are the raw weights)."""


@dataclass(frozen=True, slots=True)
class _Summary:
    """What one pass over a layer's weights leaves behind."""

    row_squares: np.ndarray
    """Σ_k W[j, k]² per unit, float64."""
    column_squares: np.ndarray | None
    """Σ_j W[j, k]² per group and fan-in position ``[groups, fan_in]``, float64; only for
    layers some producer reads column norms from."""


@dataclass(frozen=True, slots=True)
class _ChannelMap:
    """Which consumer weights read which producer unit (see :meth:`LayerStats.consumer_block`)."""

    spatial: int
    """0: unit u is consumer input channel ``offset + u``; else a dense consumer after a
    flattening, reading ``spatial`` positions per unit."""
    offset: int = 0
    channels_last: bool = False


class _MatrixCache:
    """LRU cache of large arrays bounded by their total bytes."""

    def __init__(self, budget: int) -> None:
        self.budget = budget
        self._items: OrderedDict[Hashable, np.ndarray] = OrderedDict()
        self._bytes = 0
        self._lock = threading.Lock()

    def get(self, key: Hashable) -> np.ndarray | None:
        with self._lock:
            found = self._items.get(key)
            if found is not None:
                self._items.move_to_end(key)
            return found

    def put(self, key: Hashable, array: np.ndarray) -> None:
        if array.nbytes > self.budget:
            return
        with self._lock:
            if key in self._items:
                return
            self._items[key] = array
            self._bytes += array.nbytes
            while self._bytes > self.budget and len(self._items) > 1:
                _, evicted = self._items.popitem(last=False)
                self._bytes -= evicted.nbytes

    def drop(self, predicate: Callable[[Hashable], bool]) -> None:
        with self._lock:
            for key in [k for k in self._items if predicate(k)]:
                self._bytes -= self._items.pop(key).nbytes


class LayerStats:
    """Cached per-layer statistics over one checkpoint (safe to share between threads)."""

    def __init__(
        self,
        checkpoint: Checkpoint,
        cache_bytes: int = MATRIX_CACHE_BYTES,
        stream_bytes: int = STREAM_BYTES,
    ) -> None:
        self.checkpoint = checkpoint
        self._by_name = {layer.name: layer for layer in checkpoint.layers}
        self._consumers = checkpoint.consumers()
        self._read_by_producers = {c.name for group in self._consumers.values() for c in group}
        self._cache = _MatrixCache(cache_bytes)
        self._stream_bytes = stream_bytes
        self._small: dict[Hashable, object] = {}
        self._counts: dict[int, tuple[Tensor, Counts]] = {}
        self._guard = threading.Lock()
        self._locks: dict[Hashable, threading.Lock] = {}
        self._read_lock = threading.Lock()

    # ---- bookkeeping ----------------------------------------------------------------------
    def _lock_for(self, key: Hashable) -> threading.Lock:
        with self._guard:
            lock = self._locks.get(key)
            if lock is None:
                lock = self._locks[key] = threading.Lock()
            return lock

    def _once(self, key: Hashable, compute: Callable[[], T]) -> T:
        """``compute()`` run by exactly one thread, its result kept for the audit."""
        try:
            return self._small[key]  # type: ignore[return-value]
        except KeyError:
            pass
        with self._lock_for(key):
            if key not in self._small:
                self._small[key] = compute()
            return self._small[key]  # type: ignore[return-value]

    def _memo(self, layer: Layer, key: str, compute: Callable[[], T]) -> T:
        return self._once((layer.name, key), compute)

    def shared(self, key: str, factory: Callable[[], T]) -> T:
        """A per-audit object a rule builds once and reuses for every layer (e.g. bounds)."""
        return self._once(("shared", key), factory)

    def release(self, layer: Layer) -> None:
        """Drop the layer's materialised matrices; called when its rules are done."""
        self._cache.drop(lambda key: isinstance(key, tuple) and key[1] == layer.name)

    # ---- raw data -------------------------------------------------------------------------
    def _streamable(self, layer: Layer) -> tuple[Tensor, int] | None:
        """(weight tensor, first stored row) when the canonical matrix is a run of its rows."""
        tensor = self.checkpoint.tensors.get(layer.weight)
        orient = layer.orient
        if tensor is None or tensor.read_span is None or not isinstance(orient, RowSlice):
            return None
        if not tensor.shape or tensor.dtype not in _FLOAT_NAMES:
            return None
        stop = tensor.shape[0] if orient.stop is None else min(orient.stop, tensor.shape[0])
        row = math.prod(tensor.shape[1:])
        if stop - orient.start != layer.units or row != layer.fan_in:
            return None
        return tensor, orient.start

    def _pass(self, layer: Layer, keep: bool) -> np.ndarray | None:
        """Read the layer's weights once and store their summary (and the weight tensor's
        counts); returns the matrix when it was assembled (always when ``keep``)."""
        units, fan_in = layer.units, layer.fan_in
        rows = np.zeros(units, dtype=np.float64)
        groups = max(1, layer.groups)
        columns = (
            np.zeros((groups, fan_in), dtype=np.float64)
            if layer.name in self._read_by_producers
            else None
        )
        per_group = max(1, units // groups)
        source = self._streamable(layer)
        tensor: Tensor | None = None
        counts = [0, 0, 0]
        full: np.ndarray | None
        iterator: Iterator[tuple[int, int, np.ndarray]]
        if source is None:
            with self._read_lock:
                whole = np.ascontiguousarray(layer.matrix(), dtype=np.float32)
            full = whole
            iterator = iter([(a, b, whole[a:b]) for a, b in row_blocks(units, fan_in)])
        else:
            stored, first = source
            covers = first == 0 and units == stored.shape[0]
            tensor = stored if covers else None  # counts only for whole tensors
            full = np.empty((units, fan_in), dtype=np.float32) if keep else None
            scratch = None if keep else np.empty(0, dtype=np.float32)
            stored_wide = _ITEMSIZE[stored.dtype] > 4
            iterator = self._stream_rows(
                source, units, fan_in, full, scratch, counts if covers and stored_wide else None
            )
        # float32 blocks of float32-or-narrower tensors are counted from their row sums.
        by_rows = tensor is not None and _ITEMSIZE[tensor.dtype] <= 4
        for a, b, block in iterator:
            squares = sums_of_squares(block, axis=1)
            rows[a:b] = squares
            if by_rows:
                bad = ~np.isfinite(squares)
                if bad.any():
                    _count_into(block[bad], counts)
            if columns is not None:
                for group in range(a // per_group, min(groups, (b - 1) // per_group + 1)):
                    lo, hi = max(a, group * per_group), min(b, (group + 1) * per_group)
                    columns[group] += sums_of_squares(block[lo - a : hi - a], axis=0)
        with self._guard:
            self._small[(layer.name, "summary")] = _Summary(rows, columns)
            if tensor is not None:
                self._counts[id(tensor)] = (tensor, (counts[0], counts[1], counts[2]))
        return full

    def _stream_rows(
        self,
        source: tuple[Tensor, int],
        units: int,
        fan_in: int,
        full: np.ndarray | None,
        scratch: np.ndarray | None,
        counts: list[int] | None,
    ) -> Iterator[tuple[int, int, np.ndarray]]:
        tensor, first = source
        assert tensor.read_span is not None
        for a, b in row_blocks(units, fan_in):
            stored = tensor.read_span((first + a) * fan_in, (first + b) * fan_in)
            if full is not None:
                block = full[a:b]
            else:
                assert scratch is not None
                if scratch.size < (b - a) * fan_in:
                    scratch = np.empty((b - a) * fan_in, dtype=np.float32)
                block = scratch[: (b - a) * fan_in].reshape(b - a, fan_in)
            convert_into(stored, block)
            if counts is not None:  # float64 storage: counted as stored
                _count_into(stored, counts)
            yield a, b, block

    def _summary(self, layer: Layer) -> _Summary:
        key = (layer.name, "summary")
        found = self._small.get(key)
        if found is None:
            with self._lock_for((layer.name, "load")):
                found = self._small.get(key)
                if found is None:
                    keep = 4 * layer.units * layer.fan_in <= self._stream_bytes
                    matrix = self._pass(layer, keep)
                    if matrix is not None:
                        self._cache.put(("matrix", layer.name), matrix)
                    found = self._small[key]
        assert isinstance(found, _Summary)
        return found

    def matrix(self, layer: Layer) -> np.ndarray:
        """Canonical ``W[units, fan_in]`` as float32 (read once while it fits the cache)."""
        key = ("matrix", layer.name)
        cached = self._cache.get(key)
        if cached is not None:
            return cached
        with self._lock_for((layer.name, "load")):
            cached = self._cache.get(key)
            if cached is not None:
                return cached
            if (layer.name, "summary") not in self._small:
                array = self._pass(layer, keep=True)
                assert array is not None
            else:
                array = self._read_matrix(layer)
            self._cache.put(key, array)
            return array

    def _read_matrix(self, layer: Layer) -> np.ndarray:
        source = self._streamable(layer)
        if source is None:
            with self._read_lock:
                return np.ascontiguousarray(layer.matrix(), dtype=np.float32)
        full = np.empty((layer.units, layer.fan_in), dtype=np.float32)
        for _a, _b, _block in self._stream_rows(
            source, layer.units, layer.fan_in, full, None, None
        ):
            pass
        return full

    def sample(self, layer: Layer, size: int, seed: int) -> np.ndarray:
        """A seeded uniform sample of ``size`` of the layer's weights (all of them when it has
        no more), sorted, float64. The positions are ``default_rng(seed).choice(units·fan_in,
        size, replace=False)``; a layer too large to cache is streamed in row blocks for them
        instead of being assembled, so the result never depends on how it was read."""
        units, fan_in = layer.units, layer.fan_in
        total = units * fan_in
        if total <= size:
            return np.sort(self.matrix(layer).reshape(-1).astype(np.float64))
        positions = np.sort(np.random.default_rng(seed).choice(total, size=size, replace=False))
        source = self._streamable(layer)
        cached = self._cache.get(("matrix", layer.name))
        if cached is not None or source is None or 4 * total <= self._stream_bytes:
            flat = self.matrix(layer).reshape(-1)
            return np.sort(flat[positions].astype(np.float64))
        picked = np.empty(size, dtype=np.float64)
        scratch = np.empty(0, dtype=np.float32)
        for a, b, block in self._stream_rows(source, units, fan_in, None, scratch, None):
            lo, hi = np.searchsorted(positions, (a * fan_in, b * fan_in))
            picked[lo:hi] = block.reshape(-1)[positions[lo:hi] - a * fan_in]
        return np.sort(picked)

    def bias(self, layer: Layer) -> np.ndarray | None:
        """Bias as float32 ``[units]``."""
        return self._memo(layer, "bias", lambda: self._locked(layer.bias, layer.bias_vector))

    def tensor(self, name: str) -> np.ndarray | None:
        """A stored tensor as float32, or None when absent."""
        tensor = self.checkpoint.tensors.get(name)
        if tensor is None:
            return None
        return self._locked(name, tensor.read_float32)

    def _locked(self, name: str | None, read: Callable[[], T]) -> T:
        """Run a read, under the read lock unless the tensor's loader reads thread-safely."""
        tensor = self.checkpoint.tensors.get(name) if name else None
        if tensor is not None and tensor.read_span is not None:
            return read()
        with self._read_lock:
            return read()

    # ---- tensor health --------------------------------------------------------------------
    def nonfinite(self, tensor: Tensor) -> Counts:
        """NaN, +Inf and −Inf counts of a tensor (bf16/fp16/fp8 judged after widening to
        float32, wider floats as stored; integer tensors after conversion)."""
        with self._guard:
            found = self._counts.get(id(tensor))
        if found is not None:
            return found[1]
        with self._lock_for(("counts", id(tensor))):
            with self._guard:
                found = self._counts.get(id(tensor))
            if found is not None:
                return found[1]
            counts = [0, 0, 0]
            if tensor.read_span is not None and tensor.size:
                wide = _ITEMSIZE.get(tensor.dtype, 4) >= 4 and tensor.dtype in _FLOAT_NAMES
                for start, stop in chunks(tensor.size):
                    stored = tensor.read_span(start, stop)
                    if wide:
                        _count_into(stored, counts)
                    else:
                        block = np.empty(stored.size, dtype=np.float32)
                        convert_into(stored, block)
                        _count_into(block, counts)
            elif tensor.size:
                with self._read_lock:
                    array = np.asarray(tensor.read())
                if array.dtype.kind not in ("f", "V"):
                    array = np.asarray(array, dtype=np.float32)
                if array.dtype.itemsize < 4:
                    array = np.asarray(array, dtype=np.float32)
                _count_into(array, counts)
            result = (counts[0], counts[1], counts[2])
            with self._guard:
                self._counts[id(tensor)] = (tensor, result)
            return result

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
        return self._memo(layer, "rows", lambda: np.sqrt(self._summary(layer).row_squares))

    def folded(self, layer: Layer) -> Folded:
        """Weights with a following inference-form batch norm folded in (else raw)."""
        if not self._foldable(layer):
            bias = self.bias(layer)
            base = np.zeros(layer.units, np.float32) if bias is None else bias
            return Folded(self.matrix(layer), base, False)
        bias = self._memo(layer, "folded-bias", lambda: self._fold_bias(layer))
        key = ("folded", layer.name)
        matrix = self._cache.get(key)
        if matrix is None:
            with self._lock_for((layer.name, "fold")):
                matrix = self._cache.get(key)
                if matrix is None:
                    scale = self._fold_scale(layer)
                    assert scale is not None
                    matrix = (self.matrix(layer) * scale[:, None]).astype(np.float32)
                    self._cache.put(key, matrix)
        return Folded(matrix, bias, True)

    def folded_row_norms(self, layer: Layer) -> np.ndarray:
        """Row L2 norms of :meth:`folded` (the raw row norms when nothing is folded)."""
        if not self._foldable(layer):
            return self.row_norms(layer)
        return self._memo(layer, "folded-rows", lambda: _row_norms(self.folded(layer).matrix))

    def _foldable(self, layer: Layer) -> bool:
        norm = layer.norm
        if norm is None or norm.kind is not NormKind.BATCH or norm.var is None:
            return False
        return self._memo(layer, "foldable", lambda: self._fold_scale(layer) is not None)

    def _fold_scale(self, layer: Layer) -> np.ndarray | None:
        """a_j = γ_j/sqrt(var_j+ε), or None when the running variance is unusable."""
        norm = layer.norm
        assert norm is not None and norm.var is not None
        var = self.tensor(norm.var)
        if var is None or var.shape != (layer.units,):
            return None
        gamma = self.tensor(norm.scale) if norm.scale else None
        return (np.ones(layer.units, np.float32) if gamma is None else gamma) / np.sqrt(
            np.maximum(var, 0) + norm.eps
        )

    def _fold_bias(self, layer: Layer) -> np.ndarray:
        """b' = (b − μ)·a + β."""
        norm = layer.norm
        assert norm is not None
        scale = self._fold_scale(layer)
        assert scale is not None
        bias = self.bias(layer)
        base_bias = np.zeros(layer.units, np.float32) if bias is None else bias
        mean = self.tensor(norm.mean) if norm.mean else None
        beta = self.tensor(norm.shift) if norm.shift else None
        shift = np.zeros(layer.units, np.float32) if beta is None else beta
        mu = np.zeros(layer.units, np.float32) if mean is None else mean
        return np.asarray(((base_bias - mu) * scale + shift).astype(np.float32))

    def norm_scale(self, layer: Layer) -> np.ndarray | None:
        """γ of the normalisation over this layer's units, if any."""
        if layer.norm is None or layer.norm.scale is None:
            return None
        gamma = self.tensor(layer.norm.scale)
        return gamma if gamma is not None and gamma.shape == (layer.units,) else None

    # ---- graph ----------------------------------------------------------------------------
    def consumers(self, layer: Layer) -> list[Layer]:
        """Layers that take this layer's units as inputs."""
        return self._consumers.get(layer.name, [])

    def producers(self, layer: Layer) -> list[Layer]:
        """Layers whose units this layer takes as inputs (known ones only)."""
        return [self._by_name[n] for n in layer.inputs_from if n in self._by_name]

    def inputs_non_negative(self, layer: Layer) -> bool:
        """Every input is known to be >= 0 (all producers end in a non-negative activation)."""
        producers = self.producers(layer)
        return (
            bool(producers)
            and len(producers) == len(layer.inputs_from)
            and all(p.activation.non_negative_output and p.norm is None for p in producers)
        )

    def _channel_map(self, producer: Layer, consumer: Layer) -> _ChannelMap | None:
        """How the consumer's inputs map onto the producer's units, when that is known."""
        sources = self.producers(consumer)
        if producer not in sources or consumer.kind is LayerKind.EMBEDDING or not producer.units:
            return None
        total = sum(p.units for p in sources)
        channels_in = consumer.in_per_group * consumer.groups
        if channels_in == total:
            return _ChannelMap(0, sum(p.units for p in sources[: sources.index(producer)]))
        if all(p.units == channels_in for p in sources):
            return _ChannelMap(
                0
            )  # residual add or gated product: every producer feeds every column
        if (
            consumer.kind is LayerKind.DENSE
            and len(sources) == 1
            and consumer.fan_in % producer.units == 0
        ):
            spatial = consumer.fan_in // producer.units
            return _ChannelMap(spatial, 0, consumer.channels_last_inputs)
        return None

    def consumer_block(self, producer: Layer, consumer: Layer) -> np.ndarray | None:
        """What ``consumer`` does with each of ``producer``'s units: ``[producer.units, k]``.

        Row j holds every weight of the consumer that reads unit j (over its own units and
        kernel positions). None when the channel mapping between the two is not known.
        """
        mapping = self._channel_map(producer, consumer)
        if mapping is None:
            return None
        flat = self.matrix(consumer)
        if mapping.spatial:
            spatial = mapping.spatial
            if mapping.channels_last:
                cube = flat.reshape(consumer.units, spatial, producer.units).transpose(2, 0, 1)
            else:
                cube = flat.reshape(consumer.units, producer.units, spatial).transpose(1, 0, 2)
            return np.ascontiguousarray(cube.reshape(producer.units, -1), dtype=np.float32)
        groups = max(1, consumer.groups)
        out_per_group = consumer.units // groups
        kernel = math.prod(consumer.kernel)
        weights = flat[: groups * out_per_group].reshape(
            groups, out_per_group, consumer.in_per_group, kernel
        )
        channels = mapping.offset + np.arange(producer.units)
        group, column = np.divmod(channels, consumer.in_per_group)
        if np.any(group >= groups):
            return None
        block = weights[group, :, column, :]  # [producer.units, out_per_group, kernel]
        return np.ascontiguousarray(block.reshape(producer.units, -1), dtype=np.float32)

    def consumer_block_width(self, producer: Layer, consumer: Layer) -> int | None:
        """Columns of :meth:`consumer_block` (weights per producer unit), without reading."""
        mapping = self._channel_map(producer, consumer)
        if mapping is None:
            return None
        if mapping.spatial:
            return consumer.units * mapping.spatial
        if mapping.offset + producer.units > consumer.in_per_group * max(1, consumer.groups):
            return None
        return (consumer.units // max(1, consumer.groups)) * math.prod(consumer.kernel)

    def column_norms(self, producer: Layer, consumer: Layer) -> np.ndarray | None:
        """L2 norm of the consumer weights that read each producer unit.

        Computed from the consumer's per-column sums of squares (kept from its one pass),
        so asking for them never materialises the consumer's matrix.
        """
        return self._memo(
            consumer, f"columns:{producer.name}", lambda: self._columns(producer, consumer)
        )

    def _columns(self, producer: Layer, consumer: Layer) -> np.ndarray | None:
        mapping = self._channel_map(producer, consumer)
        if mapping is None:
            return None
        squares = self._summary(consumer).column_squares
        assert squares is not None, "a consumer's pass keeps its column sums"
        if mapping.spatial:
            flat = squares[0]
            if mapping.channels_last:
                per_unit = flat.reshape(mapping.spatial, producer.units).sum(axis=0)
            else:
                per_unit = flat.reshape(producer.units, mapping.spatial).sum(axis=1)
            return np.sqrt(per_unit)
        groups = max(1, consumer.groups)
        per_channel = squares.reshape(groups, consumer.in_per_group, -1).sum(axis=2)
        channels = mapping.offset + np.arange(producer.units)
        group, column = np.divmod(channels, consumer.in_per_group)
        if np.any(group >= groups):
            return None
        return np.sqrt(per_channel[group, column])


_ITEMSIZE = {
    "f64": 8,
    "f32": 4,
    "f16": 2,
    "bf16": 2,
    "f8_e4m3": 1,
    "f8_e5m2": 1,
    "f8_e4m3fnuz": 1,
    "f8_e5m2fnuz": 1,
}
_FLOAT_NAMES = frozenset(_ITEMSIZE)


def _count_into(values: np.ndarray, counts: list[int]) -> None:
    """Add the NaN, +Inf and −Inf counts of ``values`` (one cheap pass when all finite)."""
    if values.size == 0 or bool(np.isfinite(values).all()):
        return
    counts[0] += int(np.isnan(values).sum())
    counts[1] += int(np.isposinf(values).sum())
    counts[2] += int(np.isneginf(values).sum())


def sums_of_squares(block: np.ndarray, axis: int) -> np.ndarray:
    """Σ x² of a float32 block along ``axis`` (1: per row, 0: per column), as float64.

    Accumulated in float32; entries whose float32 sum lies outside [1e-30, 1e30] (or is not
    finite) are summed again in float64, where float32 may have overflowed, underflowed or
    met a NaN/Inf (see the module docstring).
    """
    spec = "ij,ij->i" if axis == 1 else "ij,ij->j"
    rough = np.einsum(spec, block, block)
    out = rough.astype(np.float64)
    risky = np.flatnonzero(~((rough >= 1e-30) & (rough <= 1e30)))
    if risky.size:
        part = block[risky] if axis == 1 else block[:, risky]
        out[risky] = np.einsum(spec, part, part, dtype=np.float64)
    return out


def _row_norms(matrix: np.ndarray) -> np.ndarray:
    """Row L2 norms (see :func:`sums_of_squares`)."""
    return np.sqrt(sums_of_squares(np.asarray(matrix, dtype=np.float32), axis=1))


__all__ = ["CHUNK_BYTES", "Folded", "LayerStats"]
