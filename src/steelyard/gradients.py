"""Gradient support: how much gradient each weight received, from a sidecar or optimizer state.

Support is a per-weight gradient magnitude in the layer's canonical orientation. Sources, in
order of preference: a sidecar file given with ``--grads`` (same tensor names, any supported
format), or second moments of an adaptive optimizer stored in the checkpoint.

A sidecar tensor is used for a layer only when its shape is the model's weight shape exactly
(the model's own orientation then applies), or when the sidecar's own loader built a layer of
the same units and fan-in from a 2-D tensor that is the weight's transpose (a Keras kernel
``[in, out]`` against a PyTorch weight ``[out, in]``: each loader knows its orientation).
The same element count in another shape is never reshaped onto the weights: that tensor
counts as unmatched.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np

from steelyard.errors import LoadError
from steelyard.grads_kind import GradsKind as GradsKind
from steelyard.graph import Checkpoint, Layer
from steelyard.stats.reading import locked, read_float32


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
    notes: tuple[str, ...] = ()
    """What the report should say about the source (a sidecar's partial match)."""
    shapes: Mapping[str, tuple[int, ...]] = field(default_factory=dict)
    """Stored shapes of the audited model's tensors, which a sidecar tensor must match."""

    def support(self, layer: Layer) -> np.ndarray | None:
        """``|∂E/∂w|``-like magnitudes shaped ``[units, fan_in]``, or None when unknown.

        A sidecar answers for the layers it covers; the checkpoint's own optimizer state, when
        there is one, still answers for the others."""
        if self.checkpoint is not None:
            raw = _sidecar_raw(self.checkpoint, layer, self.shapes)
            if raw is not None:
                return _to_magnitude(np.abs(raw.astype(np.float64)), self.kind)
        if self.model is not None and self.model.optimizer is not None:
            return _from_optimizer(self.model, layer)
        return None

    def from_sidecar(self, layer: Layer) -> bool:
        """Whether ``layer``'s support comes from the sidecar (not from optimizer moments)."""
        return (
            self.checkpoint is not None
            and _sidecar_match(self.checkpoint, layer, self.shapes) is not None
        )


def _sidecar_match(
    sidecar: Checkpoint, layer: Layer, shapes: Mapping[str, tuple[int, ...]]
) -> str | None:
    """How the sidecar covers ``layer``: ``tensor`` (a tensor of the weight's name and exact
    stored shape, put in the layer's view by the model's own orientation), ``layer`` (the
    sidecar's loader built a layer of the same weight, units and fan-in from a tensor of the
    same shape or its 2-D transpose), or None (unmatched, whatever the element count)."""
    stored = sidecar.tensors.get(layer.weight)
    if stored is None:
        return None
    expected = shapes.get(layer.weight)
    exact = expected is not None and tuple(stored.shape) == tuple(expected)
    if exact and layer.orient is not None:
        return "tensor"
    twin = next(
        (x for x in sidecar.layers if x.weight == layer.weight and x.gate == layer.gate), None
    )
    if twin is None or (twin.units, twin.fan_in) != (layer.units, layer.fan_in):
        return None
    if expected is None or exact:
        return "layer"
    if len(expected) == 2 and tuple(stored.shape) == tuple(reversed(expected)):
        # A Keras kernel [in, out] against a PyTorch weight [out, in] (or the reverse): the
        # sidecar's loader oriented its own layer, so the canonical views agree.
        return "layer"
    return None


def _sidecar_raw(
    sidecar: Checkpoint, layer: Layer, shapes: Mapping[str, tuple[int, ...]]
) -> np.ndarray | None:
    how = _sidecar_match(sidecar, layer, shapes)
    if how == "layer":
        twin = next(
            x for x in sidecar.layers if x.weight == layer.weight and x.gate == layer.gate
        )
        return locked(None, twin.matrix)
    if how == "tensor":
        assert layer.orient is not None
        raw = np.asarray(layer.orient(read_float32(sidecar.tensors[layer.weight])))
        if raw.size != layer.units * layer.fan_in:
            return None
        return raw.reshape(layer.units, layer.fan_in)
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
    weight = model.tensors.get(layer.weight)
    if weight is not None and tuple(slots.second_moment.shape) != tuple(weight.shape):
        return None  # never reshape a moment of another shape onto the weights
    second = np.asarray(layer.orient(read_float32(slots.second_moment)), dtype=np.float64)
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


def sidecar_source(
    path: str, kind: GradsKind, loaded: Checkpoint, model: Checkpoint | None = None
) -> GradientSource:
    """Support from a sidecar file of gradient statistics, checked against ``model``.

    A sidecar that covers no layer of the model is an input error: it was made for another
    model, and using it would silently drop the support the model's own optimizer state gives.
    A partial match is reported with counts in the source's notes; layers it does not cover
    keep the model's optimizer support when there is one.
    """
    if not loaded.tensors:
        raise LoadError(path, "gradient file holds no tensors")
    if model is None:
        return GradientSource(
            description=f"{kind.value} gradients from {path}", checkpoint=loaded, kind=kind
        )
    layers = model.layers
    shapes = {name: tuple(t.shape) for name, t in model.tensors.items()}
    matched = [layer for layer in layers if _sidecar_match(loaded, layer, shapes) is not None]
    if layers and not matched:
        wrong = [
            f"{layer.weight} {list(loaded.tensors[layer.weight].shape)}, model "
            f"{list(shapes.get(layer.weight, ()))}"
            for layer in layers
            if layer.weight in loaded.tensors
        ]
        detail = (
            f"shapes differ ({', '.join(wrong[:3])})"
            if wrong
            else f"none of its {len(loaded.tensors):,} tensor names is a layer weight of the "
            f"model (e.g. {next(iter(loaded.tensors))!r}, model has {layers[0].weight!r})"
        )
        raise LoadError(path, f"gradient sidecar matches no layer of {model.path}: {detail}")
    fallback = optimizer_source(model)
    notes: list[str] = []
    if len(matched) < len(layers):
        covered = {id(layer) for layer in matched}
        missing = [layer.name for layer in layers if id(layer) not in covered]
        shown = ", ".join(missing[:8]) + (f" and {len(missing) - 8:,} more" if len(missing) > 8 else "")
        rest = (
            f"; they keep the checkpoint's {fallback.description}"
            if fallback is not None
            else "; they have no gradient support"
        )
        notes.append(
            f"gradient sidecar {path} covers {len(matched):,} of {len(layers):,} layers; "
            f"not covered: {shown}{rest}"
        )
    elif fallback is not None:
        notes.append(f"gradient sidecar {path} replaces the checkpoint's {fallback.description}")
    return GradientSource(
        description=f"{kind.value} gradients from {path}"
        + (f" ({len(matched):,} of {len(layers):,} layers)" if len(matched) < len(layers) else ""),
        checkpoint=loaded,
        kind=kind,
        model=model if fallback is not None else None,
        notes=tuple(notes),
        shapes=shapes,
    )
