"""Keras HDF5 files: legacy whole models (Keras 2 and 3), Keras 2 weights-only ``.h5``, and
Keras 3 ``.weights.h5``.

Tensor names are dataset paths: below ``model_weights`` (or the root) for legacy files,
inside the file for ``.weights.h5``. All HDF5 access goes through the checked
:class:`~steelyard.loaders.keras.hdf5_access.H5Store`; tensors are read on demand.
"""

from __future__ import annotations

import math
import re
from pathlib import Path
from typing import Any

import h5py

from steelyard.errors import LoadError
from steelyard.graph import Checkpoint, Format, OptimizerState, Tensor, TensorRole
from steelyard.loaders.base import file_size, parse_json
from steelyard.loaders.keras import hdf5_access as kh
from steelyard.loaders.keras import model_config as kc
from steelyard.loaders.keras import optimizer as ko
from steelyard.loaders.keras.hdf5_access import (
    H5_ERRORS,
    H5Store,
    Location,
    has_hdf5_magic,
    reason,
)
from steelyard.loaders.keras.layers import build_layers
from steelyard.loaders.sandbox import isolated

# --------------------------------------------------------------------------------------------
# Keras 3 .weights.h5 (also the inside of a .keras archive)


def read_weights_h5(
    store: H5Store,
    f: Any,
    graph: kc.ModelGraph | None,
    opt: ko.OptimizerConfig | None,
) -> tuple[dict[str, Tensor], tuple[Any, ...], OptimizerState | None, list[str]]:
    """Tensors, layers, optimizer state and notes of a ``.weights.h5`` layout."""
    notes: list[str] = []
    tensors: dict[str, Tensor] = {}
    top_names = sorted(f.keys(), key=kc.natural_key)
    for top in top_names:
        if top == "optimizer":
            continue
        for path in store.datasets(f, top):
            tensors[path] = store.tensor(f, path, path)
    if graph is not None:
        atoms = graph.atoms
        _attach_vars(store, f, atoms, tensors, notes)
        have_config = True
    else:
        atoms = _atoms_from_keys(store, f, tensors)
        have_config = False
        if atoms:
            notes.append(
                "no model config: layer kinds were inferred from the weight file's keys; "
                "activations and links are unknown"
            )
    layers, more = build_layers(atoms, store.source, have_config)
    notes.extend(more)
    optimizer = None
    if "optimizer" in f:
        optimizer, note = _weights_optimizer(store, f, atoms, opt, have_config)
        if note:
            notes.append(note)
    ordered = _model_order(tensors, atoms)
    return ordered, layers, optimizer, notes


def _model_order(tensors: dict[str, Tensor], atoms: list[kc.Atom]) -> dict[str, Tensor]:
    out: dict[str, Tensor] = {}
    for atom in atoms:
        for role in atom.order:
            tensor = atom.weights[role]
            out.setdefault(tensor.name, tensor)
    for name, tensor in tensors.items():
        out.setdefault(name, tensor)
    return out


def _vars_path(atom: kc.Atom) -> str:
    return f"{atom.key_path}/cell/vars" if atom.cls in kc.RNN_GATES else f"{atom.key_path}/vars"


class _Indexed:
    """Tensors grouped by the folder they sit in, so ``vars/<i>`` lookups are cheap."""

    def __init__(self, tensors: dict[str, Tensor]) -> None:
        self.folders: dict[str, list[tuple[str, Tensor]]] = {}
        for name, tensor in tensors.items():
            folder, _, leaf = name.rpartition("/")
            self.folders.setdefault(folder, []).append((leaf, tensor))

    def get(self, prefix: str) -> list[Tensor] | None:
        """Tensors ``<prefix>/<i>`` in numeric order; None when a name is not an index."""
        entries = self.folders.get(prefix, [])
        if not all(leaf.isascii() and leaf.isdigit() for leaf, _ in entries):
            return None
        return [tensor for _, tensor in sorted(entries, key=lambda item: kc.natural_key(item[0]))]


