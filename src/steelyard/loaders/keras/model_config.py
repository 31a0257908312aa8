"""What the Keras loaders share: config parsing, variable roles, canonical orientation.

Both Keras readers (legacy HDF5 and ``.keras`` archives) turn the model config into a flat
list of :class:`Atom` objects (one per non-container layer, nested models opened up), attach
the stored tensors to them, and hand them to :mod:`steelyard.loaders.keras.layers` (layers)
and :mod:`steelyard.loaders.keras.optimizer` (optimizer state). The config is the only
source of links, activations, norms, constraints and regularizers; without one we say less.

Layouts and orders follow /work/shared/FORMATS.md ("Keras"): Dense ``[in, out]``, Conv
``[k…, in/g, out]``, ConvTranspose ``[k…, out, in]``, DepthwiseConv ``[k…, C, dm]`` with
channel ``c·dm+m``, LSTM gates ``i, f, c, o``, GRU gates ``z, r, h``.
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from steelyard.errors import LoadError
from steelyard.graph import (
    Activation,
    Constraint,
    Regularizer,
    Tensor,
)

#: Nesting deeper than this is refused (bounded recursion on hostile configs).
MAX_DEPTH = 32
#: More layers than this in one config is refused.
MAX_LAYERS = 200_000


def _words(text: str) -> list[str]:
    return text.split()


CONTAINERS = frozenset({"Sequential", "Functional", "Model"})
#: Layers that hold other layers' weights under an attribute (``layer``, ``forward_layer``,
#: ``backward_layer``): ``.weights.h5`` stores them at ``<key>/<attribute>/vars``.
WRAPPERS = frozenset({"TimeDistributed", "Bidirectional"})
WRAPPED_ATTRIBUTES = ("layer", "forward_layer", "backward_layer")
#: Bidirectional ``merge_mode`` → the merge it performs (None: outputs kept apart).
BIDIRECTIONAL_MERGE = {"concat": "Concatenate", "sum": "Add", "ave": "Average", "mul": "Multiply"}

DENSE = frozenset({"Dense"})
CONV: dict[str, int] = {
    "Conv1D": 1,
    "Conv2D": 2,
    "Conv3D": 3,
    "Convolution1D": 1,
    "Convolution2D": 2,
    "Convolution3D": 3,
}
CONV_T: dict[str, int] = {
    "Conv1DTranspose": 1,
    "Conv2DTranspose": 2,
    "Conv3DTranspose": 3,
    "Convolution1DTranspose": 1,
    "Convolution2DTranspose": 2,
    "Convolution3DTranspose": 3,
    "Deconvolution2D": 2,
    "Deconvolution3D": 3,
}
DEPTHWISE: dict[str, int] = {"DepthwiseConv1D": 1, "DepthwiseConv2D": 2}
SEPARABLE: dict[str, int] = {
    "SeparableConv1D": 1,
    "SeparableConv2D": 2,
    "SeparableConvolution1D": 1,
    "SeparableConvolution2D": 2,
}
EMBEDDING = frozenset({"Embedding"})
#: Recurrent classes → gate order along the kernel's last axis.
RNN_GATES: dict[str, tuple[str, ...]] = {
    "LSTM": ("i", "f", "c", "o"),
    "GRU": ("z", "r", "h"),
    "SimpleRNN": ("h",),
}
BATCH_NORM = frozenset({"BatchNormalization", "SyncBatchNormalization"})
LAYER_NORM = frozenset({"LayerNormalization"})
GROUP_NORM = frozenset({"GroupNormalization"})
ACTIVATION_LAYERS = frozenset(
    {"Activation", "ReLU", "LeakyReLU", "Softmax", "ELU", "PReLU", "ThresholdedReLU"}
)
#: Layers that keep a unit's identity (channel c in → channel c out), so links look through.
PASS = (
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
    | BATCH_NORM
    | LAYER_NORM
    | GROUP_NORM
    | ACTIVATION_LAYERS
)
#: Layers that combine several inputs; a consumer sees all their producers' units.
MERGE = frozenset({"Concatenate", "Add", "Average", "Maximum", "Minimum", "Multiply", "Subtract"})
#: Pass-through layers that change which positions hold a unit, so a norm after them is not
#: a per-unit norm any more.
RESHAPING = frozenset({"Flatten", "RepeatVector"})

ACTIVATIONS: dict[str, Activation] = {
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
        set(DENSE)
        | set(CONV)
        | set(CONV_T)
        | set(DEPTHWISE)
        | set(SEPARABLE)
        | set(EMBEDDING)
        | set(RNN_GATES)
    )


UNIT = unit_classes()


def to_snake_case(name: str) -> str:
    """Keras' own naming rule for ``.weights.h5`` keys (``Conv2DTranspose`` → ``conv2d_transpose``)."""
    name = re.sub(r"\W+", "", name)
    name = re.sub("(.)([A-Z][a-z]+)", r"\1_\2", name)
    return re.sub("([a-z])([A-Z])", r"\1_\2", name).lower()


