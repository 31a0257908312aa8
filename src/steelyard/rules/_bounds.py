"""Interval bound propagation (Gowal et al. 2018, "On the effectiveness of interval bound
propagation for training verifiably robust models") over the layer graph.

Given a box [lo, hi] for every model input, each layer's pre-activation bounds follow from
W⁺·hi + W⁻·lo + b (upper) and W⁺·lo + W⁻·hi + b (lower), with W⁺ = max(W, 0) and
W⁻ = min(W, 0); monotone activations map bounds to bounds. Where the graph does not say
exactly how inputs combine, the bounds are unknown (None) rather than guessed.
"""

from __future__ import annotations

import math
import threading

import numpy as np

from steelyard.graph import Activation, Layer, LayerKind
from steelyard.stats import LayerStats

Bounds = tuple[np.ndarray, np.ndarray]


def _activate(activation: Activation, lo: np.ndarray, hi: np.ndarray) -> Bounds | None:
    if activation is Activation.RELU:
        return np.maximum(lo, 0), np.maximum(hi, 0)
    if activation is Activation.IDENTITY:
        return lo, hi
    if activation is Activation.SIGMOID:
        return 1 / (1 + np.exp(-lo)), 1 / (1 + np.exp(-hi))
    if activation is Activation.TANH:
        return np.tanh(lo), np.tanh(hi)
    if activation is Activation.HARD_SIGMOID:
        return np.clip(0.2 * lo + 0.5, 0, 1), np.clip(0.2 * hi + 0.5, 0, 1)
    if activation is Activation.LEAKY_RELU:
        # For any slope in [0, 1): f(x) >= x, and f(x) <= max(x, 0).
        return lo, np.maximum(hi, 0)
    return None


class IntervalBounds:
    """Pre-activation bounds per layer from a declared input box, computed on demand."""

    def __init__(self, stats: LayerStats, input_range: tuple[float, float]) -> None:
        self.stats = stats
        self.lo, self.hi = float(input_range[0]), float(input_range[1])
        self._pre: dict[str, Bounds | None] = {}
        self._lock = threading.RLock()
        layers = stats.checkpoint.layers
        self._sources = {layer.name for layer in layers if layer.from_input}
        first = layers[0] if layers else None
        if (
            not self._sources
            and first is not None
            and not first.inputs_from
            and first.kind
            in (
                LayerKind.DENSE,
                LayerKind.CONV,
            )
        ):
            # Without graph inputs marked, only the first layer is safely fed by the inputs.
            self._sources.add(first.name)

    def pre_activation(self, layer: Layer, depth: int = 0) -> Bounds | None:
        """Lower and upper pre-activation bounds of each unit, or None when unknown."""
        # One lock for the whole recursion: another thread must never see the cycle guard's
        # None as a result, or the outcome would depend on scheduling.
        with self._lock:
            if layer.name not in self._pre:
                self._pre[layer.name] = None  # cycle guard
                self._pre[layer.name] = self._compute(layer, depth)
            return self._pre[layer.name]

    def _inputs(self, layer: Layer, depth: int) -> Bounds | None:
        channels = layer.in_per_group * layer.groups
        if layer.name in self._sources and not layer.inputs_from:
            return np.full(channels, self.lo), np.full(channels, self.hi)
        producers = self.stats.producers(layer)
        if not producers or len(producers) != len(layer.inputs_from) or depth > 500:
            return None
        parts: list[Bounds] = []
        for producer in producers:
            pre = self.pre_activation(producer, depth + 1)
            if pre is None or (
                producer.norm is not None and not self.stats.folded(producer).folded
            ):
                return None
            post = _activate(producer.activation, *pre)
            if post is None:
                return None
            parts.append(post)
        total = sum(p.units for p in producers)
        if total == channels:
            return np.concatenate([p[0] for p in parts]), np.concatenate([p[1] for p in parts])
        if len(producers) == 1 and layer.kind is LayerKind.DENSE and layer.fan_in % total == 0:
            spatial = layer.fan_in // total
            lo, hi = parts[0]
            if layer.channels_last_inputs:
                return np.tile(lo, spatial), np.tile(hi, spatial)
            return np.repeat(lo, spatial), np.repeat(hi, spatial)
        return None

    def _compute(self, layer: Layer, depth: int) -> Bounds | None:
        if layer.groups != 1 or layer.kind not in (LayerKind.DENSE, LayerKind.CONV):
            return None
        inputs = self._inputs(layer, depth)
        if inputs is None:
            return None
        lo, hi = inputs
        folded = self.stats.folded(layer)
        weights = folded.matrix.reshape(layer.units, layer.in_per_group, -1).astype(np.float64)
        if lo.size == layer.fan_in and weights.shape[1] != lo.size:
            weights = weights.reshape(layer.units, layer.fan_in, 1)
        positive = np.maximum(weights, 0).sum(axis=2)
        negative = np.minimum(weights, 0).sum(axis=2)
        if positive.shape[1] != lo.size:
            return None
        bias = folded.bias.astype(np.float64)
        upper = positive @ hi + negative @ lo + bias
        lower = positive @ lo + negative @ hi + bias
        if not (np.all(np.isfinite(upper)) and np.all(np.isfinite(lower))):
            return None
        return lower, upper


def finite_range(value: object) -> tuple[float, float] | None:
    """A validated (lo, hi) pair, or None."""
    if not isinstance(value, (list, tuple)) or len(value) != 2:
        return None
    lo, hi = float(value[0]), float(value[1])
    if not (math.isfinite(lo) and math.isfinite(hi)) or lo > hi:
        return None
    return lo, hi