def _indexed(tensors: dict[str, Tensor], prefix: str) -> list[Tensor] | None:
    """Tensors ``<prefix>/<i>`` in numeric order; None when a name is not an index."""
    return _Indexed(tensors).get(prefix)


def _attach_vars(
    store: H5Store, f: Any, atoms: list[kc.Atom], tensors: dict[str, Tensor], notes: list[str]
) -> None:
    mismatched: list[str] = []
    index = _Indexed(tensors)
    for atom in atoms:
        if not atom.key_path:
            continue
        prefix = _vars_path(atom)
        variables = index.get(prefix)
        if variables is None:
            mismatched.append(f"{atom.name} (non-numeric variable names)")
            continue
        if not variables:
            continue
        if store.exists(f, prefix):
            named = store.attr_text(store.group(f, prefix), "name")
            expected = atom.raw_name if atom.cls not in kc.RNN_GATES else None
            if named is not None and expected is not None and named != expected:
                mismatched.append(f"{atom.name} (its weights group is named {named!r})")
                continue
        roles = _roles(atom.cls, atom.config, len(variables))
        if roles is None:
            mismatched.append(f"{atom.name} ({len(variables)} variables)")
            continue
        atom.weights = dict(zip(roles, variables, strict=True))
        atom.order = list(roles)
    if mismatched:
        notes.append(
            "weights not matched to their config layer: "
            + ", ".join(mismatched[:5])
            + ("…" if len(mismatched) > 5 else "")
        )


def _roles(cls: str, config: Any, count: int) -> list[str] | None:
    if kc.expected_roles(cls, config) is None:
        return [str(i) for i in range(count)]  # unknown class: keep stored order
    return kc.roles_by_count(cls, config, count)


def _atoms_from_keys(store: H5Store, f: Any, tensors: dict[str, Tensor]) -> list[kc.Atom]:
    """Atoms for a ``.weights.h5`` without a config: one per ``layers/<key>`` group."""
    atoms: list[kc.Atom] = []
    if "layers" not in f:
        return atoms
    index = _Indexed(tensors)

    def vars_name(prefix: str) -> str | None:
        return store.attr_text(store.group(f, prefix), "name") if store.exists(f, prefix) else None

    def layer(key_path: str, key: str, top: str, wrapper: str | None, depth: int) -> None:
        if depth > kc.MAX_DEPTH:
            raise store.fail("layer groups nest too deeply")
        child = store.resolve(f, key_path)
        if not isinstance(child, h5py.Group):
            return
        if "layers" in child:
            walk(f"{key_path}/layers", top, depth + 1)
            return
        own_name = vars_name(f"{key_path}/vars")
        held = [
            a
            for a in kc.WRAPPED_ATTRIBUTES
            if a in child and isinstance(child.get(a, getlink=True), h5py.HardLink)
        ]
        if held and not index.get(f"{key_path}/vars"):
            # A wrapper (TimeDistributed, Bidirectional): its layers' variables sit below
            # ``<key>/layer`` or ``<key>/forward_layer`` and ``<key>/backward_layer``.
            for attribute in held:
                layer(f"{key_path}/{attribute}", attribute, top, own_name or key, depth + 1)
            return
        cell_name = vars_name(f"{key_path}/cell/vars")
        cls = kc.class_from_name(key) or kc.class_from_name(own_name or "") or ""
        if not cls and cell_name is not None:
            cls = kc.class_from_name(cell_name) or ""
        if not cls and "cell" in child:
            cls = _rnn_from_shapes(index.get(f"{key_path}/cell/vars") or [])
        atom = kc.Atom(
            name=key_path,
            raw_name=key,
            cls=cls,
            config={},
            trainable=True,
            key_path=key_path,
            top=top,
        )
        prefix = _vars_path(atom)
        variables = index.get(prefix) or []
        if not cls:
            cls = atom.cls = _dense_from_shapes(variables)
        if own_name and (cls not in kc.RNN_GATES or wrapper is not None):
            atom.name = own_name
        if wrapper is not None:
            atom.name = f"{wrapper}/{own_name or key}"
        roles = kc.roles_by_count(cls, None, len(variables)) if cls else None
        if roles is None:
            roles = [str(i) for i in range(len(variables))]
            if cls in kc.unit_classes():
                atom.cls = ""  # cannot tell its variables apart: not a layer
        atom.weights = dict(zip(roles, variables, strict=True))
        atom.order = roles
        atoms.append(atom)

    def walk(path: str, top: str | None, depth: int) -> None:
        if depth > kc.MAX_DEPTH:
            raise store.fail("layer groups nest too deeply")
        group = store.group(f, path)
        for key in sorted(group.keys(), key=kc.natural_key):
            if isinstance(group.get(key, getlink=True), h5py.HardLink):
                layer(f"{path}/{key}", key, top or key, None, depth)

    walk("layers", None, 0)
    names: dict[str, int] = {}
    for atom in atoms:
        names[atom.name] = names.get(atom.name, 0) + 1
    for atom in atoms:
        if names[atom.name] > 1:
            atom.name = atom.key_path
    return atoms


