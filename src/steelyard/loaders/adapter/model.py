"""What an adapter checkpoint carries besides the common graph: its adapted modules, their
factors and configuration, and (with ``--base``) the base layers they were merged onto."""

from __future__ import annotations

import threading
from collections import OrderedDict
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field

from steelyard.graph import Checkpoint, Layer, LayerKind
from steelyard.loaders.adapter.config import AdapterConfig
from steelyard.loaders.adapter.factors import Factors

#: Bytes of float32 factors kept between reads (a layer's pass reads its factors once per
#: row block; factors are small, but an adapter may have thousands of them).
FACTOR_CACHE_BYTES = 256 * 2**20


@dataclass(frozen=True)
class AdaptedModule:
    """One adapted module: ΔW = scale·B·A in the layer's canonical orientation."""

    name: str
    """Module path with peft's ``base_model.model.`` prefix removed (the layer's name)."""
    kind: LayerKind
    canonical: tuple[int, ...]
    """``(units, in_per_group, *kernel)`` of ΔW."""
    rank: int
    scale: float
    a: str
    """Stored name of ``lora_A`` (``lora_embedding_A``)."""
    b: str
    """Stored name of ``lora_B`` (``lora_embedding_B``)."""
    magnitude: str | None
    """Stored name of DoRA's ``lora_magnitude_vector``, if any."""
    factors: Callable[[], Factors] = field(repr=False, compare=False)
    """The canonical factors (scale folded in), read on demand and cached."""
    base_layer: Layer | None = field(default=None, repr=False, compare=False)
    """With a base: the base layer this update was merged onto, renamed ``<name> (base)``
    so its statistics never mix with the merged layer's."""

    @property
    def units(self) -> int:
        """Rows of ΔW."""
        return self.canonical[0]


@dataclass(frozen=True)
class AdapterInfo:
    """The adapter as a whole: its config, its modules, and how they meet the config."""

    config: AdapterConfig
    modules: Mapping[str, AdaptedModule]
    """Layer name → adapted module."""
    base: str | None = None
    """Path of the base checkpoint the updates were merged onto (``--base``)."""
    extra: tuple[str, ...] = ()
    """Stored tensors that are not LoRA factors (``modules_to_save`` copies, LoRA biases)."""


@dataclass(frozen=True)
class AdapterCheckpoint(Checkpoint):
    """A :class:`~steelyard.graph.Checkpoint` read from an adapter (alone or merged onto a
    base); ``adapter`` is what the ``adapter-update`` rule reads."""

    adapter: AdapterInfo | None = None


def adapter_of(checkpoint: Checkpoint) -> AdapterInfo | None:
    """The adapter information of ``checkpoint``, or None when it is not an adapter."""
    return checkpoint.adapter if isinstance(checkpoint, AdapterCheckpoint) else None


class FactorCache:
    """Byte-bounded, thread-safe LRU of factors: each is computed once while it fits."""

    def __init__(self, limit: int = FACTOR_CACHE_BYTES) -> None:
        self._limit = limit
        self._bytes = 0
        self._items: OrderedDict[str, Factors] = OrderedDict()
        self._lock = threading.Lock()
        self._key_locks: dict[str, threading.Lock] = {}

    def get(self, key: str, compute: Callable[[], Factors]) -> Factors:
        """The cached factors of ``key``, computed (by one thread) when absent."""
        with self._lock:
            found = self._items.get(key)
            if found is not None:
                self._items.move_to_end(key)
                return found
            key_lock = self._key_locks.setdefault(key, threading.Lock())
        with key_lock:
            with self._lock:
                found = self._items.get(key)
            if found is not None:
                return found
            value = compute()
            with self._lock:
                if value.nbytes <= self._limit:
                    self._items[key] = value
                    self._bytes += value.nbytes
                    while self._bytes > self._limit and self._items:
                        _, dropped = self._items.popitem(last=False)
                        self._bytes -= dropped.nbytes
            return value
