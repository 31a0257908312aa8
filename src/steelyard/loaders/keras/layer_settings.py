"""What a Keras layer's config says about its weights beyond their values: the activation
(of a layer, or of an activation layer), kernel constraints and regularizers."""

from __future__ import annotations

from typing import Any

from steelyard.graph import Activation, Constraint, Regularizer
from steelyard.loaders.keras.config_values import as_dict, class_name, number
from steelyard.loaders.keras.layer_classes import ACTIVATIONS
from steelyard.loaders.keras.model_config import Atom


def activation_of(value: Any) -> Activation:
    """A config ``activation`` (string or serialized function) → :class:`Activation`."""
    if value is None:
        return Activation.IDENTITY
    if isinstance(value, dict):
        value = value.get("config")
    if not isinstance(value, str):
        return Activation.UNKNOWN
    return ACTIVATIONS.get(value.rsplit(".", 1)[-1].lower(), Activation.UNKNOWN)


def activation_layer(atom: Atom) -> Activation:
    """The activation an activation layer (``Activation``, ``ReLU``…) applies."""
    conf = atom.config
    if atom.cls == "Activation":
        return activation_of(conf.get("activation"))
    if atom.cls == "ReLU":
        if conf.get("max_value") is not None or (number(conf.get("threshold")) or 0.0) != 0.0:
            return Activation.UNKNOWN
        slope = number(conf.get("negative_slope"))
        return Activation.LEAKY_RELU if slope else Activation.RELU
    if atom.cls == "LeakyReLU":
        return Activation.LEAKY_RELU
    if atom.cls == "Softmax":
        return Activation.SOFTMAX
    return Activation.UNKNOWN


def _axes(value: Any, ndim: int) -> set[int] | None:
    items = value if isinstance(value, list) else [value]
    out: set[int] = set()
    for item in items:
        if isinstance(item, bool) or not isinstance(item, int) or not -ndim <= item < ndim:
            return None
        out.add(item % ndim)
    return out


def _serialized(value: Any) -> tuple[str, dict[str, Any]] | None:
    """A serialized Keras object (a dict, or a bare class name) as (lowercase kind without
    underscores, config); None when it is neither. Constraints and regularizers share it."""
    if isinstance(value, str):
        value = {"class_name": value, "config": {}}
    if not isinstance(value, dict):
        return None
    return class_name(value).replace("_", "").lower(), as_dict(value.get("config"))


def constraint_of(value: Any, ndim: int, unit_axes: set[int]) -> Constraint | None:
    """A serialized Keras constraint on a kernel of ``ndim`` axes whose units lie on
    ``unit_axes`` (stored layout)."""
    serialized = _serialized(value)
    if serialized is None:
        return None
    kind, conf = serialized
    others = set(range(ndim)) - unit_axes
    if kind in ("maxnorm",):
        axes = _axes(conf.get("axis", 0), ndim)
        return Constraint(
            kind="max-norm",
            max_value=number(conf.get("max_value", 2.0)),
            per_unit=axes == others,
        )
    if kind in ("unitnorm",):
        axes = _axes(conf.get("axis", 0), ndim)
        return Constraint(kind="unit-norm", max_value=1.0, min_value=1.0, per_unit=axes == others)
    if kind in ("nonneg",):
        return Constraint(kind="non-neg")
    if kind in ("minmaxnorm",):
        axes = _axes(conf.get("axis", 0), ndim)
        rate = number(conf.get("rate", 1.0))
        return Constraint(
            kind="min-max-norm",
            max_value=number(conf.get("max_value", 1.0)),
            min_value=number(conf.get("min_value", 0.0)),
            rate=1.0 if rate is None else rate,
            per_unit=axes == others,
        )
    return None


def regularizer_of(value: Any) -> Regularizer | None:
    """A serialized ``L1``/``L2``/``L1L2`` regularizer (l1·Σ|w| + l2·Σw²)."""
    serialized = _serialized(value)
    if serialized is None:
        return None
    kind, conf = serialized
    l1 = number(conf.get("l1", 0.0))
    l2 = number(conf.get("l2", 0.0))
    # Keras' defaults when built from a bare name: l1=0.01 for L1, l2=0.01 for L2.
    if kind == "l2":
        return Regularizer(l2=0.01 if "l2" not in conf else (l2 or 0.0))
    if kind == "l1":
        return Regularizer(l1=0.01 if "l1" not in conf else (l1 or 0.0))
    if kind == "l1l2":
        return Regularizer(l1=l1 or 0.0, l2=l2 or 0.0)
    return None