def _rnn_from_shapes(variables: list[Tensor]) -> str:
    """The RNN class of a cell's positional variables (kernel, recurrent kernel, bias), by
    their shapes alone (Keras before 3.15 writes no names)."""
    if len(variables) not in (2, 3):
        return ""
    roles = dict(zip(("kernel", "recurrent_kernel", "bias"), variables, strict=False))
    return kc.class_from_shapes(roles) or ""


def _dense_from_shapes(variables: list[Tensor]) -> str:
    """``Dense`` for two positional variables shaped ``[in, out]`` and ``[out]``, else ""."""
    if len(variables) != 2:
        return ""
    return kc.class_from_shapes(dict(zip(("kernel", "bias"), variables, strict=True))) or ""


def _weights_optimizer(
    store: H5Store,
    f: Any,
    atoms: list[kc.Atom],
    opt: ko.OptimizerConfig | None,
    have_config: bool,
) -> tuple[OptimizerState | None, str | None]:
    source = "optimizer/vars"
    if not store.exists(f, source):
        return None, None
    listed = store.datasets(f, source)
    indexed: dict[str, Tensor] = {p: store.tensor(f, p, p, TensorRole.OPTIMIZER) for p in listed}
    variables = _indexed(indexed, source)
    if variables is None or len(variables) != len(listed):
        return None, ko.unmapped(source, "unexpected variable names").note
    if not variables:
        return None, None
    group_name = store.attr_text(store.group(f, source), "name")
    if have_config:
        trainable = ko.iter_trainable(atoms)
        result = ko.map_keras3_ordered(variables, trainable, opt, group_name, source)
        return result.state, result.note
    result = _unordered_optimizer(variables, atoms, group_name, source)
    return result.state, result.note


def _unordered_optimizer(
    variables: list[Tensor], atoms: list[kc.Atom], group_name: str | None, source: str
) -> ko.OptimizerResult:
    """Without a config the model order is known only within one layer class (Keras numbers
    keys in container order). The order is used only when the slot shapes force exactly one
    interleaving of the classes."""
    base = re.sub(r"_\d+$", "", group_name or "")
    kind = {"adam": "adam", "adam_w": "adamw", "sgd": "sgd", "rm_sprop": "rmsprop"}.get(base)
    if kind is None:
        return ko.unmapped(source, "no config names the optimizer")
    trainable_by_atom = {
        atom.key_path: [
            atom.weights[r] for r in atom.order if r not in kc.non_trainable_roles(atom.cls)
        ]
        for atom in atoms
    }
    total = sum(len(v) for v in trainable_by_atom.values())
    if len(variables) <= 2 and all(v.shape == () for v in variables):
        return ko.map_keras3_ordered(variables, [], None, group_name, source)  # counters only
    per_var = {"adam": [2], "adamw": [2], "sgd": [1, 0], "rmsprop": [1]}[kind]
    fits = [k for k in per_var if len(variables) - k * total in (1, 2)]
    if len(fits) != 1:
        return ko.unmapped(source, f"{len(variables)} variables do not fit {total} model variables")
    k = fits[0]
    prefix = len(variables) - k * total
    slots = variables[prefix:]
    shapes = [slots[i * k].shape for i in range(total)] if k else []
    order = _interleave(atoms, trainable_by_atom, shapes) if k else []
    if order is None:
        return ko.unmapped(source, "without a config the model order of its layers is ambiguous")
    layout = ko.OptimizerConfig(
        {"adam": "Adam", "adamw": "AdamW", "sgd": "SGD", "rmsprop": "RMSprop"}[kind],
        {"momentum": 0.9 if k else 0.0} if kind == "sgd" else {},
    )
    return ko.map_keras3_ordered(variables, order, layout, group_name, source)


