"""Legacy Keras HDF5 files: whole models (Keras 2 and 3, ``model_weights`` with the config in
the ``model_config`` attribute) and Keras 2 weights-only ``.h5`` (``layer_names`` and
``weight_names`` attributes at the root). Tensor names are the dataset paths below
``model_weights`` (or the root); all HDF5 access goes through the checked
:class:`~steelyard.loaders.keras.hdf5_access.H5Store`.
"""

from __future__ import annotations

import re
from typing import Any

from steelyard.graph import OptimizerState, Tensor, TensorRole
from steelyard.loaders.base import parse_json
from steelyard.loaders.keras import optimizer as ko
from steelyard.loaders.keras.hdf5_access import H5Store
from steelyard.loaders.keras.layer_classes import class_from_name, class_from_shapes, unit_classes
from steelyard.loaders.keras.layers import build_layers
from steelyard.loaders.keras.model_config import Atom, parse_model
from steelyard.loaders.keras.variables import (
    expected_roles,
    role_of_name,
)
from steelyard.loaders.keras.weights_h5 import WeightsRead


def _json_attr(store: H5Store, f: Any, key: str) -> Any:
    text = store.attr_text(f, key)
    return None if text is None else parse_json(text, store.source, key)


def read_legacy(store: H5Store, f: Any) -> WeightsRead:
    """Tensors, layers, optimizer state and notes of a legacy Keras HDF5 file."""
    notes: list[str] = []
    version = store.attr_text(f, "keras_version") or ""
    if "model_weights" in f:
        root = "model_weights"
        container = store.group(f, root)
    else:
        root, container = "", f
    layer_names = store.attr_strings(container, "layer_names")
    if layer_names is None:
        raise store.fail("has no layer_names attribute, so it is not a Keras weights file")
    if len(set(layer_names)) != len(layer_names):
        raise store.fail("lists a layer twice in layer_names")
    groups: list[tuple[str, list[tuple[str, Tensor]]]] = []
    tensors: dict[str, Tensor] = {}
    extra = ["top_level_model_weights"] if root and "top_level_model_weights" in container else []
    for layer in [*layer_names, *[e for e in extra if e not in layer_names]]:
        gpath = f"{root}/{layer}" if root else layer
        group = store.group(f, gpath)
        weight_names = store.attr_strings(group, "weight_names") or []
        items: list[tuple[str, Tensor]] = []
        for weight in weight_names:
            name = f"{layer}/{weight}"
            if name in tensors:
                raise store.fail(f"lists weight {name!r} twice")
            tensor = store.tensor(f, f"{gpath}/{weight}", name)
            tensors[name] = tensor
            items.append((weight, tensor))
        groups.append((layer, items))
    config = _json_attr(store, f, "model_config")
    training = _json_attr(store, f, "training_config")
    graph = parse_model(config, store.source) if config is not None else None
    if config is not None and graph is None:
        notes.append("the model config does not list its layers (subclassed model?)")
    if graph is not None:
        notes.extend(graph.notes)
        atoms = graph.atoms
        _attach_legacy(atoms, groups, notes, have_config=True)
    else:
        atoms = [atom for layer, items in groups for atom in _legacy_atoms(layer, items)]
        _attach_legacy(atoms, groups, notes, have_config=False)
        for atom in atoms:
            if not atom.cls and atom.weights:
                atom.cls = class_from_shapes(atom.weights) or ""
        if any(atom.cls in unit_classes() for atom in atoms):
            notes.append(
                "no model config: layer kinds were inferred from default layer names; "
                "activations and links are unknown"
            )
    layers, more, metadata = build_layers(atoms, store.source, graph is not None)
    notes.extend(more)
    optimizer = None
    if "optimizer_weights" in f:
        opt = ko.optimizer_config(
            training.get("optimizer_config") if isinstance(training, dict) else None
        )
        optimizer, note = _legacy_optimizer(store, f, atoms, groups, opt, version)
        if note:
            notes.append(note)
    return (tensors, layers, optimizer, notes), metadata


def _legacy_atoms(layer: str, items: list[tuple[str, Tensor]]) -> list[Atom]:
    """Atoms of one layer group of a legacy file without a config.

    A group whose name is no unit class but whose weight names run through inner layers
    (``time_distributed/dense/kernel``, ``bidirectional/forward_lstm/lstm_cell/kernel``) is
    a wrapper: one atom per inner layer, its class from the inner layer's default name.
    """
    own = class_from_name(layer) or ""
    found: dict[str, None] = {}  # ordered set: linear in the layer's weights
    for weight, _ in items:
        parts = [p for p in weight.split("/")[:-1] if p != layer and not p.endswith("_cell")]
        if parts:
            found[parts[-1]] = None
    owners = list(found)
    if own or not owners:
        return [Atom(layer, layer, own, {}, True, "", layer)]
    return [
        Atom(f"{layer}/{owner}", owner, class_from_name(owner) or "", {}, True, "", layer)
        for owner in owners
    ]


