"""Where Keras 3 keeps each variable in ``.weights.h5`` (also the inside of a ``.keras``
archive): ``layers/<snake_case key>/vars/<n>`` per layer in config order, wrapped layers under
the wrapper's attribute, optimizer slots under ``optimizer/vars``. Tensor names are the
dataset paths; all HDF5 access goes through the checked
:class:`~steelyard.loaders.keras.hdf5_access.H5Store`, and tensors are read on demand.

Without a config (a bare ``.weights.h5``) layer kinds are inferred from the keys and the
shapes, and say less.
"""

from __future__ import annotations

import math
import re
from typing import Any

import h5py

from steelyard.graph import OptimizerState, Tensor, TensorRole
from steelyard.loaders.base import Reading
from steelyard.loaders.keras import attention
from steelyard.loaders.keras import optimizer as ko
from steelyard.loaders.keras.config_values import MAX_DEPTH, natural_key
from steelyard.loaders.keras.hdf5_access import H5Store
from steelyard.loaders.keras.layer_classes import (
    ATTENTION,
    RNN_GATES,
    WRAPPED_ATTRIBUTES,
    class_from_name,
    class_from_shapes,
    unit_classes,
)
from steelyard.loaders.keras.layers import build_layers
from steelyard.loaders.keras.model_config import Atom, ModelGraph
from steelyard.loaders.keras.variables import (
    expected_roles,
    non_trainable_roles,
    roles_by_count,
)

#: What reading a Keras HDF5 weights layout yields: tensors, layers, optimizer state, notes;
#: and the checkpoint metadata its layers declare (``Checkpoint.metadata``).
WeightsRead = tuple[Reading, dict[str, Any]]


def read_weights_h5(
    store: H5Store,
    f: Any,
    graph: ModelGraph | None,
    opt: ko.OptimizerConfig | None,
) -> WeightsRead:
    """Tensors, layers, optimizer state and notes of a ``.weights.h5`` layout."""
    notes: list[str] = []
    tensors: dict[str, Tensor] = {}
    top_names = sorted(f.keys(), key=natural_key)
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
    layers, more, metadata = build_layers(atoms, store.source, have_config)
    notes.extend(more)
    optimizer = None
    if "optimizer" in f:
        optimizer, note = _weights_optimizer(store, f, atoms, opt, have_config)
        if note:
            notes.append(note)
    ordered = _model_order(tensors, atoms)
    return (ordered, layers, optimizer, notes), metadata


def _model_order(tensors: dict[str, Tensor], atoms: list[Atom]) -> dict[str, Tensor]:
    out: dict[str, Tensor] = {}
    for atom in atoms:
        for role in atom.order:
            tensor = atom.weights[role]
            out.setdefault(tensor.name, tensor)
    for name, tensor in tensors.items():
        out.setdefault(name, tensor)
    return out


def _vars_path(atom: Atom) -> str:
    return f"{atom.key_path}/cell/vars" if atom.cls in RNN_GATES else f"{atom.key_path}/vars"


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
        return [tensor for _, tensor in sorted(entries, key=lambda item: natural_key(item[0]))]


def _indexed(tensors: dict[str, Tensor], prefix: str) -> list[Tensor] | None:
    """Tensors ``<prefix>/<i>`` in numeric order; None when a name is not an index."""
    return _Indexed(tensors).get(prefix)


def _attach_vars(
    store: H5Store, f: Any, atoms: list[Atom], tensors: dict[str, Tensor], notes: list[str]
) -> None:
    mismatched: list[str] = []
    index = _Indexed(tensors)
    for atom in atoms:
        if not atom.key_path:
            continue
        if atom.cls in ATTENTION:
            weights = _attention_weights(index, atom.key_path)
            if weights == {}:
                continue  # never built, so nothing stored (as for any layer without variables)
            if weights is None or set(weights) != set(attention.roles(atom.config)):
                mismatched.append(f"{atom.name} (its sub-layers' variables)")
            else:
                atom.weights, atom.order = weights, list(weights)
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
            expected = atom.raw_name if atom.cls not in RNN_GATES else None
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