def _interleave(
    atoms: list[kc.Atom], trainable: dict[str, list[Tensor]], shapes: list[tuple[int, ...]]
) -> list[Tensor] | None:
    """The one merge of per-class key sequences whose variable shapes equal ``shapes``."""
    families: dict[tuple[str, str], list[list[Tensor]]] = {}
    for atom in atoms:
        variables = trainable.get(atom.key_path, [])
        if not variables:
            continue
        container, key = atom.key_path.rsplit("/", 1)
        family = re.sub(r"_\d+$", "", key)
        families.setdefault((container, family), []).append(variables)
    containers = {container for container, _ in families}
    if len(containers) > 1:
        return None  # nested models: their position among the outer layers is not known
    # Atoms arrive in natural key order, so each family is already in container order.
    sequences = list(families.values())
    state_count = math.prod(len(s) + 1 for s in sequences)
    if state_count > 1_000_000:
        return None
    memo: dict[tuple[int, ...], int] = {}

    def ways(state: tuple[int, ...], position: int) -> int:
        if position == len(shapes):
            return 1 if all(i == len(s) for i, s in zip(state, sequences, strict=True)) else 0
        if state in memo:
            return memo[state]
        count = 0
        for f, seq in enumerate(sequences):
            i = state[f]
            if i < len(seq):
                item = seq[i]
                if position + len(item) <= len(shapes) and all(
                    t.shape == shapes[position + j] for j, t in enumerate(item)
                ):
                    nxt = (*state[:f], i + 1, *state[f + 1 :])
                    count += ways(nxt, position + len(item))
                    if count > 1:
                        break
        memo[state] = min(count, 2)
        return memo[state]

    start = tuple(0 for _ in sequences)
    if ways(start, 0) != 1:
        return None
    order: list[Tensor] = []
    state, position = start, 0
    while position < len(shapes):
        for f, seq in enumerate(sequences):
            i = state[f]
            if i < len(seq):
                item = seq[i]
                nxt = (*state[:f], i + 1, *state[f + 1 :])
                if (
                    position + len(item) <= len(shapes)
                    and all(t.shape == shapes[position + j] for j, t in enumerate(item))
                    and ways(nxt, position + len(item)) == 1
                ):
                    order.extend(item)
                    state, position = nxt, position + len(item)
                    break
        else:  # pragma: no cover - ways() said one path exists
            return None
    return order


# --------------------------------------------------------------------------------------------
# Legacy whole-model and Keras 2 weights-only files


def _json_attr(store: H5Store, f: Any, key: str) -> Any:
    text = store.attr_text(f, key)
    return None if text is None else parse_json(text, store.source, key)


def read_legacy(
    store: H5Store, f: Any
) -> tuple[dict[str, Tensor], tuple[Any, ...], OptimizerState | None, list[str]]:
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
    graph = kc.parse_model(config, store.source) if config is not None else None
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
                atom.cls = kc.class_from_shapes(atom.weights) or ""
        if any(atom.cls in kc.unit_classes() for atom in atoms):
            notes.append(
                "no model config: layer kinds were inferred from default layer names; "
                "activations and links are unknown"
            )
    layers, more = build_layers(atoms, store.source, graph is not None)
    notes.extend(more)
    optimizer = None
    if "optimizer_weights" in f:
        opt = ko.optimizer_config(
            training.get("optimizer_config") if isinstance(training, dict) else None
        )
        optimizer, note = _legacy_optimizer(store, f, atoms, groups, opt, version)
        if note:
            notes.append(note)
    return tensors, layers, optimizer, notes


