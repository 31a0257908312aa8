"""What the Keras loaders share: config parsing, variable roles, canonical views, layers.

Both Keras readers (legacy HDF5 and ``.keras`` archives) turn the model config into a flat
list of :class:`Atom` objects (one per non-container layer, nested models opened up), attach
the stored tensors to them, and call :func:`build_layers`. The config is the only source of
links, activations, norms, constraints and regularizers; when there is no config we say less.

Layouts and orders follow /work/shared/FORMATS.md ("Keras"): Dense ``[in, out]``, Conv
``[k…, in/g, out]``, ConvTranspose ``[k…, out, in]``, DepthwiseConv ``[k…, C, dm]`` with
channel ``c·dm+m``, LSTM gates ``i, f, c, o``, GRU gates ``z, r, h``.
"""

from __future__ import annotations

import json
import math
import re
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np

from steelyard.errors import LoadError
from steelyard.graph import (
    Activation,
    Constraint,
    Layer,
    LayerKind,
    Link,
    Norm,
    NormKind,
    OptimizerSlots,
    OptimizerState,
    Regularizer,
    Tensor,
    mark_outputs,
)
from steelyard.loaders.base import MAX_METADATA_BYTES

#: Nesting deeper than this is refused (bounded recursion on hostile configs).
MAX_DEPTH = 32
#: More layers than this in one config is refused.
MAX_LAYERS = 200_000


def _words(text: str) -> list[str]:
    return text.split()


CONTAINERS = frozenset({"Sequential", "Functional", "Model"})

_DENSE = frozenset({"Dense"})
_CONV: dict[str, int] = {
    "Conv1D": 1,
    "Conv2D": 2,
    "Conv3D": 3,
    "Convolution1D": 1,
    "Convolution2D": 2,
    "Convolution3D": 3,
}
_CONV_T: dict[str, int] = {
    "Conv1DTranspose": 1,
    "Conv2DTranspose": 2,
    "Conv3DTranspose": 3,
    "Convolution1DTranspose": 1,
    "Convolution2DTranspose": 2,
    "Convolution3DTranspose": 3,
    "Deconvolution2D": 2,
    "Deconvolution3D": 3,
}
_DEPTHWISE: dict[str, int] = {"DepthwiseConv1D": 1, "DepthwiseConv2D": 2}
_SEPARABLE: dict[str, int] = {
    "SeparableConv1D": 1,
    "SeparableConv2D": 2,
    "SeparableConvolution1D": 1,
    "SeparableConvolution2D": 2,
}
_EMBEDDING = frozenset({"Embedding"})
#: Recurrent classes → gate order along the kernel's last axis.
RNN_GATES: dict[str, tuple[str, ...]] = {
    "LSTM": ("i", "f", "c", "o"),
    "GRU": ("z", "r", "h"),
    "SimpleRNN": ("h",),
}
_BATCH_NORM = frozenset({"BatchNormalization", "SyncBatchNormalization"})
_LAYER_NORM = frozenset({"LayerNormalization"})
_GROUP_NORM = frozenset({"GroupNormalization"})
_ACTIVATION_LAYERS = frozenset(
    {"Activation", "ReLU", "LeakyReLU", "Softmax", "ELU", "PReLU", "ThresholdedReLU"}
)
#: Layers that keep a unit's identity (channel c in → channel c out), so links look through.
_PASS = (
    frozenset(
        _words(
            "Dropout SpatialDropout1D SpatialDropout2D SpatialDropout3D GaussianNoise "
            "GaussianDropout AlphaDropout ActivityRegularization Identity Masking Flatten "
            "RepeatVector UnitNormalization"
        )
        + [
            f"{prefix}{dims}D"
            for prefix in (
                "MaxPooling",
                "AveragePooling",
                "MaxPool",
                "AvgPool",
                "GlobalMaxPooling",
                "GlobalAveragePooling",
                "GlobalMaxPool",
                "GlobalAvgPool",
                "ZeroPadding",
                "Cropping",
                "UpSampling",
            )
            for dims in (1, 2, 3)
        ]
    )
    | _BATCH_NORM
    | _LAYER_NORM
    | _GROUP_NORM
    | _ACTIVATION_LAYERS
)
#: Layers that combine several inputs; a consumer sees all their producers' units.
_MERGE = frozenset({"Concatenate", "Add", "Average", "Maximum", "Minimum", "Multiply", "Subtract"})
#: Pass-through layers that change which positions hold a unit, so a norm after them is not
#: a per-unit norm any more.
_RESHAPING = frozenset({"Flatten", "RepeatVector"})

_ACTIVATIONS: dict[str, Activation] = {
    "relu": Activation.RELU,
    "leaky_relu": Activation.LEAKY_RELU,
    "gelu": Activation.GELU,
    "silu": Activation.SILU,
    "swish": Activation.SILU,
    "sigmoid": Activation.SIGMOID,
    "tanh": Activation.TANH,
    "softmax": Activation.SOFTMAX,
    "hard_sigmoid": Activation.HARD_SIGMOID,
    "linear": Activation.IDENTITY,
}


def unit_classes() -> frozenset[str]:
    """Every class that becomes one or more :class:`Layer` objects."""
    return frozenset(
        set(_DENSE)
        | set(_CONV)
        | set(_CONV_T)
        | set(_DEPTHWISE)
        | set(_SEPARABLE)
        | set(_EMBEDDING)
        | set(RNN_GATES)
    )


_UNIT = unit_classes()


def to_snake_case(name: str) -> str:
    """Keras' own naming rule for ``.weights.h5`` keys (``Conv2DTranspose`` → ``conv2d_transpose``)."""
    name = re.sub(r"\W+", "", name)
    name = re.sub("(.)([A-Z][a-z]+)", r"\1_\2", name)
    return re.sub("([a-z])([A-Z])", r"\1_\2", name).lower()


#: snake_case family → class, for files without a config (default layer names / keys).
_FAMILY: dict[str, str] = {
    to_snake_case(c): c
    for c in sorted(
        set(_UNIT) | _BATCH_NORM | _LAYER_NORM | _GROUP_NORM | {"PReLU"} | set(CONTAINERS)
    )
}


def class_from_name(name: str) -> str | None:
    """The class a default Keras name implies: ``dense_3`` → ``Dense``; None when unknown."""
    family = re.sub(r"_\d+$", "", name)
    return _FAMILY.get(family)


def natural_key(text: str) -> list[Any]:
    """Sort key that orders ``vars/10`` after ``vars/9``."""
    return [(0, int(part)) if part.isdigit() else (1, part) for part in re.split(r"(\d+)", text)]


# --------------------------------------------------------------------------------------------
# JSON


