"""Per-layer quantities that several rules need, computed once per audit and cached.

Rules never read each other's output, but they do share the *inputs*: the canonical matrix,
its row norms, the batch-norm-folded weights, consumer column blocks. Reading and converting
a tensor is the expensive part of an audit, so it happens here, once.
"""

from __future__ import annotations

from collections import OrderedDict
from collections.abc import Callable
from dataclasses import dataclass
from typing import TypeVar

import numpy as np

from steelyard.graph import Checkpoint, Layer, LayerKind, NormKind

T = TypeVar("T")

#: Bytes of materialised matrices kept between rules; smaller ones are re-read when evicted.
MATRIX_CACHE_BYTES = 768 * 2**20


@dataclass(frozen=True, slots=True)
class Folded:
    """A layer's weights with an inference-form batch norm folded in."""

    matrix: np.ndarray
    """``W'[units, fan_in]`` = W·γ/sqrt(var+ε)."""
    bias: np.ndarray
    """``b'`` = (b−μ)·γ/sqrt(var+ε) + β."""
    folded: bool
    """False when no batch norm follows (then these are the raw weights)."""


class LayerStats:
    """Cached per-layer statistics over one checkpoint."""

    def __init__(self, checkpoint: Checkpoint, cache_bytes: int = MATRIX_CACHE_BYTES) -> None:
        self.checkpoint = checkpoint
        self._by_name = {layer.name: layer for layer in checkpoint.layers}
        self._consumers = checkpoint.consumers()
        self._matrices: OrderedDict[str, np.ndarray] = OrderedDict()
        self._matrix_bytes = 0
        self._cache_bytes = cache_bytes
        self._small: dict[tuple[str, str], object] = {}

    # ---- raw data -------------------------------------------------------------------------
    def matrix(self, layer: Layer) -> np.ndarray:
        """Canonical ``W[units, fan_in]`` as float32 (read once while it fits the cache)."""
        cached = self._matrices.get(layer.name)
        if cached is not None:
            self._matrices.move_to_end(layer.name)
            return cached
        array = np.ascontiguousarray(layer.matrix(), dtype=np.float32)
        if array.nbytes <= self._cache_bytes:
            self._matrices[layer.name] = array
            self._matrix_bytes += array.nbytes
            while self._matrix_bytes > self._cache_bytes and len(self._matrices) > 1:
                _, evicted = self._matrices.popitem(last=False)
                self._matrix_bytes -= evicted.nbytes
        return array

    def _memo(self, layer: Layer, key: str, compute: Callable[[], T]) -> T:
        slot = (layer.name, key)
        if slot not in self._small:
            self._small[slot] = compute()
        return self._small[slot]  # type: ignore[return-value]

    def bias(self, layer: Layer) -> np.ndarray | None:
        """Bias as float32 ``[units]``."""
        return self._memo(layer, "bias", layer.bias_vector)

    def tensor(self, name: str) -> np.ndarray | None:
        """A stored tensor as float32, or None when absent."""
        tensor = self.checkpoint.tensors.get(name)
        return None if tensor is None else tensor.read_float32()

    # ---- norms ----------------------------------------------------------------------------
    def row_norms(self, layer: Layer) -> np.ndarray:
        """L2 norm of each unit's incoming weight vector (float64 accumulation)."""
        return self._memo(layer, "rows", lambda: _row_norms(self.matrix(layer)))

    def folded(self, layer: Layer) -> Folded:
        """Weights with a following inference-form batch norm folded in (else raw)."""
        return self._memo(layer, "folded", lambda: self._fold(layer))

    def _fold(self, layer: Layer) -> Folded:
        matrix = self.matrix(layer)
        bias = self.bias(layer)
        base_bias = np.zeros(layer.units, np.float32) if bias is None else bias
        norm = layer.norm
        if norm is None or norm.kind is not NormKind.BATCH or norm.var is None:
            return Folded(matrix, base_bias, False)
        var = self.tensor(norm.var)
        mean = self.tensor(norm.mean) if norm.mean else None
        gamma = self.tensor(norm.scale) if norm.scale else None
        beta = self.tensor(norm.shift) if norm.shift else None
        if var is None or var.shape != (layer.units,):
            return Folded(matrix, base_bias, False)
        scale = (np.ones(layer.units, np.float32) if gamma is None else gamma) / np.sqrt(
            np.maximum(var, 0) + norm.eps
        )
        shift = np.zeros(layer.units, np.float32) if beta is None else beta
        mu = np.zeros(layer.units, np.float32) if mean is None else mean
        folded_matrix = matrix * scale[:, None]
        folded_bias = (base_bias - mu) * scale + shift
        return Folded(folded_matrix.astype(np.float32), folded_bias.astype(np.float32), True)

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
        return bool(producers) and len(producers) == len(layer.inputs_from) and all(
            p.activation.non_negative_output and p.norm is None for p in producers
        )

    def consumer_block(self, producer: Layer, consumer: Layer) -> np.ndarray | None:
        """What ``consumer`` does with each of ``producer``'s units: ``[producer.units, k]``.

        Row j holds every weight of the consumer that reads unit j (over its own units and
        kernel positions). None when the channel mapping between the two is not known.
        """
        return self._memo(consumer, f"block:{producer.name}", lambda: self._block(producer, consumer))

    def _block(self, producer: Layer, consumer: Layer) -> np.ndarray | None:
        sources = self.producers(consumer)
        if producer not in sources or consumer.kind is LayerKind.EMBEDDING:
            return None
        total = sum(p.units for p in sources)
        channels_in = consumer.in_per_group * consumer.groups
        weights = consumer.weight_view()  # [out, in/g, *k]
        if channels_in == total:
            offset = sum(p.units for p in sources[: sources.index(producer)])
        elif all(p.units == channels_in for p in sources):
            offset = 0  # residual add or gated product: every producer feeds every column
        elif consumer.kind is LayerKind.DENSE and len(sources) == 1 and consumer.fan_in % producer.units == 0:
            spatial = consumer.fan_in // producer.units
            flat = weights.reshape(consumer.units, consumer.fan_in)
            if consumer.channels_last_inputs:
                cube = flat.reshape(consumer.units, spatial, producer.units).transpose(2, 0, 1)
            else:
                cube = flat.reshape(consumer.units, producer.units, spatial).transpose(1, 0, 2)
            return np.ascontiguousarray(cube.reshape(producer.units, -1), dtype=np.float32)
        else:
            return None
        rows = []
        out_per_group = consumer.units // consumer.groups
        for unit in range(producer.units):
            channel = offset + unit
            group, column = divmod(channel, consumer.in_per_group)
            block = weights[group * out_per_group : (group + 1) * out_per_group, column]
            rows.append(block.reshape(-1))
        width = max((r.size for r in rows), default=0)
        if any(r.size != width for r in rows):
            return None
        return np.stack(rows).astype(np.float32) if rows else None

    def column_norms(self, producer: Layer, consumer: Layer) -> np.ndarray | None:
        """L2 norm of the consumer weights that read each producer unit."""
        block = self.consumer_block(producer, consumer)
        if block is None:
            return None
        return _row_norms(block)


def _row_norms(matrix: np.ndarray) -> np.ndarray:
    """Row L2 norms with float64 accumulation (wide float32 rows lose digits otherwise)."""
    return np.sqrt(np.einsum("ij,ij->i", matrix, matrix, dtype=np.float64))
