"""A Keras model config flattened into atoms: one :class:`Atom` per non-container layer, nested
models and wrapped layers (``TimeDistributed``, ``Bidirectional``) opened up, each with the
atoms that feed it (``inbound_nodes`` resolved across nested models).

Both Keras readers (legacy HDF5 and ``.keras`` archives) attach the stored tensors to the atoms
and hand them to :mod:`steelyard.loaders.keras.layers` (layers) and
:mod:`steelyard.loaders.keras.optimizer` (optimizer state). The config is the only source of
links, activations, norms, constraints and regularizers; without one we say less. What the
config's classes and values mean is in :mod:`~steelyard.loaders.keras.layer_classes`,
:mod:`~steelyard.loaders.keras.variables` and :mod:`~steelyard.loaders.keras.layer_settings`.

Layouts and orders follow /work/shared/FORMATS.md ("Keras"): Dense ``[in, out]``, Conv
``[k…, in/g, out]``, ConvTranspose ``[k…, out, in]``, DepthwiseConv ``[k…, C, dm]`` with
channel ``c·dm+m``, LSTM gates ``i, f, c, o``, GRU gates ``z, r, h``.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from steelyard.errors import LoadError
from steelyard.graph import Tensor
from steelyard.loaders.keras.config_values import MAX_DEPTH, as_dict, class_name
from steelyard.loaders.keras.inbound import Fail, inbound_refs, output_refs
from steelyard.loaders.keras.layer_classes import (
    BIDIRECTIONAL_MERGE,
    CONTAINERS,
    KEY_CLASS,
    WRAPPERS,
    to_snake_case,
)

#: More layers than this in one config is refused.
MAX_LAYERS = 200_000


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


def _own_trainable(parent: bool, config: Mapping[str, Any]) -> bool:
    """A layer trains when its parent does and its own config does not say otherwise."""
    return parent and config.get("trainable", True) is not False


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
                key = to_snake_case(KEY_CLASS.get(lcls, lcls))
                if key in used:
                    used[key] += 1
                    key = f"{key}_{used[key]}"
                else:
                    used[key] = 0
                key_path = f"{key_prefix}/layers/{key}" if key_prefix else f"layers/{key}"
            own = lcfg if isinstance(lcfg, dict) else {}
            layer_trainable = _own_trainable(trainable, own)
            if sequential:
                refs = [previous] if previous is not None else []
            else:
                refs = inbound_refs(entry, name, self.fail)
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
                index = self._add_atom(name, lcls, own, trainable, key_path, top or name, links)
                self.paths.append(path)
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
            scope.outputs = output_refs(conf.get("output_layers", []), "output_layers", self.fail)
            for ref, _ in output_refs(conf.get("input_layers", []), "input_layers", self.fail):
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

    def _add_atom(
        self,
        name: str,
        cls: str,
        config: Mapping[str, Any],
        parent_trainable: bool,
        key_path: str,
        top: str,
        links: list[tuple[_Scope, str, int]],
    ) -> int:
        """Record one plain layer of the config as an atom fed by ``links``; its index."""
        index = len(self.atoms)
        self.atoms.append(
            Atom(
                name=name,
                raw_name=name,
                cls=cls,
                config=config,
                trainable=_own_trainable(parent_trainable, config),
                key_path=key_path,
                top=top,
            )
        )
        self.pending.append(_Pending(index, list(links)))
        return index

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
        index = self._add_atom(name, cls, config, trainable, key_path, top, links)
        self.display[index] = f"{wrapper}/{name}"
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
                preds[self.atoms[_resolve(scope, ref, index, self.fail)].name] = None
            self.atoms[pending.atom].preds = [*preds, *(self.atoms[i].name for i in pending.direct)]
        return ModelGraph(self.atoms, model_class, model_name, self.notes)


def _resolve(scope: _Scope, name: str, index: int, fail: Fail, depth: int = 0) -> int:
    """The atom behind reference ``(name, index)`` in ``scope``, through nested models' outputs."""
    if depth > MAX_DEPTH:
        raise fail(f"reference to {name!r} nests too deeply")
    entry = scope.entries.get(name)
    if entry is None:
        raise fail(f"a layer refers to {name!r}, which is not in its model")
    if entry.atom is not None:
        return entry.atom
    inner = entry.scope
    assert inner is not None
    if not 0 <= index < len(inner.outputs):
        raise fail(f"a layer refers to output {index} of model {name!r}, which lacks it")
    ref, sub = inner.outputs[index]
    return _resolve(inner, ref, sub, fail, depth + 1)


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