def _no_duplicates(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for key, value in pairs:
        if key in out:
            raise ValueError(f"duplicate key {key!r}")
        out[key] = value
    return out


def parse_json(raw: bytes | str, source: Path, what: str) -> Any:
    """Parse a JSON blob from the file, refusing oversized blobs and duplicate keys."""
    if len(raw) > MAX_METADATA_BYTES:
        raise LoadError(source, f"{what} is larger than the 100 MB cap")
    try:
        text = raw.decode("utf-8") if isinstance(raw, bytes) else raw
        return json.loads(text, object_pairs_hook=_no_duplicates)
    except (UnicodeDecodeError, ValueError, RecursionError) as exc:
        raise LoadError(source, f"{what} is not valid JSON ({exc})") from None


def _as_dict(value: Any) -> dict[str, Any]:
    return value if isinstance(value, dict) else {}


def _number(value: Any) -> float | None:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return None
    number = float(value)
    return number if math.isfinite(number) else None


def _flag(config: Mapping[str, Any], key: str, default: bool) -> bool:
    value = config.get(key, default)
    return value if isinstance(value, bool) else default


# --------------------------------------------------------------------------------------------
# The flattened model


@dataclass
class Atom:
    """One non-container layer of the config, with the tensors attached to it."""

    name: str
    """Unique display name (the Keras name; qualified by its model only on a clash)."""
    raw_name: str
    cls: str
    config: Mapping[str, Any]
    trainable: bool
    key_path: str
    """Where ``.weights.h5`` keeps its variables (``layers/sequential/layers/dense``); empty for
    a Sequential's InputLayer, which Keras does not save."""
    top: str
    """Name of the top-level config layer it belongs to (its legacy HDF5 weight group)."""
    preds: list[str] = field(default_factory=list)
    """Display names of the atoms feeding it."""
    weights: dict[str, Tensor] = field(default_factory=dict)
    """Variable role (``kernel``, ``gamma``…) → stored tensor."""
    order: list[str] = field(default_factory=list)
    """Roles in stored variable order."""


@dataclass
class ModelGraph:
    """The config's layers, nested models opened up, in model order."""

    atoms: list[Atom]
    model_class: str
    model_name: str
    notes: list[str] = field(default_factory=list)

    def by_name(self) -> dict[str, Atom]:
        """Display name → atom."""
        return {atom.name: atom for atom in self.atoms}


def class_name(entry: Mapping[str, Any]) -> str:
    """The ``class_name`` of a serialized object, without a registration package prefix."""
    value = entry.get("class_name")
    if not isinstance(value, str):
        return ""
    return value.rsplit(">", 1)[-1]


@dataclass
class _Scope:
    entries: dict[str, _Entry] = field(default_factory=dict)
    outputs: list[tuple[str, int]] = field(default_factory=list)
    inputs: list[int] = field(default_factory=list)
    path: tuple[str, ...] = ()


@dataclass
class _Entry:
    atom: int | None = None
    scope: _Scope | None = None


@dataclass
class _Pending:
    atom: int
    refs: list[tuple[_Scope, str, int]]


class _ConfigWalker:
    """Builds atoms from a model config, resolving ``inbound_nodes`` across nested models."""

    def __init__(self, source: Path) -> None:
        self.source = source
        self.atoms: list[Atom] = []
        self.paths: list[tuple[str, ...]] = []
        self.pending: list[_Pending] = []
        self.notes: list[str] = []

    def fail(self, reason: str) -> LoadError:
        return LoadError(self.source, f"model config: {reason}")

    def container(
        self,
        cls: str,
        config: Mapping[str, Any] | list[Any],
        key_prefix: str,
        top: str | None,
        trainable: bool,
        path: tuple[str, ...],
        depth: int,
    ) -> _Scope:
        if depth > MAX_DEPTH:
            raise self.fail(f"models nested more than {MAX_DEPTH} deep")
        layers = config if isinstance(config, list) else config.get("layers")
        if not isinstance(layers, list):
            raise self.fail(f"{cls} {'/'.join(path) or 'model'} has no list of layers")
        sequential = cls == "Sequential"
        scope = _Scope(path=path)
        used: dict[str, int] = {}
        previous: tuple[str, int] | None = None
        for entry in layers:
            if len(self.atoms) > MAX_LAYERS:
                raise self.fail(f"more than {MAX_LAYERS} layers")
            if not isinstance(entry, dict):
                raise self.fail("a layer entry is not an object")
            lcls = class_name(entry)
            lcfg = entry.get("config")
            if not lcls or not isinstance(lcfg, (dict, list)):
                raise self.fail("a layer entry has no class_name/config")
            name = entry.get("name", lcfg.get("name") if isinstance(lcfg, dict) else None)
            if not isinstance(name, str) or not name:
                raise self.fail(f"a {lcls} layer has no name")
            if name in scope.entries:
                raise self.fail(f"layer name {name!r} appears twice in one model")
            if sequential and lcls == "InputLayer":
                key_path = ""
            else:
                key = to_snake_case(lcls)
                if key in used:
                    used[key] += 1
                    key = f"{key}_{used[key]}"
                else:
                    used[key] = 0
                key_path = f"{key_prefix}/layers/{key}" if key_prefix else f"layers/{key}"
            own = lcfg if isinstance(lcfg, dict) else {}
            layer_trainable = trainable and own.get("trainable", True) is not False
            if sequential:
                refs = [previous] if previous is not None else []
            else:
                refs = self._inbound(entry, name)
            links = [(scope, ref, index) for ref, index in refs]
            if lcls in CONTAINERS and (isinstance(lcfg, list) or "layers" in lcfg):
                inner = self.container(
                    lcls, lcfg, key_path, top or name, layer_trainable, (*path, name), depth + 1
                )
                scope.entries[name] = _Entry(scope=inner)
                for index in inner.inputs:
                    self._pend(index).refs.extend(links)
            else:
                index = len(self.atoms)
                self.atoms.append(
                    Atom(
                        name=name,
                        raw_name=name,
                        cls=lcls,
                        config=own,
                        trainable=layer_trainable,
                        key_path=key_path,
                        top=top or name,
                    )
                )
                self.paths.append(path)
                self.pending.append(_Pending(index, list(links)))
                scope.entries[name] = _Entry(atom=index)
            previous = (name, 0)
        if sequential:
            scope.outputs = [previous] if previous is not None else []
            first = next(iter(scope.entries.values()), None)
            if first is not None:
                scope.inputs = (
                    [first.atom]
                    if first.atom is not None
                    else list(first.scope.inputs if first.scope else [])
                )
        else:
            conf = config if isinstance(config, dict) else {}
            scope.outputs = self._refs(conf.get("output_layers", []), "output_layers")
            for ref, _ in self._refs(conf.get("input_layers", []), "input_layers"):
                found = scope.entries.get(ref)
                if found is None:
                    raise self.fail(f"input layer {ref!r} is not among the layers")
                if found.atom is not None:
                    scope.inputs.append(found.atom)
                elif found.scope is not None:
                    scope.inputs.extend(found.scope.inputs)
        return scope

    def _pend(self, atom: int) -> _Pending:
        return self.pending[atom]

    def _refs(self, value: Any, what: str) -> list[tuple[str, int]]:
        """``["x", 0, 0]`` or ``[["x", 0, 0], …]`` → ``[("x", 0)]``."""
        if not isinstance(value, list):
            raise self.fail(f"{what} is not a list")
        if value and isinstance(value[0], str):
            value = [value]
        out: list[tuple[str, int]] = []
        for item in value:
            if not isinstance(item, list) or not item or not isinstance(item[0], str):
                raise self.fail(f"{what} entry {item!r} is not [layer, node, tensor]")
            tensor = item[2] if len(item) > 2 else 0
            if isinstance(tensor, bool) or not isinstance(tensor, int):
                raise self.fail(f"{what} entry {item!r} has a non-integer tensor index")
            out.append((item[0], tensor))
        return out

    def _inbound(self, entry: Mapping[str, Any], name: str) -> list[tuple[str, int]]:
        nodes = entry.get("inbound_nodes", [])
        if not isinstance(nodes, list):
            raise self.fail(f"layer {name!r}: inbound_nodes is not a list")
        refs: list[tuple[str, int]] = []
        for node in nodes:
            if isinstance(node, dict):  # Keras 3: {"args": [...], "kwargs": {...}}
                self._history(node.get("args", []), refs, name, 0)
            elif isinstance(node, list):  # Keras 2: [[layer, node, tensor, kwargs], ...]
                for item in node:
                    if isinstance(item, list) and item and isinstance(item[0], str):
                        tensor = item[2] if len(item) > 2 else 0
                        if isinstance(tensor, bool) or not isinstance(tensor, int):
                            raise self.fail(f"layer {name!r}: inbound tensor index is not an int")
                        refs.append((item[0], tensor))
                    elif isinstance(item, dict):
                        self._history(item, refs, name, 0)
                    else:
                        raise self.fail(f"layer {name!r}: malformed inbound node {item!r}")
            else:
                raise self.fail(f"layer {name!r}: malformed inbound node")
        unique: list[tuple[str, int]] = []
        for ref in refs:
            if ref not in unique:
                unique.append(ref)
        return unique

    def _history(self, value: Any, refs: list[tuple[str, int]], name: str, depth: int) -> None:
        if depth > MAX_DEPTH:
            raise self.fail(f"layer {name!r}: inbound arguments nested too deeply")
        if isinstance(value, list):
            for item in value:
                self._history(item, refs, name, depth + 1)
        elif isinstance(value, dict):
            if value.get("class_name") == "__keras_tensor__":
                history = _as_dict(value.get("config")).get("keras_history")
                if (
                    not isinstance(history, list)
                    or len(history) < 3
                    or not isinstance(history[0], str)
                    or isinstance(history[2], bool)
                    or not isinstance(history[2], int)
                ):
                    raise self.fail(f"layer {name!r}: malformed keras_history {history!r}")
                refs.append((history[0], history[2]))
            else:
                for item in value.values():
                    self._history(item, refs, name, depth + 1)

    def resolve(self, scope: _Scope, name: str, index: int, depth: int = 0) -> int:
        if depth > MAX_DEPTH:
            raise self.fail(f"reference to {name!r} nests too deeply")
        entry = scope.entries.get(name)
        if entry is None:
            raise self.fail(f"a layer refers to {name!r}, which is not in its model")
        if entry.atom is not None:
            return entry.atom
        inner = entry.scope
        assert inner is not None
        if not 0 <= index < len(inner.outputs):
            raise self.fail(f"a layer refers to output {index} of model {name!r}, which lacks it")
        ref, sub = inner.outputs[index]
        return self.resolve(inner, ref, sub, depth + 1)

    def finish(self, model_class: str, model_name: str) -> ModelGraph:
        counts: dict[str, int] = {}
        for atom in self.atoms:
            counts[atom.raw_name] = counts.get(atom.raw_name, 0) + 1
        taken: set[str] = set()
        for atom, path in zip(self.atoms, self.paths, strict=True):
            name = atom.raw_name
            if counts[name] > 1 and path:
                name = "/".join((*path, name))
            base, serial = name, 1
            while name in taken:
                serial += 1
                name = f"{base}#{serial}"
            taken.add(name)
            atom.name = name
        for pending in self.pending:
            preds: list[str] = []
            for scope, ref, index in pending.refs:
                target = self.atoms[self.resolve(scope, ref, index)].name
                if target not in preds:
                    preds.append(target)
            self.atoms[pending.atom].preds = preds
        return ModelGraph(self.atoms, model_class, model_name, self.notes)


def parse_model(config: Any, source: Path) -> ModelGraph | None:
    """Flatten a serialized model (``model_config`` / ``config.json``) into atoms.

    Returns None (the caller adds a note) for models the config cannot describe layer by
    layer, such as subclassed models; raises :class:`LoadError` for malformed configs.
    """
    if not isinstance(config, dict):
        raise LoadError(source, "model config is not a JSON object")
    cls = class_name(config)
    inner = config.get("config")
    if cls not in CONTAINERS or not isinstance(inner, (dict, list)):
        return None
    if isinstance(inner, dict) and "layers" not in inner:
        return None
    walker = _ConfigWalker(source)
    walker.container(cls, inner, "", None, True, (), 0)
    name = inner.get("name") if isinstance(inner, dict) else None
    graph = walker.finish(cls, name if isinstance(name, str) else "")
    lambdas = [a.name for a in graph.atoms if a.cls == "Lambda"]
    if lambdas:
        graph.notes.append(
            f"{len(lambdas)} Lambda layer(s) ({', '.join(lambdas[:3])}) hold serialized code, "
            "which was not decoded; links through them are unknown"
        )
    return graph


# --------------------------------------------------------------------------------------------
# Variable roles


def expected_roles(cls: str, config: Mapping[str, Any] | None) -> list[str] | None:
    """The variables a layer of this class stores, in Keras' own order (None: unknown class).

    With ``config`` None (no model config) optional variables are assumed present; callers
    then only use this list to match names, never positions.
    """
    conf = config or {}
    bias = ["bias"] if _flag(conf, "use_bias", True) else []
    if cls in _DENSE or cls in _CONV or cls in _CONV_T or cls in _DEPTHWISE:
        return ["kernel", *bias]
    if cls in _SEPARABLE:
        return ["depthwise_kernel", "pointwise_kernel", *bias]
    if cls in _EMBEDDING:
        return ["embeddings"]
    if cls in RNN_GATES:
        return ["kernel", "recurrent_kernel", *bias]
    if cls in _BATCH_NORM:
        affine = _affine(conf)
        return [*affine, "moving_mean", "moving_variance"]
    if cls in _LAYER_NORM or cls in _GROUP_NORM:
        return _affine(conf)
    if cls == "PReLU":
        return ["alpha"]
    if cls in _PASS or cls in _MERGE or cls == "InputLayer":
        return []
    return None


def _affine(conf: Mapping[str, Any]) -> list[str]:
    roles = []
    if _flag(conf, "scale", True):
        roles.append("gamma")
    if _flag(conf, "center", True):
        roles.append("beta")
    return roles


def non_trainable_roles(cls: str) -> frozenset[str]:
    """Variables Keras creates with ``trainable=False`` (no optimizer slots)."""
    if cls in _BATCH_NORM:
        return frozenset({"moving_mean", "moving_variance"})
    return frozenset()


def role_of_name(cls: str, weight_name: str) -> str:
    """The variable role a stored weight name carries (``dense/kernel:0`` → ``kernel``)."""
    leaf = weight_name.rsplit("/", 1)[-1]
    leaf = re.sub(r":\d+$", "", leaf)
    if cls in _DEPTHWISE and leaf == "depthwise_kernel":
        return "kernel"
    return leaf


def roles_by_count(cls: str, config: Mapping[str, Any] | None, count: int) -> list[str] | None:
    """Roles of ``count`` positional variables, or None when that is not determined."""
    if config is not None:
        roles = expected_roles(cls, config)
        return roles if roles is not None and len(roles) == count else None
    full = expected_roles(cls, {})
    if full is None:
        return None
    if len(full) == count:
        return full
    # Without a config only a missing bias is unambiguous (it is always last).
    if full[-1:] == ["bias"] and len(full) - 1 == count:
        return full[:-1]
    return None


# --------------------------------------------------------------------------------------------
# Activations, constraints, regularizers


def activation_of(value: Any) -> Activation:
    """A config ``activation`` (string or serialized function) → :class:`Activation`."""
    if value is None:
        return Activation.IDENTITY
    if isinstance(value, dict):
        value = value.get("config")
    if not isinstance(value, str):
        return Activation.UNKNOWN
    return _ACTIVATIONS.get(value.rsplit(".", 1)[-1].lower(), Activation.UNKNOWN)


def _activation_layer(atom: Atom) -> Activation:
    conf = atom.config
    if atom.cls == "Activation":
        return activation_of(conf.get("activation"))
    if atom.cls == "ReLU":
        if conf.get("max_value") is not None or (_number(conf.get("threshold")) or 0.0) != 0.0:
            return Activation.UNKNOWN
        slope = _number(conf.get("negative_slope"))
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


def constraint_of(value: Any, ndim: int, unit_axes: set[int]) -> Constraint | None:
    """A serialized Keras constraint on a kernel of ``ndim`` axes whose units lie on
    ``unit_axes`` (stored layout)."""
    if isinstance(value, str):
        value = {"class_name": value, "config": {}}
    if not isinstance(value, dict):
        return None
    kind = class_name(value).replace("_", "").lower()
    conf = _as_dict(value.get("config"))
    others = set(range(ndim)) - unit_axes
    if kind in ("maxnorm",):
        axes = _axes(conf.get("axis", 0), ndim)
        return Constraint(
            kind="max-norm",
            max_value=_number(conf.get("max_value", 2.0)),
            per_unit=axes == others,
        )
    if kind in ("unitnorm",):
        axes = _axes(conf.get("axis", 0), ndim)
        return Constraint(kind="unit-norm", max_value=1.0, min_value=1.0, per_unit=axes == others)
    if kind in ("nonneg",):
        return Constraint(kind="non-neg")
    if kind in ("minmaxnorm",):
        axes = _axes(conf.get("axis", 0), ndim)
        rate = _number(conf.get("rate", 1.0))
        return Constraint(
            kind="min-max-norm",
            max_value=_number(conf.get("max_value", 1.0)),
            min_value=_number(conf.get("min_value", 0.0)),
            rate=1.0 if rate is None else rate,
            per_unit=axes == others,
        )
    return None


def regularizer_of(value: Any) -> Regularizer | None:
    """A serialized ``L1``/``L2``/``L1L2`` regularizer (l1·Σ|w| + l2·Σw²)."""
    if isinstance(value, str):
        value = {"class_name": value, "config": {}}
    if not isinstance(value, dict):
        return None
    kind = class_name(value).replace("_", "").lower()
    conf = _as_dict(value.get("config"))
    l1 = _number(conf.get("l1", 0.0))
    l2 = _number(conf.get("l2", 0.0))
    # Keras' defaults when built from a bare name: l1=0.01 for L1, l2=0.01 for L2.
    if kind == "l2":
        return Regularizer(l2=0.01 if "l2" not in conf else (l2 or 0.0))
    if kind == "l1":
        return Regularizer(l1=0.01 if "l1" not in conf else (l1 or 0.0))
    if kind == "l1l2":
        return Regularizer(l1=l1 or 0.0, l2=l2 or 0.0)
    return None


# --------------------------------------------------------------------------------------------
# Canonical views


def _view(
    tensor: Tensor, transform: Callable[[np.ndarray], np.ndarray]
) -> Callable[[], np.ndarray]:
    def read() -> np.ndarray:
        return np.ascontiguousarray(transform(tensor.read_float32()), dtype=np.float32)

    return read


def dense_canonical(kernel: np.ndarray) -> np.ndarray:
    """Dense ``[in, out]`` → ``[out, in]``."""
    return kernel.T


def conv_canonical(kernel: np.ndarray) -> np.ndarray:
    """Conv ``[k…, in/g, out]`` → ``[out, in/g, k…]``."""
    n = kernel.ndim
    return np.transpose(kernel, (n - 1, n - 2, *range(n - 2)))


def conv_transpose_canonical(kernel: np.ndarray) -> np.ndarray:
    """ConvTranspose ``[k…, out, in]`` → ``[out, in, k…]`` (rows are output channels)."""
    n = kernel.ndim
    return np.transpose(kernel, (n - 2, n - 1, *range(n - 2)))


def depthwise_canonical(kernel: np.ndarray) -> np.ndarray:
    """DepthwiseConv ``[k…, C, dm]`` → ``[C·dm, 1, k…]``, channel ``c·dm + m``."""
    spatial = kernel.shape[:-2]
    flat = kernel.reshape(*spatial, kernel.shape[-2] * kernel.shape[-1])
    return np.moveaxis(flat, -1, 0)[:, None, ...]


def _same(array: np.ndarray) -> np.ndarray:
    return array


def _gate_columns(columns: slice) -> Callable[[np.ndarray], np.ndarray]:
    """One gate of a recurrent kernel ``[in, G·H]`` → ``[H, in]``."""
    return lambda kernel: kernel[:, columns].T


def _bias_slice(columns: slice, row: int) -> Callable[[np.ndarray], np.ndarray]:
    """One gate of a recurrent bias: ``[G·H]`` (row -1) or row ``row`` of ``[2, G·H]``."""
    return lambda bias: bias[columns] if row == -1 else bias[row, columns]


# --------------------------------------------------------------------------------------------
# Layers


@dataclass
class _Built:
    """The layers one atom became, and which of them face its inputs and its consumers."""

    layers: list[Layer]
    entry: list[str]
    """Layers whose inputs are the atom's inputs."""
    port: str | None
    """Layer whose units the atom outputs (None: outputs are not one layer's units)."""
    last: str | None
    """Layer that gets the atom's activation and norm."""


class _LayerFactory:
    def __init__(self, source: Path) -> None:
        self.source = source

    def fail(self, atom: Atom, reason: str) -> LoadError:
        return LoadError(self.source, f"layer {atom.name!r} ({atom.cls}): {reason}")

    def tensor(self, atom: Atom, role: str) -> Tensor:
        return atom.weights[role]

    def bias(self, atom: Atom, units: int) -> tuple[str | None, Callable[[], np.ndarray] | None]:
        bias = atom.weights.get("bias")
        if bias is None:
            return None, None
        if bias.shape != (units,):
            raise self.fail(atom, f"bias {bias.name!r} has shape {bias.shape}, expected ({units},)")
        return bias.name, _view(bias, _same)

    def build(self, atom: Atom, have_config: bool) -> _Built | None:
        cls = atom.cls
        conf = atom.config
        activation = activation_of(conf.get("activation")) if have_config else Activation.UNKNOWN
        if cls in _DENSE:
            return self._dense(atom, activation)
        if cls in _CONV:
            return self._conv(atom, activation, _CONV[cls], transposed=False)
        if cls in _CONV_T:
            return self._conv(atom, activation, _CONV_T[cls], transposed=True)
        if cls in _DEPTHWISE:
            return self._depthwise(atom, activation, _DEPTHWISE[cls])
        if cls in _SEPARABLE:
            return self._separable(atom, activation, _SEPARABLE[cls])
        if cls in _EMBEDDING:
            return self._embedding(atom)
        if cls in RNN_GATES:
            return self._recurrent(atom, have_config)
        return None

    def _extras(
        self, atom: Atom, prefix: str, kernel: Tensor, unit_axes: set[int]
    ) -> dict[str, Any]:
        conf = atom.config
        ndim = len(kernel.shape)
        return {
            "constraint": constraint_of(conf.get(f"{prefix}_constraint"), ndim, unit_axes),
            "regularizer": regularizer_of(conf.get(f"{prefix}_regularizer")),
        }

    def _dense(self, atom: Atom, activation: Activation) -> _Built:
        kernel = self.tensor(atom, "kernel")
        if len(kernel.shape) != 2:
            raise self.fail(
                atom, f"kernel {kernel.name!r} has shape {kernel.shape}, expected [in, out]"
            )
        fan, units = kernel.shape
        bias, bias_view = self.bias(atom, units)
        layer = Layer(
            name=atom.name,
            kind=LayerKind.DENSE,
            weight=kernel.name,
            bias=bias,
            units=units,
            in_per_group=fan,
            kernel=(),
            groups=1,
            activation=activation,
            weight_view=_view(kernel, dense_canonical),
            bias_view=bias_view,
            **self._extras(atom, "kernel", kernel, {1}),
        )
        return _Built([layer], [atom.name], atom.name, atom.name)

    def _conv(self, atom: Atom, activation: Activation, rank: int, transposed: bool) -> _Built:
        kernel = self.tensor(atom, "kernel")
        shape = kernel.shape
        if len(shape) != rank + 2:
            layout = "[k…, out, in]" if transposed else "[k…, in/groups, out]"
            raise self.fail(atom, f"kernel {kernel.name!r} has shape {shape}, expected {layout}")
        groups = 1
        if not transposed:
            value = atom.config.get("groups", 1)
            groups = value if isinstance(value, int) and not isinstance(value, bool) else 1
            if groups < 1 or shape[-1] % groups:
                raise self.fail(atom, f"groups={value!r} does not divide {shape[-1]} filters")
        if transposed:
            units, fan, unit_axis = shape[-2], shape[-1], rank
            kind, view = LayerKind.CONV_TRANSPOSE, conv_transpose_canonical
        else:
            units, fan, unit_axis = shape[-1], shape[-2], rank + 1
            kind, view = LayerKind.CONV, conv_canonical
        bias, bias_view = self.bias(atom, units)
        layer = Layer(
            name=atom.name,
            kind=kind,
            weight=kernel.name,
            bias=bias,
            units=units,
            in_per_group=fan,
            kernel=tuple(shape[:-2]),
            groups=groups,
            activation=activation,
            weight_view=_view(kernel, view),
            bias_view=bias_view,
            **self._extras(atom, "kernel", kernel, {unit_axis}),
        )
        return _Built([layer], [atom.name], atom.name, atom.name)

    def _depthwise_layer(
        self,
        atom: Atom,
        kernel: Tensor,
        rank: int,
        name: str,
        activation: Activation,
        with_bias: bool,
    ) -> Layer:
        shape = kernel.shape
        if len(shape) != rank + 2:
            raise self.fail(
                atom, f"depthwise kernel {kernel.name!r} has shape {shape}, expected [k…, C, dm]"
            )
        channels, multiplier = shape[-2], shape[-1]
        units = channels * multiplier
        bias, bias_view = self.bias(atom, units) if with_bias else (None, None)
        return Layer(
            name=name,
            kind=LayerKind.CONV,
            weight=kernel.name,
            bias=bias,
            units=units,
            in_per_group=1,
            kernel=tuple(shape[:-2]),
            groups=channels,
            activation=activation,
            weight_view=_view(kernel, depthwise_canonical),
            bias_view=bias_view,
            **self._extras(atom, "depthwise", kernel, {rank, rank + 1}),
        )

    def _depthwise(self, atom: Atom, activation: Activation, rank: int) -> _Built:
        layer = self._depthwise_layer(
            atom, self.tensor(atom, "kernel"), rank, atom.name, activation, True
        )
        return _Built([layer], [atom.name], atom.name, atom.name)

    def _separable(self, atom: Atom, activation: Activation, rank: int) -> _Built:
        depth_name, point_name = f"{atom.name}/depthwise", f"{atom.name}/pointwise"
        depthwise = self._depthwise_layer(
            atom,
            self.tensor(atom, "depthwise_kernel"),
            rank,
            depth_name,
            Activation.IDENTITY,
            False,
        )
        point = self.tensor(atom, "pointwise_kernel")
        shape = point.shape
        if (
            len(shape) != rank + 2
            or any(k != 1 for k in shape[:-2])
            or shape[-2] != depthwise.units
        ):
            raise self.fail(
                atom,
                f"pointwise kernel {point.name!r} has shape {shape}, expected [1…, {depthwise.units}, out]",
            )
        units = shape[-1]
        bias, bias_view = self.bias(atom, units)
        pointwise = Layer(
            name=point_name,
            kind=LayerKind.CONV,
            weight=point.name,
            bias=bias,
            units=units,
            in_per_group=shape[-2],
            kernel=tuple(shape[:-2]),
            groups=1,
            activation=activation,
            weight_view=_view(point, conv_canonical),
            bias_view=bias_view,
            inputs_from=(depth_name,),
            linked_by=Link.CONFIG,
            **self._extras(atom, "pointwise", point, {rank + 1}),
        )
        return _Built([depthwise, pointwise], [depth_name], point_name, point_name)

    def _embedding(self, atom: Atom) -> _Built:
        table = self.tensor(atom, "embeddings")
        if len(table.shape) != 2:
            raise self.fail(
                atom, f"embeddings {table.name!r} has shape {table.shape}, expected [vocab, dim]"
            )
        conf = atom.config
        # Stored [vocab, dim] is already rows-first, like a lookup table elsewhere.
        layer = Layer(
            name=atom.name,
            kind=LayerKind.EMBEDDING,
            weight=table.name,
            bias=None,
            units=table.shape[0],
            in_per_group=table.shape[1],
            kernel=(),
            groups=1,
            activation=Activation.IDENTITY,
            weight_view=_view(table, _same),
            constraint=constraint_of(conf.get("embeddings_constraint"), 2, {0}),
            regularizer=regularizer_of(conf.get("embeddings_regularizer")),
        )
        return _Built([layer], [], None, None)

    def _recurrent(self, atom: Atom, have_config: bool) -> _Built:
        gates = RNN_GATES[atom.cls]
        kernel = self.tensor(atom, "kernel")
        recurrent = self.tensor(atom, "recurrent_kernel")
        if len(recurrent.shape) != 2 or recurrent.shape[1] != len(gates) * recurrent.shape[0]:
            raise self.fail(
                atom,
                f"recurrent kernel {recurrent.name!r} has shape {recurrent.shape}, expected [H, {len(gates)}·H]",
            )
        hidden = recurrent.shape[0]
        if len(kernel.shape) != 2 or kernel.shape[1] != len(gates) * hidden:
            raise self.fail(
                atom,
                f"kernel {kernel.name!r} has shape {kernel.shape}, expected [in, {len(gates) * hidden}]",
            )
        bias = atom.weights.get("bias")
        rows: tuple[int | None, int | None] = (None, None)
        width = len(gates) * hidden
        if bias is not None:
            if bias.shape == (width,):
                rows = (-1, None)
            elif bias.shape == (2, width):
                rows = (0, 1)  # GRU reset_after: input bias, then recurrent bias
            else:
                raise self.fail(atom, f"bias {bias.name!r} has shape {bias.shape}")
        conf = atom.config
        if have_config:
            cell_act = activation_of(conf.get("activation", "tanh"))
            gate_act = activation_of(conf.get("recurrent_activation", "sigmoid"))
        else:
            cell_act = gate_act = Activation.UNKNOWN
        if atom.cls == "SimpleRNN":
            gate_acts = {"h": cell_act}
        else:
            gate_acts = {g: (cell_act if g in ("c", "h") else gate_act) for g in gates}
        layers: list[Layer] = []
        entry: list[str] = []
        for part, tensor, row, prefix in (
            ("kernel", kernel, rows[0], "kernel"),
            ("recurrent_kernel", recurrent, rows[1], "recurrent"),
        ):
            extras = self._extras(atom, prefix, tensor, {1})
            for index, gate in enumerate(gates):
                columns = slice(index * hidden, (index + 1) * hidden)
                name = f"{atom.name}/{part}/{gate}"
                bias_view = None
                if bias is not None and row is not None:
                    bias_view = _view(bias, _bias_slice(columns, row))
                layers.append(
                    Layer(
                        name=name,
                        kind=LayerKind.RECURRENT,
                        weight=tensor.name,
                        bias=bias.name if bias_view is not None and bias is not None else None,
                        units=hidden,
                        in_per_group=tensor.shape[0],
                        kernel=(),
                        groups=1,
                        activation=gate_acts[gate],
                        weight_view=_view(tensor, _gate_columns(columns)),
                        bias_view=bias_view,
                        gate=gate,
                        **extras,
                    )
                )
                if part == "kernel":
                    entry.append(name)
        return _Built(layers, entry, None, None)


def _kind(cls: str) -> str:
    if cls in _UNIT:
        return "unit"
    if cls == "InputLayer":
        return "input"
    if cls in _MERGE:
        return "merge"
    if cls in _PASS:
        return "pass"
    return "opaque"


class _Linker:
    """Producer → consumer resolution over the atom graph, looking through pass-through layers."""

    def __init__(self, atoms: list[Atom], built: Mapping[str, _Built]) -> None:
        self.atoms = {atom.name: atom for atom in atoms}
        self.built = built
        self.consumers: dict[str, list[str]] = {atom.name: [] for atom in atoms}
        for atom in atoms:
            for pred in atom.preds:
                if pred in self.consumers and atom.name not in self.consumers[pred]:
                    self.consumers[pred].append(atom.name)
        self.memo: dict[str, tuple[list[str], bool] | None] = {}

    def sources(self, name: str) -> list[str] | None:
        """Layers whose units feed atom ``name``; None when that cannot be told."""
        found = self._preds(name, set())
        if found is None:
            return None
        layers, raw = found
        if raw and layers:
            return None  # part raw model input, part units: columns are not all units
        return layers

    def _preds(self, name: str, active: set[str]) -> tuple[list[str], bool] | None:
        if name in active:
            return None
        out: list[str] = []
        raw = False
        for pred in self.atoms[name].preds:
            got = self._output(pred, active | {name})
            if got is None:
                return None
            for layer in got[0]:
                if layer not in out:
                    out.append(layer)
            raw = raw or got[1]
        return out, raw

    def _output(self, name: str, active: set[str]) -> tuple[list[str], bool] | None:
        """What atom ``name`` outputs: (layers whose units, whether raw input is mixed in)."""
        if name in self.memo:
            return self.memo[name]
        atom = self.atoms[name]
        kind = _kind(atom.cls)
        result: tuple[list[str], bool] | None
        if kind == "unit":
            built = self.built.get(name)
            result = ([built.port], False) if built is not None and built.port else None
        elif kind == "input":
            result = self._preds(name, active) if atom.preds else ([], True)
        elif kind in ("pass", "merge"):
            result = self._preds(name, active)
        else:
            result = None
        self.memo[name] = result
        return result

    def chain(self, name: str) -> list[Atom]:
        """Atoms that follow ``name`` one by one (single consumer) through pass-through layers."""
        out: list[Atom] = []
        current = name
        seen = {name}
        while True:
            consumers = self.consumers.get(current, [])
            if len(consumers) != 1:
                return out
            nxt = self.atoms[consumers[0]]
            if nxt.name in seen or _kind(nxt.cls) != "pass":
                return out
            out.append(nxt)
            seen.add(nxt.name)
            current = nxt.name

    def any_activation_consumer(self, name: str) -> bool:
        return any(self.atoms[c].cls in _ACTIVATION_LAYERS for c in self.consumers.get(name, []))


def _conv_rank(cls: str) -> int:
    for table in (_CONV, _CONV_T, _DEPTHWISE, _SEPARABLE):
        if cls in table:
            return table[cls]
    return 0


def _channel_axis_ok(axis: Any, producer: Atom) -> bool:
    """Whether a norm over ``axis`` normalises the producer's channels (its units)."""
    if isinstance(axis, list) and len(axis) == 1:
        axis = axis[0]
    if isinstance(axis, bool) or not isinstance(axis, int):
        return False
    channels_first = producer.config.get("data_format") == "channels_first"
    if axis == -1:
        return not channels_first
    rank = _conv_rank(producer.cls)
    return axis == 1 if channels_first else axis == rank + 1


def _norm_from(atom: Atom, units: int, producer: Atom) -> Norm | None:
    conf = atom.config
    gamma, beta = atom.weights.get("gamma"), atom.weights.get("beta")
    for tensor in (gamma, beta):
        if tensor is not None and tensor.shape != (units,):
            return None
    eps = _number(conf.get("epsilon"))
    eps = 1e-3 if eps is None else eps
    scale = gamma.name if gamma is not None else None
    shift = beta.name if beta is not None else None
    if atom.cls in _BATCH_NORM:
        mean, var = atom.weights.get("moving_mean"), atom.weights.get("moving_variance")
        if mean is None or var is None or mean.shape != (units,) or var.shape != (units,):
            return None
        if not _channel_axis_ok(conf.get("axis", -1), producer):
            return None
        return Norm(NormKind.BATCH, scale=scale, shift=shift, mean=mean.name, var=var.name, eps=eps)
    if gamma is None and beta is None:
        return None
    if atom.cls in _LAYER_NORM:
        axis = conf.get("axis", -1)
        if axis not in (-1, [-1]) or not _channel_axis_ok(-1, producer):
            return None
        kind = NormKind.RMS if _flag(conf, "rms_scaling", False) else NormKind.LAYER
        return Norm(kind, scale=scale, shift=shift, eps=eps)
    if atom.cls in _GROUP_NORM and _channel_axis_ok(conf.get("axis", -1), producer):
        return Norm(NormKind.GROUP, scale=scale, shift=shift, eps=eps)
    return None


def build_layers(
    atoms: list[Atom], source: Path, have_config: bool
) -> tuple[tuple[Layer, ...], list[str]]:
    """Turn atoms with attached tensors into canonical layers, linked from the config.

    ``have_config`` False means the atoms were inferred from names alone: activations are
    unknown and nothing is linked.
    """
    factory = _LayerFactory(source)
    notes: list[str] = []
    built: dict[str, _Built] = {}
    skipped: list[str] = []
    for atom in atoms:
        if atom.cls not in _UNIT:
            continue
        needed = [
            r
            for r in (expected_roles(atom.cls, atom.config if have_config else {}) or [])
            if r != "bias"
        ]
        if not atom.weights or any(role not in atom.weights for role in needed):
            skipped.append(atom.name)
            continue
        result = factory.build(atom, have_config)
        if result is not None:
            built[atom.name] = result
    if skipped:
        notes.append(
            f"{len(skipped)} layer(s) without their stored weights were not analysed: "
            + ", ".join(skipped[:5])
            + ("…" if len(skipped) > 5 else "")
        )
    layers: list[Layer] = []
    if not have_config:
        for atom in atoms:
            if atom.name in built:
                layers.extend(built[atom.name].layers)
        return tuple(layers), notes
    linker = _Linker(atoms, built)
    for atom in atoms:
        result = built.get(atom.name)
        if result is None:
            continue
        sources = linker.sources(atom.name)
        finals = _finish(atom, result, linker)
        for layer in result.layers:
            update: dict[str, Any] = {}
            if layer.name in result.entry:
                if atom.cls in _EMBEDDING:
                    update.update(inputs_from=(), linked_by=Link.CONFIG)
                elif sources is not None:
                    update.update(inputs_from=tuple(sources), linked_by=Link.CONFIG)
            if layer.name == result.last:
                update.update(finals)
            layers.append(replace(layer, **update) if update else layer)
    return mark_outputs(layers), notes


def _finish(atom: Atom, result: _Built, linker: _Linker) -> dict[str, Any]:
    """Activation and norm of the atom's output layer, from the layers that follow it."""
    if result.last is None:
        return {}
    last = next(layer for layer in result.layers if layer.name == result.last)
    out: dict[str, Any] = {}
    chain = linker.chain(atom.name)
    if last.activation is Activation.IDENTITY:
        for follower in chain:
            if follower.cls in _ACTIVATION_LAYERS:
                out["activation"] = _activation_layer(follower)
                break
        else:
            if not chain and linker.any_activation_consumer(atom.name):
                out["activation"] = Activation.UNKNOWN
    for follower in chain:
        if follower.cls in _RESHAPING:
            break
        if follower.cls in _BATCH_NORM | _LAYER_NORM | _GROUP_NORM:
            norm = _norm_from(follower, last.units, atom)
            if norm is not None:
                out["norm"] = norm
            break
    return out


# --------------------------------------------------------------------------------------------
# Optimizer hyperparameters


@dataclass(frozen=True)
class OptimizerConfig:
    """What a compile/training config says about the optimizer."""

    class_name: str
    config: Mapping[str, Any]

    @property
    def kind(self) -> str:
        """``adam``, ``adamw``, ``sgd``, ``rmsprop`` or the lowercase class name."""
        return self.class_name.lower()

    def number(self, key: str) -> float | None:
        """A numeric hyperparameter, or None."""
        return _number(self.config.get(key))

    def flag(self, key: str) -> bool:
        """A boolean hyperparameter (False when absent)."""
        return _flag(self.config, key, False)


def optimizer_config(value: Any) -> OptimizerConfig | None:
    """The optimizer of a ``training_config`` (``optimizer_config``) or ``compile_config``."""
    if isinstance(value, str):
        return OptimizerConfig(value.rsplit(">", 1)[-1], {})
    if not isinstance(value, dict):
        return None
    cls = class_name(value)
    if not cls:
        return None
    return OptimizerConfig(cls, _as_dict(value.get("config")))


def iter_trainable(atoms: Iterable[Atom]) -> list[Tensor]:
    """Trainable model tensors in Keras' variable order (model order, then each layer's own).

    Classes we do not know keep all their stored variables: the optimizer mapping checks
    counts and shapes exactly, so a wrong assumption shows up as a mismatch, never a guess.
    """
    out: list[Tensor] = []
    for atom in atoms:
        if not atom.trainable:
            continue
        frozen = non_trainable_roles(atom.cls)
        for role in atom.order:
            if role not in frozen:
                out.append(atom.weights[role])
    return out


# --------------------------------------------------------------------------------------------
# Optimizer state → model tensors

#: Keras 3 slot layouts we know from FORMATS.md, per variable in model order:
#: which moment each slot is (None: kept but not a moment).
_FIRST, _SECOND = "first", "second"


def _keras3_layout(opt: OptimizerConfig) -> tuple[str, ...] | str:
    """Per-variable slots of a Keras 3 optimizer, or a reason why it is not known."""
    kind = opt.kind
    if kind in ("adam", "adamw"):
        if opt.flag("amsgrad"):
            return "amsgrad adds velocity_hat slots whose position is not documented"
        return (_FIRST, _SECOND)
    if kind == "sgd":
        momentum = opt.number("momentum")
        if momentum is None:
            return "SGD momentum is not in the config"
        return (_FIRST,) if momentum > 0 else ()
    if kind == "rmsprop":
        if (opt.number("momentum") or 0.0) > 0 or opt.flag("centered"):
            return "RMSprop with momentum or centered keeps slots in an undocumented order"
        return (_SECOND,)
    return f"the slot layout of {opt.class_name} is not documented"


#: Named slots (legacy HDF5 files name them) → moment, per optimizer kind.
_NAMED_SLOTS: dict[str, dict[str, str | None]] = {
    "adam": {
        "velocity_hat": None,
        "momentum": _FIRST,
        "velocity": _SECOND,
        "vhat": None,
        "m": _FIRST,
        "v": _SECOND,
    },
    "adamw": {
        "velocity_hat": None,
        "momentum": _FIRST,
        "velocity": _SECOND,
        "vhat": None,
        "m": _FIRST,
        "v": _SECOND,
    },
    "sgd": {"momentum": _FIRST, "m": _FIRST},
    "rmsprop": {
        "average_gradient": _FIRST,
        "velocity": _SECOND,
        "momentum": None,
        "mg": _FIRST,
        "rms": _SECOND,
    },
}
_KNOWN_KINDS = {
    "adam": "adam",
    "adamw": "adamw",
    "sgd": "sgd",
    "rmsprop": "rmsprop",
    "adam_w": "adamw",
    "rm_sprop": "rmsprop",
}


@dataclass
class OptimizerResult:
    """A mapped optimizer state, or the note that says why there is none."""

    state: OptimizerState | None = None
    note: str | None = None


def _state(
    opt: OptimizerConfig | None,
    kind: str,
    slots: Mapping[str, dict[str, Tensor]],
    step: int | None,
    source: str,
    keras3: bool,
) -> OptimizerState:
    mapped = {
        name: OptimizerSlots(first_moment=s.get(_FIRST), second_moment=s.get(_SECOND))
        for name, s in slots.items()
        if s.get(_FIRST) is not None or s.get(_SECOND) is not None
    }
    beta1 = beta2 = eps = decay = None
    decoupled: bool | None = None
    if opt is not None:
        if kind in ("adam", "adamw"):
            beta1, beta2 = opt.number("beta_1"), opt.number("beta_2")
        eps = opt.number("epsilon") if kind != "sgd" else None
        decay = opt.number("weight_decay")
        if kind == "adamw" or (keras3 and decay):
            decoupled = True
    elif kind == "adamw":
        decoupled = True
    return OptimizerState(
        kind=kind,
        slots=mapped,
        step=step,
        beta1=beta1,
        beta2=beta2,
        eps=eps,
        weight_decay=decay,
        decoupled=decoupled,
        source=source,
    )


def read_step(tensor: Tensor) -> int | None:
    """The optimizer's iteration counter, when it is an integer scalar."""
    if tensor.shape not in ((), (1,)) or tensor.dtype[:1] not in ("i", "u"):
        return None
    value = np.asarray(tensor.read()).reshape(-1)
    return int(value[0]) if value.size == 1 else None


def _check(slot: Tensor, model: Tensor, where: str) -> str | None:
    if slot.shape != model.shape:
        return (
            f"{where} has shape {slot.shape} but the model tensor it would belong to "
            f"({model.name}) has {model.shape}"
        )
    return None


def map_keras3_ordered(
    variables: list[Tensor],
    trainable: list[Tensor],
    opt: OptimizerConfig | None,
    group_name: str | None,
    source: str,
) -> OptimizerResult:
    """Keras 3 ``optimizer/vars/<i>``: ``iteration``, ``learning_rate``, then per trainable
    variable in model order its slots (FORMATS.md). Every position is shape-checked."""
    if opt is None:
        base = re.sub(r"_\d+$", "", group_name or "")
        kind = _KNOWN_KINDS.get(base)
        if kind is None:
            return OptimizerResult(
                note=f"optimizer state in {source} not mapped: no config names the optimizer"
            )
        opt = OptimizerConfig(kind, {})
        layouts: list[tuple[str, ...]] = (
            [(_FIRST, _SECOND)]
            if kind in ("adam", "adamw")
            else [(_FIRST,), ()]
            if kind == "sgd"
            else [(_SECOND,)]
        )
        known_config = False
    else:
        layout = _keras3_layout(opt)
        if isinstance(layout, str):
            return OptimizerResult(note=f"optimizer state in {source} not mapped: {layout}")
        layouts = [layout]
        known_config = True
    n = len(trainable)
    fits = [lay for lay in layouts if len(variables) - len(lay) * n in (1, 2)]
    if len(fits) != 1:
        return OptimizerResult(
            note=f"optimizer state in {source} not mapped: {len(variables)} variables do not "
            f"match {n} trainable model variables with a known {opt.kind} layout"
        )
    layout = fits[0]
    prefix = len(variables) - len(layout) * n
    head = variables[:prefix]
    if (
        head[0].shape != ()
        or head[0].dtype[:1] not in ("i", "u")
        or any(v.shape != () for v in head[1:])
    ):
        return OptimizerResult(
            note=f"optimizer state in {source} not mapped: it does not start with the "
            "iteration counter and learning rate"
        )
    slots: dict[str, dict[str, Tensor]] = {}
    for i, model in enumerate(trainable):
        for j, which in enumerate(layout):
            slot = variables[prefix + i * len(layout) + j]
            problem = _check(slot, model, f"optimizer variable {slot.name}")
            if problem:
                return OptimizerResult(note=f"optimizer state in {source} not mapped: {problem}")
            slots.setdefault(model.name, {})[which] = slot
    kind = opt.kind
    return OptimizerResult(
        _state(opt if known_config else None, kind, slots, read_step(head[0]), source, True)
    )


def map_keras3_named(
    names: list[str],
    variables: list[Tensor],
    trainable: list[Tensor],
    opt: OptimizerConfig | None,
    source: str,
) -> OptimizerResult:
    """Keras 3 legacy ``optimizer_weights``: ``<opt>/iteration``, ``<opt>/learning_rate``, then
    ``<opt>/<var path with _>_<slot>``. The names are ambiguous, so each slot kind is mapped by
    order onto the trainable variables; the suffix only says which slot it is."""
    if opt is None:
        return OptimizerResult(note=f"optimizer state in {source} not mapped: no training config")
    kind = opt.kind
    table = _NAMED_SLOTS.get(kind)
    if table is None:
        return OptimizerResult(
            note=f"optimizer state in {source} not mapped: {opt.class_name} slots are not documented"
        )
    step: int | None = None
    groups: dict[str, list[Tensor]] = {}
    for name, tensor in zip(names, variables, strict=True):
        leaf = name.rsplit("/", 1)[-1]
        if leaf == "iteration":
            step = read_step(tensor)
            continue
        if leaf == "learning_rate":
            continue
        suffix = next(
            (s for s in sorted(table, key=len, reverse=True) if leaf.endswith(f"_{s}")), None
        )
        if suffix is None:
            return OptimizerResult(
                note=f"optimizer state in {source} not mapped: {name!r} is no known {kind} slot"
            )
        groups.setdefault(suffix, []).append(tensor)
    slots: dict[str, dict[str, Tensor]] = {}
    for suffix, tensors in groups.items():
        if len(tensors) != len(trainable):
            return OptimizerResult(
                note=f"optimizer state in {source} not mapped: {len(tensors)} {suffix} slots for "
                f"{len(trainable)} trainable model variables"
            )
        for slot, model in zip(tensors, trainable, strict=True):
            problem = _check(slot, model, f"optimizer variable {slot.name}")
            if problem:
                return OptimizerResult(note=f"optimizer state in {source} not mapped: {problem}")
            which = table[suffix]
            if which is not None:
                slots.setdefault(model.name, {})[which] = slot
    return OptimizerResult(_state(opt, kind, slots, step, source, True))


def map_tf_keras_named(
    names: list[str],
    variables: list[Tensor],
    by_variable: Mapping[str, Tensor | None],
    opt: OptimizerConfig | None,
    source: str,
) -> OptimizerResult:
    """Keras 2 / tf_keras ``optimizer_weights`` named after the model variable:
    ``Adam/m/<var>:0`` (tf_keras optimizers) or ``Adam/<var>/m:0`` (legacy optimizers).

    ``by_variable`` maps a model variable name (``dense/kernel``) to its tensor, or None when
    two tensors share the name (then the slot cannot be placed)."""
    scope = names[0].split("/", 1)[0] if names and "/" in names[0] else ""
    if opt is None:
        base = scope.lower()
        if base not in _NAMED_SLOTS:
            return OptimizerResult(
                note=f"optimizer state in {source} not mapped: no training config"
            )
        opt = OptimizerConfig(base, {})
    kind = opt.kind
    table = _NAMED_SLOTS.get(kind)
    if table is None:
        return OptimizerResult(
            note=f"optimizer state in {source} not mapped: {opt.class_name} slots are not documented"
        )
    step: int | None = None
    slots: dict[str, dict[str, Tensor]] = {}
    for name, tensor in zip(names, variables, strict=True):
        bare = re.sub(r":\d+$", "", name)
        parts = bare.split("/")
        if parts[-1] in ("iter", "iteration", "iterations"):
            step = read_step(tensor)
            continue
        if len(parts) < 3:
            if parts[-1] in ("learning_rate", "lr", "beta_1", "beta_2", "decay", "momentum", "rho"):
                continue
            return OptimizerResult(
                note=f"optimizer state in {source} not mapped: {name!r} names no variable"
            )
        if parts[1] in table and "/".join(parts[2:]) in by_variable:
            slot_name, variable = parts[1], "/".join(parts[2:])
        elif parts[-1] in table and "/".join(parts[1:-1]) in by_variable:
            slot_name, variable = parts[-1], "/".join(parts[1:-1])
        else:
            return OptimizerResult(
                note=f"optimizer state in {source} not mapped: {name!r} matches no model variable"
            )
        model = by_variable[variable]
        if model is None:
            return OptimizerResult(
                note=f"optimizer state in {source} not mapped: two model tensors are named {variable!r}"
            )
        problem = _check(tensor, model, f"optimizer variable {name!r}")
        if problem:
            return OptimizerResult(note=f"optimizer state in {source} not mapped: {problem}")
        which = table[slot_name]
        if which is not None:
            if which in slots.get(model.name, {}):
                return OptimizerResult(
                    note=f"optimizer state in {source} not mapped: two {slot_name} slots for {variable!r}"
                )
            slots.setdefault(model.name, {})[which] = tensor
    return OptimizerResult(_state(opt, kind, slots, step, source, keras3=False))


def map_keras20(
    names: list[str],
    variables: list[Tensor],
    trainable: list[tuple[str, Tensor]],
    opt: OptimizerConfig | None,
    source: str,
) -> OptimizerResult:
    """Keras 2.0.x ``iterations`` + ``Variable_N:0``: all first moments, then all second
    moments, each over the trainable weights **sorted by variable name** (FORMATS.md)."""
    if opt is None or opt.kind not in ("adam", "sgd"):
        what = opt.class_name if opt is not None else "an unnamed optimizer"
        return OptimizerResult(
            note=f"optimizer state in {source} not mapped: Keras 2.0 layout of {what} is not documented"
        )
    layout = (_FIRST, _SECOND) if opt.kind == "adam" else (_FIRST,)
    ordered = [tensor for _, tensor in sorted(trainable, key=lambda item: item[0])]
    n = len(ordered)
    if len(variables) != 1 + len(layout) * n:
        return OptimizerResult(
            note=f"optimizer state in {source} not mapped: {len(variables)} variables for {n} "
            f"trainable model variables"
        )
    slots: dict[str, dict[str, Tensor]] = {}
    for j, which in enumerate(layout):
        for i, model in enumerate(ordered):
            slot = variables[1 + j * n + i]
            problem = _check(slot, model, f"optimizer variable {names[1 + j * n + i]!r}")
            if problem:
                return OptimizerResult(note=f"optimizer state in {source} not mapped: {problem}")
            slots.setdefault(model.name, {})[which] = slot
    return OptimizerResult(
        _state(opt, opt.kind, slots, read_step(variables[0]), source, keras3=False)
    )
