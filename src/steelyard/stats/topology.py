"""Which layer reads which: producers, consumers and how a consumer's input columns map onto
a producer's units (concatenation, residual sums, a dense layer after a flattening)."""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from steelyard.graph import Checkpoint, Layer, LayerKind
from steelyard.tiled_copy import contiguous


@dataclass(frozen=True, slots=True)
class ChannelMap:
    """Which consumer weights read which producer unit (see :meth:`Topology.consumer_block`)."""

    spatial: int
    """0: unit u is consumer input channel ``offset + u``; else a dense consumer after a
    flattening, reading ``spatial`` positions per unit."""
    offset: int = 0
    channels_last: bool = False


class Topology:
    """The links of one checkpoint's layers, and the column layout they imply."""

    def __init__(self, checkpoint: Checkpoint) -> None:
        self._by_name = {layer.name: layer for layer in checkpoint.layers}
        self._consumers = checkpoint.consumers()
        #: Layers some producer reads column norms from (their pass keeps column sums).
        self.read_by_producers = frozenset(
            c.name for group in self._consumers.values() for c in group
        )

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

    def channel_map(self, producer: Layer, consumer: Layer) -> ChannelMap | None:
        """How the consumer's inputs map onto the producer's units, when that is known."""
        sources = self.producers(consumer)
        if producer not in sources or consumer.kind is LayerKind.EMBEDDING or not producer.units:
            return None
        total = sum(p.units for p in sources)
        channels_in = consumer.in_per_group * consumer.groups
        if channels_in == total:
            return ChannelMap(0, sum(p.units for p in sources[: sources.index(producer)]))
        if all(p.units == channels_in for p in sources):
            # residual add or gated product: every producer feeds every column
            return ChannelMap(0)
        if (
            consumer.kind is LayerKind.DENSE
            and len(sources) == 1
            and consumer.fan_in % producer.units == 0
        ):
            spatial = consumer.fan_in // producer.units
            return ChannelMap(spatial, 0, consumer.channels_last_inputs)
        return None

    def consumer_block(
        self, producer: Layer, consumer: Layer, matrix: Callable[[Layer], np.ndarray]
    ) -> np.ndarray | None:
        """Every weight of ``consumer`` that reads each of ``producer``'s units, as
        ``[producer.units, k]`` (``matrix`` gives the consumer's canonical matrix)."""
        mapping = self.channel_map(producer, consumer)
        if mapping is None:
            return None
        flat = matrix(consumer)
        if mapping.spatial:
            spatial = mapping.spatial
            if mapping.channels_last:
                cube = flat.reshape(consumer.units, spatial, producer.units).transpose(2, 0, 1)
            else:
                cube = flat.reshape(consumer.units, producer.units, spatial).transpose(1, 0, 2)
            return contiguous(cube, np.float32).reshape(producer.units, -1)
        groups = max(1, consumer.groups)
        out_per_group = consumer.units // groups
        kernel = math.prod(consumer.kernel)
        weights = flat[: groups * out_per_group].reshape(
            groups, out_per_group, consumer.in_per_group, kernel
        )
        if groups == 1:
            stop = mapping.offset + producer.units
            if stop > consumer.in_per_group:
                return None
            # A slice's transpose, copied in cache-sized slabs: a fancy-index gather of the
            # same weights took 25 ms for a 1024 × 4096 consumer, this 3-5.
            cube = weights[0, :, mapping.offset : stop, :].transpose(1, 0, 2)
            return contiguous(cube, np.float32).reshape(producer.units, -1)
        channels = mapping.offset + np.arange(producer.units)
        group, column = np.divmod(channels, consumer.in_per_group)
        if np.any(group >= groups):
            return None
        block = weights[group, :, column, :]  # [producer.units, out_per_group, kernel]
        return np.ascontiguousarray(block.reshape(producer.units, -1), dtype=np.float32)

    def consumer_block_width(self, producer: Layer, consumer: Layer) -> int | None:
        """Columns of :meth:`consumer_block` (weights per producer unit), without reading."""
        mapping = self.channel_map(producer, consumer)
        if mapping is None:
            return None
        if mapping.spatial:
            return consumer.units * mapping.spatial
        if mapping.offset + producer.units > consumer.in_per_group * max(1, consumer.groups):
            return None
        return (consumer.units // max(1, consumer.groups)) * math.prod(consumer.kernel)

    def column_norms(
        self, producer: Layer, consumer: Layer, squares: np.ndarray
    ) -> np.ndarray | None:
        """L2 norm of the consumer weights that read each producer unit, from the consumer's
        per-group column sums of squares ``[groups, fan_in]`` (kept from its one pass)."""
        mapping = self.channel_map(producer, consumer)
        if mapping is None:
            return None
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
