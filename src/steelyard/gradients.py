"""Gradient support: how much gradient each weight received, from a sidecar or optimizer state.

Support is a per-weight gradient magnitude in the layer's canonical orientation. Sources, in
order of preference: a sidecar file given with ``--grads`` (same tensor names, any supported
format), or second moments of an adaptive optimizer stored in the checkpoint.
"""

from __future__ import annotations

from dataclasses import dataclass
from enum import Enum

import numpy as np

from steelyard.errors import SteelyardError
from steelyard.graph import Checkpoint, Layer


class GradsKind(str, Enum):
    """What a gradient sidecar holds per weight."""

    RMS = "rms"
    """Root mean square of the gradient over batches."""
    ABS = "abs"
    """Mean absolute gradient."""
    SQ = "sq"
    """Mean squared gradient."""
    FISHER = "fisher"
    """Diagonal empirical Fisher information (mean squared per-example gradient)."""


@dataclass(frozen=True)
class GradientSource:
    """Per-weight gradient support for the layers of one checkpoint."""

    description: str
    """For the report header, e.g. ``Adam second moments (step 1200) in the checkpoint``."""
    checkpoint: Checkpoint | None = None
    """A sidecar checkpoint whose tensors hold gradient statistics."""
    kind: GradsKind = GradsKind.RMS
    model: Checkpoint | None = None
    """The audited checkpoint, for optimizer-state support."""

    def support(self, layer: Layer) -> np.ndarray | None:
        """``|∂E/∂w|``-like magnitudes shaped ``[units, fan_in]``, or None when unknown."""
        if self.checkpoint is not None:
            twin = next(
                (
                    x
                    for x in self.checkpoint.layers
                    if x.weight == layer.weight and x.gate == layer.gate
                ),
                None,
            )
            if twin is not None and (twin.units, twin.fan_in) == (layer.units, layer.fan_in):
                raw = twin.matrix()
            elif layer.orient is not None and layer.weight in self.checkpoint.tensors:
                raw = np.asarray(layer.orient(self.checkpoint.tensors[layer.weight].read_float32()))
                if raw.size != layer.units * layer.fan_in:
                    return None
                raw = raw.reshape(layer.units, layer.fan_in)
            else:
                return None
            return _to_magnitude(np.abs(raw.astype(np.float64)), self.kind)
        if self.model is not None and self.model.optimizer is not None:
            return _from_optimizer(self.model, layer)
        return None


def _to_magnitude(raw: np.ndarray, kind: GradsKind) -> np.ndarray:
    if kind in (GradsKind.SQ, GradsKind.FISHER):
        return np.sqrt(raw)
    return raw


def _from_optimizer(model: Checkpoint, layer: Layer) -> np.ndarray | None:
    state = model.optimizer
    assert state is not None
    slots = state.slots.get(layer.weight)
    if slots is None or slots.second_moment is None or layer.orient is None:
        return None
    second = np.asarray(layer.orient(slots.second_moment.read_float32()), dtype=np.float64)
    if second.size != layer.units * layer.fan_in:
        return None
    second = np.maximum(second.reshape(layer.units, layer.fan_in), 0.0)
    if state.step and state.beta2 and 0 < state.beta2 < 1:
        # Adam's bias correction: v̂ = v / (1 − β₂^t) (Kingma & Ba 2015, Algorithm 1).
        second = second / (1.0 - state.beta2**state.step)
    return np.sqrt(second)


def optimizer_source(model: Checkpoint) -> GradientSource | None:
    """Support from the checkpoint's own optimizer state, if it has any second moments."""
    state = model.optimizer
    if state is None or not any(s.second_moment is not None for s in state.slots.values()):
        return None
    step = f", step {state.step}" if state.step else ""
    return GradientSource(
        description=f"{state.kind} second moments{step} ({state.source or 'in the checkpoint'})",
        model=model,
    )


def sidecar_source(path: str, kind: GradsKind, loaded: Checkpoint) -> GradientSource:
    """Support from a sidecar file of gradient statistics."""
    if not loaded.tensors:
        raise SteelyardError(f"{path}: gradient file holds no tensors")
    return GradientSource(
        description=f"{kind.value} gradients from {path}", checkpoint=loaded, kind=kind
    )