#: snake_case family → class, for files without a config (default layer names / keys).
FAMILY: dict[str, str] = {
    to_snake_case(c): c
    for c in sorted(set(UNIT) | BATCH_NORM | LAYER_NORM | GROUP_NORM | {"PReLU"} | set(CONTAINERS))
}


def class_from_name(name: str) -> str | None:
    """The class a default Keras name implies: ``dense_3`` → ``Dense``; None when unknown.

    The names Keras gives wrapped layers count too: ``forward_lstm`` / ``backward_gru_2``
    (Bidirectional's halves) and ``lstm_cell`` (an RNN's cell) name their RNN class.
    """
    family = re.sub(r"_\d+$", "", name)
    family = re.sub(r"^(forward|backward)_", "", family)
    family = re.sub(r"_\d+$", "", family)
    if family.endswith("_cell") and family[: -len("_cell")] in ("lstm", "gru", "simple_rnn"):
        family = family[: -len("_cell")]
    return FAMILY.get(family)


def class_from_shapes(weights: Mapping[str, Tensor]) -> str | None:
    """The unit class that named weights' shapes leave no doubt about, for files without a
    config whose layer names say nothing (a Keras 2 ``TimeDistributed`` stores its Dense
    as ``time_distributed/kernel:0``).

    Only unambiguous cases: a 2-D ``kernel`` with a matching ``bias`` is a Dense (a 2-D
    kernel alone could be an embedding-like table, but Keras names those ``embeddings``);
    ``kernel`` + ``recurrent_kernel`` ``[H, G·H]`` is an LSTM (G=4), GRU (3) or SimpleRNN (1).
    Convolution kernels are never guessed: ``[k, a, b]`` fits a Conv, a ConvTranspose and a
    DepthwiseConv alike.
    """
    roles = set(weights)
    kernel = weights.get("kernel")
    bias = weights.get("bias")
    if kernel is None:
        return None
    if roles == {"kernel", "bias"} and len(kernel.shape) == 2 and bias is not None:
        return "Dense" if bias.shape == (kernel.shape[1],) else None
    recurrent = weights.get("recurrent_kernel")
    if recurrent is not None and roles <= {"kernel", "recurrent_kernel", "bias"}:
        if len(recurrent.shape) != 2 or len(kernel.shape) != 2 or not recurrent.shape[0]:
            return None
        hidden, width = recurrent.shape
        gates = width // hidden if width % hidden == 0 else 0
        cls = {4: "LSTM", 3: "GRU", 1: "SimpleRNN"}.get(gates)
        return cls if kernel.shape[1] == width else None
    return None


def natural_key(text: str) -> list[Any]:
    """Sort key that orders ``vars/10`` after ``vars/9``."""
    # Numbers compare by length once leading zeros are gone, then digit by digit: the order of
    # int() without converting (which is quadratic in the digits and refused past 4300).
    out: list[Any] = []
    for part in re.split(r"([0-9]+)", text):
        if part.isascii() and part.isdigit():
            digits = part.lstrip("0") or "0"
            out.append((0, len(digits), digits))
        else:
            out.append((1, part))
    return out


