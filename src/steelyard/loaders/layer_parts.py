"""What every loader assembles a :class:`~steelyard.graph.Layer` from: its geometry and where
its weights come from. Both are typed bundles of the layer's own keyword arguments, so
:func:`make_layer` passes them on as they are and a loader states only what is particular to
its format."""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any, TypedDict

import numpy as np

from steelyard.graph import Activation, Layer, LayerKind


class Geometry(TypedDict):
    """A layer's canonical weight ``[units, in_per_group, *kernel]``, in ``groups`` groups."""

    units: int
    in_per_group: int
    kernel: tuple[int, ...]
    groups: int


class WeightSource(TypedDict):
    """The stored tensors a layer reads (by name) and how each is read in canonical form;
    ``orient`` maps an array shaped like the stored weight to the canonical view."""

    weight: str
    weight_view: Callable[[], np.ndarray]
    orient: Callable[[np.ndarray], np.ndarray] | None
    bias: str | None
    bias_view: Callable[[], np.ndarray] | None


def layer_geometry(
    units: int, in_per_group: int, kernel: tuple[int, ...] = (), groups: int = 1
) -> Geometry:
    """A geometry; a plain matrix ``[units, in]`` has no kernel and one group."""
    return Geometry(units=units, in_per_group=in_per_group, kernel=kernel, groups=groups)


def canonical_geometry(canonical: Sequence[int], groups: int = 1) -> Geometry:
    """The geometry of a canonical weight shape ``[units, in/groups, *kernel]``."""
    return layer_geometry(canonical[0], canonical[1], tuple(canonical[2:]), groups)


def weight_source(
    weight: str,
    weight_view: Callable[[], np.ndarray],
    orient: Callable[[np.ndarray], np.ndarray] | None,
    bias: str | None = None,
    bias_view: Callable[[], np.ndarray] | None = None,
) -> WeightSource:
    """Where a layer's weights come from (no bias unless one is given)."""
    return WeightSource(
        weight=weight, weight_view=weight_view, orient=orient, bias=bias, bias_view=bias_view
    )


def make_layer(
    name: str,
    kind: LayerKind,
    activation: Activation,
    shape: Geometry,
    source: WeightSource,
    **more: Any,
) -> Layer:
    """A layer of geometry ``shape`` reading ``source``; ``more`` sets Layer's optional fields
    (``gate``, ``aux``, ``constraint``, links)."""
    return Layer(name=name, kind=kind, activation=activation, **shape, **source, **more)
