"""Per-audit results of a rule's per-layer hook, kept until its finishing step.

A rule whose verdict on one layer depends on every layer (a correction for the number of
layers tested, a comparison with the model's median) records each layer's result from
whichever worker thread ran it, then reads them back in the checkpoint's layer order, so
that the verdict never depends on ``--jobs``.
"""

from __future__ import annotations

import threading
from collections.abc import Iterable
from typing import Generic, TypeVar

from steelyard.graph import Layer

T = TypeVar("T")


class LayerResults(Generic[T]):
    """One result per layer name, written from any thread."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._by_layer: dict[str, T] = {}

    def put(self, layer: Layer, value: T) -> None:
        """Keep ``value`` as ``layer``'s result."""
        with self._lock:
            self._by_layer[layer.name] = value

    def in_order(self, layers: Iterable[Layer]) -> list[tuple[Layer, T]]:
        """(layer, result) for every layer of ``layers`` that has one, in that order."""
        with self._lock:
            return [(x, self._by_layer[x.name]) for x in layers if x.name in self._by_layer]