# --------------------------------------------------------------------------------------------
# JSON values (parsing itself is :func:`steelyard.loaders.base.parse_json`)


def as_dict(value: Any) -> dict[str, Any]:
    return value if isinstance(value, dict) else {}


def number(value: Any) -> float | None:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return None
    number = float(value)
    return number if math.isfinite(number) else None


def flag(config: Mapping[str, Any], key: str, default: bool) -> bool:
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
    direct: list[int] = field(default_factory=list)
    """Atoms feeding it that are no config layer of their own (a Bidirectional's halves)."""


class _ConfigWalker:
    """Builds atoms from a model config, resolving ``inbound_nodes`` across nested models."""

    def __init__(self, source: Path) -> None:
        self.source = source
        self.atoms: list[Atom] = []
        self.paths: list[tuple[str, ...]] = []
        self.pending: list[_Pending] = []
        self.notes: list[str] = []
        self.display: dict[int, str] = {}
        """Atom index → display name, for wrapped layers (``wrapper/inner``)."""

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
            wrapped = (
                self._wrapper(lcls, own, name, key_path, top or name, layer_trainable, links)
                if lcls in WRAPPERS
                else None
            )
            if wrapped is not None:
                scope.entries[name] = _Entry(atom=wrapped)
                self.paths.extend([path] * (len(self.atoms) - len(self.paths)))
            elif lcls in CONTAINERS and (isinstance(lcfg, list) or "layers" in lcfg):
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

    def _wrapped_atom(
        self,
        entry: Any,
        wrapper: str,
        name: str | None,
        key_path: str,
        top: str,
        trainable: bool,
        links: list[tuple[_Scope, str, int]],
    ) -> int | None:
        """One layer held by a wrapper, as an atom fed by the wrapper's inputs; None when it
        is not a plain layer (a model or another wrapper: not opened)."""
        entry = as_dict(entry)
        cls = class_name(entry)
        config = as_dict(entry.get("config"))
        name = name or config.get("name")
        if not cls or cls in CONTAINERS or cls in WRAPPERS or not isinstance(name, str):
            return None
        index = len(self.atoms)
        self.atoms.append(
            Atom(
                name=name,
                raw_name=name,
                cls=cls,
                config=config,
                trainable=trainable and config.get("trainable", True) is not False,
                key_path=key_path,
                top=top,
            )
        )
        self.display[index] = f"{wrapper}/{name}"
        self.pending.append(_Pending(index, list(links)))
        return index

    def _wrapper(
        self,
        cls: str,
        config: Mapping[str, Any],
        name: str,
        key_path: str,
        top: str,
        trainable: bool,
        links: list[tuple[_Scope, str, int]],
    ) -> int | None:
        """Atoms for a ``TimeDistributed`` or ``Bidirectional`` layer; the index of the atom
        whose output is the wrapper's, or None to keep the wrapper opaque.

        TimeDistributed applies its layer at every step with the same weights, so its units
        are the wrapped layer's. Bidirectional runs a forward and a backward copy (Keras
        names them ``forward_<name>`` / ``backward_<name>``, as it does at build time) and
        merges their outputs by ``merge_mode``; a merge atom stands for that.
        """
        start = len(self.atoms)
        if cls == "TimeDistributed":
            index = self._wrapped_atom(
                config.get("layer"), name, None, f"{key_path}/layer", top, trainable, links
            )
            if index is None:
                self.notes.append(f"the layer wrapped by {name!r} was not opened")
            return index
        forward = as_dict(config.get("layer"))
        backward = as_dict(config.get("backward_layer")) or forward
        base = as_dict(forward.get("config")).get("name")
        back_name = as_dict(backward.get("config")).get("name") if backward is not forward else None
        if not isinstance(base, str):
            self.notes.append(f"the layers wrapped by {name!r} were not opened")
            return None
        stem = base.removeprefix("forward_")
        indices = [
            self._wrapped_atom(
                forward, name, f"forward_{stem}", f"{key_path}/forward_layer", top, trainable, links
            ),
            self._wrapped_atom(
                backward,
                name,
                back_name if isinstance(back_name, str) else f"backward_{stem}",
                f"{key_path}/backward_layer",
                top,
                trainable,
                links,
            ),
        ]
        if None in indices:
            del self.atoms[start:], self.pending[start:]
            for index in range(start, start + 2):
                self.display.pop(index, None)
            self.notes.append(f"the layers wrapped by {name!r} were not opened")
            return None
        merge = BIDIRECTIONAL_MERGE.get(str(config.get("merge_mode", "concat")), "Bidirectional")
        index = len(self.atoms)
        self.atoms.append(Atom(name, name, merge, {}, trainable, "", top))
        self.pending.append(_Pending(index, [], [i for i in indices if i is not None]))
        return index

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
        return list(dict.fromkeys(refs))  # first occurrences, in order; linear

    def _history(self, value: Any, refs: list[tuple[str, int]], name: str, depth: int) -> None:
        if depth > MAX_DEPTH:
            raise self.fail(f"layer {name!r}: inbound arguments nested too deeply")
        if isinstance(value, list):
            for item in value:
                self._history(item, refs, name, depth + 1)
        elif isinstance(value, dict):
            if value.get("class_name") == "__keras_tensor__":
                history = as_dict(value.get("config")).get("keras_history")
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
        # The last serial tried per base name, so that many equal names stay linear.
        serials: dict[str, int] = {}
        for index, (atom, path) in enumerate(zip(self.atoms, self.paths, strict=True)):
            name = self.display.get(index, atom.raw_name)
            if counts[atom.raw_name] > 1 and path and index not in self.display:
                name = "/".join((*path, name))
            base, serial = name, serials.get(name, 1)
            while name in taken:
                serial += 1
                name = f"{base}#{serial}"
            serials[base] = serial
            taken.add(name)
            atom.name = name
        for pending in self.pending:
            preds: dict[str, None] = {}  # ordered set
            for scope, ref, index in pending.refs:
                preds[self.atoms[self.resolve(scope, ref, index)].name] = None
            self.atoms[pending.atom].preds = [*preds, *(self.atoms[i].name for i in pending.direct)]
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
    bias = ["bias"] if flag(conf, "use_bias", True) else []
    if cls in DENSE or cls in CONV or cls in CONV_T or cls in DEPTHWISE:
        return ["kernel", *bias]
    if cls in SEPARABLE:
        return ["depthwise_kernel", "pointwise_kernel", *bias]
    if cls in EMBEDDING:
        return ["embeddings"]
    if cls in RNN_GATES:
        return ["kernel", "recurrent_kernel", *bias]
    if cls in BATCH_NORM:
        affine = _affine(conf)
        return [*affine, "moving_mean", "moving_variance"]
    if cls in LAYER_NORM or cls in GROUP_NORM:
        return _affine(conf)
    if cls == "PReLU":
        return ["alpha"]
    if cls in PASS or cls in MERGE or cls == "InputLayer":
        return []
    return None


def _affine(conf: Mapping[str, Any]) -> list[str]:
    roles = []
    if flag(conf, "scale", True):
        roles.append("gamma")
    if flag(conf, "center", True):
        roles.append("beta")
    return roles


def non_trainable_roles(cls: str) -> frozenset[str]:
    """Variables Keras creates with ``trainable=False`` (no optimizer slots)."""
    if cls in BATCH_NORM:
        return frozenset({"moving_mean", "moving_variance"})
    return frozenset()


def role_of_name(cls: str, weight_name: str) -> str:
    """The variable role a stored weight name carries (``dense/kernel:0`` → ``kernel``)."""
    leaf = weight_name.rsplit("/", 1)[-1]
    leaf = re.sub(r":\d+$", "", leaf)
    if cls in DEPTHWISE and leaf == "depthwise_kernel":
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
    return ACTIVATIONS.get(value.rsplit(".", 1)[-1].lower(), Activation.UNKNOWN)


def activation_layer(atom: Atom) -> Activation:
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


# --------------------------------------------------------------------------------------------
# Canonical views


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