def _attach_legacy(
    atoms: list[Atom],
    groups: list[tuple[str, list[tuple[str, Tensor]]]],
    notes: list[str],
    have_config: bool,
) -> None:
    by_top: dict[str, list[Atom]] = {}
    for atom in atoms:
        by_top.setdefault(atom.top, []).append(atom)
    orphans: list[str] = []
    for layer, items in groups:
        if not items:
            continue
        members = by_top.get(layer, [])
        if len(members) == 1 and members[0].raw_name == layer:
            _assign_named(members[0], items, have_config, notes)
            continue
        if not members:
            orphans.append(layer)
            continue
        # A nested model: each weight belongs to the sub-layer named in its path.
        by_raw: dict[str, list[Atom]] = {}
        for atom in members:
            by_raw.setdefault(atom.raw_name, []).append(atom)
        split: dict[str, list[tuple[str, Tensor]]] = {}
        owners: dict[str, Atom] = {}
        # A Keras 2 TimeDistributed names its layer's weights after itself
        # (``time_distributed/kernel:0``): with one inner layer, they are that layer's.
        holders = [a.raw_name for a in members if a.raw_name != layer]
        for weight, tensor in items:
            parts = weight.split("/")[:-1]
            owner = next((p for p in reversed(parts) if p in by_raw), None)
            if (owner is None or owner == layer) and len(holders) == 1:
                owner = holders[0]
            if owner is None or len(by_raw[owner]) != 1:
                orphans.append(f"{layer}/{weight}")
                continue
            owners[owner] = by_raw[owner][0]
            split.setdefault(owner, []).append((weight, tensor))
        for owner, owned in split.items():
            _assign_named(owners[owner], owned, have_config, notes)
    if orphans:
        notes.append(
            "stored weights not attributed to a config layer: "
            + ", ".join(orphans[:5])
            + ("…" if len(orphans) > 5 else "")
        )


def _assign_named(
    atom: Atom, items: list[tuple[str, Tensor]], have_config: bool, notes: list[str]
) -> None:
    roles = [role_of_name(atom.cls, weight) for weight, _ in items]
    full = expected_roles(atom.cls, {})
    expected = expected_roles(atom.cls, atom.config if have_config else None)
    if full is not None and len(set(roles)) == len(roles) and set(roles) <= set(full):
        pass
    elif expected is not None and len(expected) == len(items):
        roles = list(expected)  # names unfamiliar, but Keras saves in its own order
    else:
        if full is not None:
            notes.append(
                f"layer {atom.name!r}: stored weights {[w for w, _ in items]} do not match {atom.cls}"
            )
        seen: dict[str, int] = {}
        unique = []
        for role in roles:
            seen[role] = seen.get(role, 0) + 1
            unique.append(role if seen[role] == 1 else f"{role}#{seen[role]}")
        roles = unique
        if full is not None:
            atom.cls = ""  # do not build a layer from weights we could not place
    atom.weights = {role: tensor for role, (_, tensor) in zip(roles, items, strict=True)}
    atom.order = roles


def _legacy_optimizer(
    store: H5Store,
    f: Any,
    atoms: list[Atom],
    groups: list[tuple[str, list[tuple[str, Tensor]]]],
    opt: ko.OptimizerConfig | None,
    version: str,
) -> tuple[OptimizerState | None, str | None]:
    source = "optimizer_weights"
    group = store.group(f, source)
    names = store.attr_strings(group, "weight_names") or []
    if not names:
        return None, None
    if len(set(names)) != len(names):
        raise store.fail("lists an optimizer weight twice")
    variables = [
        store.tensor(f, f"{source}/{name}", f"{source}/{name}", TensorRole.OPTIMIZER)
        for name in names
    ]
    keras2 = version.startswith(("1.", "2.")) or (not version and any(":" in n for n in names))
    if not keras2:
        trainable = ko.iter_trainable(atoms)
        result = ko.map_keras3_named(names, variables, trainable, opt, source)
        return result.state, result.note
    if "iterations" in names[0] and all(re.fullmatch(r"Variable(_\d+)?:\d+", n) for n in names[1:]):
        trainable = ko.iter_trainable(atoms)
        weight_of = {t.name: w for _, items in groups for w, t in items}
        pairs = [(weight_of.get(t.name, t.name), t) for t in trainable]
        result = ko.map_keras20(names, variables, pairs, opt, source)
        return result.state, result.note
    by_variable: dict[str, Tensor | None] = {}
    for _, items in groups:
        for weight, tensor in items:
            key = re.sub(r":\d+$", "", weight)
            by_variable[key] = None if key in by_variable else tensor
    result = ko.map_tf_keras_named(names, variables, by_variable, opt, source)
    return result.state, result.note