def _attention_weights(index: _Indexed, key_path: str) -> dict[str, Tensor] | None:
    """An attention layer's variables by role (``query/kernel``…) in Keras' order, from the
    groups of its sub-layers; None when a sub-layer holds other than a kernel and a bias."""
    out: dict[str, Tensor] = {}
    for part, _ in attention.PARTS:
        found = [
            variables
            for key in attention.group_keys(part)
            if (variables := index.get(f"{key_path}/{key}/vars"))
        ]
        if not found:
            continue
        if len(found) > 1 or len(found[0]) > 2:
            return None
        for role, tensor in zip(("kernel", "bias"), found[0], strict=False):
            out[f"{part}/{role}"] = tensor
    return out


def _roles(cls: str, config: Any, count: int) -> list[str] | None:
    if expected_roles(cls, config) is None:
        return [str(i) for i in range(count)]  # unknown class: keep stored order
    return roles_by_count(cls, config, count)


def _atoms_from_keys(store: H5Store, f: Any, tensors: dict[str, Tensor]) -> list[Atom]:
    """Atoms for a ``.weights.h5`` without a config: one per ``layers/<key>`` group."""
    atoms: list[Atom] = []
    if "layers" not in f:
        return atoms
    index = _Indexed(tensors)

    def vars_name(prefix: str) -> str | None:
        return store.attr_text(store.group(f, prefix), "name") if store.exists(f, prefix) else None

    def layer(key_path: str, key: str, top: str, wrapper: str | None, depth: int) -> None:
        if depth > MAX_DEPTH:
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
            for a in WRAPPED_ATTRIBUTES
            if a in child and isinstance(child.get(a, getlink=True), h5py.HardLink)
        ]
        if held and not index.get(f"{key_path}/vars"):
            # A wrapper (TimeDistributed, Bidirectional): its layers' variables sit below
            # ``<key>/layer`` or ``<key>/forward_layer`` and ``<key>/backward_layer``.
            for attribute in held:
                layer(f"{key_path}/{attribute}", attribute, top, own_name or key, depth + 1)
            return
        cell_name = vars_name(f"{key_path}/cell/vars")
        cls = class_from_name(key) or class_from_name(own_name or "") or ""
        if not cls and cell_name is not None:
            cls = class_from_name(cell_name) or ""
        if not cls and "cell" in child:
            cls = _rnn_from_shapes(index.get(f"{key_path}/cell/vars") or [])
        atom = Atom(
            name=key_path,
            raw_name=key,
            cls=cls,
            config={},
            trainable=True,
            key_path=key_path,
            top=top,
        )
        if cls in ATTENTION:
            atom.name = own_name or key_path
            atom.weights = _attention_weights(index, key_path) or {}
            atom.order = list(atom.weights)
            atoms.append(atom)
            return
        prefix = _vars_path(atom)
        variables = index.get(prefix) or []
        if not cls:
            cls = atom.cls = _dense_from_shapes(variables)
        if own_name and (cls not in RNN_GATES or wrapper is not None):
            atom.name = own_name
        if wrapper is not None:
            atom.name = f"{wrapper}/{own_name or key}"
        roles = roles_by_count(cls, None, len(variables)) if cls else None
        if roles is None:
            roles = [str(i) for i in range(len(variables))]
            if cls in unit_classes():
                atom.cls = ""  # cannot tell its variables apart: not a layer
        atom.weights = dict(zip(roles, variables, strict=True))
        atom.order = roles
        atoms.append(atom)

    def walk(path: str, top: str | None, depth: int) -> None:
        if depth > MAX_DEPTH:
            raise store.fail("layer groups nest too deeply")
        group = store.group(f, path)
        for key in sorted(group.keys(), key=natural_key):
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
    return class_from_shapes(roles) or ""


def _dense_from_shapes(variables: list[Tensor]) -> str:
    """``Dense`` for two positional variables shaped ``[in, out]`` and ``[out]``, else ""."""
    if len(variables) != 2:
        return ""
    return class_from_shapes(dict(zip(("kernel", "bias"), variables, strict=True))) or ""


def _weights_optimizer(
    store: H5Store,
    f: Any,
    atoms: list[Atom],
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
    variables: list[Tensor], atoms: list[Atom], group_name: str | None, source: str
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
            atom.weights[r] for r in atom.order if r not in non_trainable_roles(atom.cls)
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
    atoms: list[Atom], trainable: dict[str, list[Tensor]], shapes: list[tuple[int, ...]]
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