def _legacy_atoms(layer: str, items: list[tuple[str, Tensor]]) -> list[kc.Atom]:
    """Atoms of one layer group of a legacy file without a config.

    A group whose name is no unit class but whose weight names run through inner layers
    (``time_distributed/dense/kernel``, ``bidirectional/forward_lstm/lstm_cell/kernel``) is
    a wrapper: one atom per inner layer, its class from the inner layer's default name.
    """
    own = kc.class_from_name(layer) or ""
    found: dict[str, None] = {}  # ordered set: linear in the layer's weights
    for weight, _ in items:
        parts = [p for p in weight.split("/")[:-1] if p != layer and not p.endswith("_cell")]
        if parts:
            found[parts[-1]] = None
    owners = list(found)
    if own or not owners:
        return [kc.Atom(layer, layer, own, {}, True, "", layer)]
    return [
        kc.Atom(f"{layer}/{owner}", owner, kc.class_from_name(owner) or "", {}, True, "", layer)
        for owner in owners
    ]


def _attach_legacy(
    atoms: list[kc.Atom],
    groups: list[tuple[str, list[tuple[str, Tensor]]]],
    notes: list[str],
    have_config: bool,
) -> None:
    by_top: dict[str, list[kc.Atom]] = {}
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
        by_raw: dict[str, list[kc.Atom]] = {}
        for atom in members:
            by_raw.setdefault(atom.raw_name, []).append(atom)
        split: dict[str, list[tuple[str, Tensor]]] = {}
        owners: dict[str, kc.Atom] = {}
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
    atom: kc.Atom, items: list[tuple[str, Tensor]], have_config: bool, notes: list[str]
) -> None:
    roles = [kc.role_of_name(atom.cls, weight) for weight, _ in items]
    full = kc.expected_roles(atom.cls, {})
    expected = kc.expected_roles(atom.cls, atom.config if have_config else None)
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
    atoms: list[kc.Atom],
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


# --------------------------------------------------------------------------------------------
# The loader


def load_h5_file(path: Path) -> Checkpoint:
    """The checkpoint of one Keras HDF5 file (runs inside :func:`isolated`)."""
    size = file_size(path)
    store = H5Store(path, Location(path, size))
    with store.open() as f:
        try:
            if "model_weights" in f or "layer_names" in f.attrs:
                tensors, layers, optimizer, notes = read_legacy(store, f)
            elif "layers" in f or "vars" in f or "optimizer" in f:
                tensors, layers, optimizer, notes = read_weights_h5(store, f, None, None)
            else:
                raise store.fail(
                    "is an HDF5 file without Keras weights (no model_weights, layer_names "
                    "or layers)"
                )
        except LoadError:
            raise
        except H5_ERRORS as exc:
            raise store.fail(f"is a damaged HDF5 file ({reason(exc)})") from None
    return Checkpoint(
        path=str(path),
        format=Format.KERAS_H5,
        tensors=tensors,
        layers=layers,
        file_size=size,
        files=(str(path),),
        optimizer=optimizer,
        notes=tuple(notes),
    )


class KerasH5Loader:
    """Legacy Keras ``.h5``/``.hdf5`` (whole model or weights only) and ``.weights.h5``."""

    format = Format.KERAS_H5

    def sniff(self, path: Path, head: bytes) -> bool:
        """True for any HDF5 file (the only HDF5 checkpoints we read are Keras')."""
        return has_hdf5_magic(path, head)

    def load(self, path: Path) -> Checkpoint:
        """Read the file's structure (in a time-limited child process); tensors stay on disk."""
        return isolated(path, load_h5_file, (path,), kh.load_timeout())
