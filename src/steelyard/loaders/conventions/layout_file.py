"""Layout files: the user's word on a graph-less checkpoint where names and shapes say too
little. A ``<file stem>.layout.toml`` or ``steelyard.layout.toml`` beside the file may set the
stored orientation (file-wide or per layer), adjust an inferred layer (activation, kind,
links) or declare a layer the names did not reveal (``[[layer]]`` with a ``weight``).

:func:`read_layout` checks the file on its own (keys, types, values); :func:`apply_layout`
checks it against the checkpoint (tensor names, shapes, layer names) and applies it.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np

from steelyard.errors import LoadError
from steelyard.graph import Activation, ColumnSlice, Layer, LayerKind, Link, Tensor, TensorRole
from steelyard.loaders.base import MAX_METADATA_BYTES
from steelyard.loaders.conventions.views import AS_STORED, float_reader, stored_source
from steelyard.loaders.layer_parts import canonical_geometry, make_layer
from steelyard.safepath import read_beside

#: Layout files beside a checkpoint: ``<file stem>.layout.toml`` or ``steelyard.layout.toml``.
LAYOUT_NAMES = ("{stem}.layout.toml", "steelyard.layout.toml")
_ACTIVATIONS = {a.value: a for a in Activation}
_KINDS = {k.value: k for k in LayerKind}
#: Keys of a ``[[layer]]`` entry that adjusts an inferred layer.
_ADJUST_KEYS = frozenset({"name", "orientation", "activation", "inputs-from", "kind"})
#: Keys of a ``[[layer]]`` entry that declares a layer (it has ``weight``).
_DECLARE_KEYS = _ADJUST_KEYS | {"weight", "bias", "axes", "groups"}
#: Kinds a layout file may declare (recurrent layers need per-gate splitting: declare each
#: gate's matrix as a dense layer instead).
_DECLARABLE = {
    LayerKind.DENSE: (2,),
    LayerKind.EMBEDDING: (2,),
    LayerKind.CONV: (3, 4, 5),
    LayerKind.CONV_TRANSPOSE: (3, 4, 5),
}


def _layout_error(path: Path, entry: Mapping[str, Any] | None, reason: str) -> LoadError:
    where = f"layer {entry['name']!r}: " if entry is not None and "name" in entry else ""
    return LoadError(path, f"{where}{reason}")


def read_layout(source: Path) -> dict[str, Any] | None:
    """The user's layout file for ``source``, validated (keys, types, values), or None.

    Checks that need the checkpoint (tensor names, shapes, layer names) happen in
    :func:`apply_layout`."""
    from steelyard._toml import tomllib

    for pattern in LAYOUT_NAMES:
        candidate = source.parent / pattern.format(stem=source.name.split(".")[0])
        raw = read_beside(source, candidate.name, "layout file", MAX_METADATA_BYTES)
        if raw is not None:
            break
    else:
        return None
    try:
        data = tomllib.loads(raw.decode("utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError, OSError, RecursionError) as exc:
        raise LoadError(candidate, f"is not a valid layout file ({exc})") from None
    for key in data:
        if key not in ("orientation", "layer"):
            raise LoadError(
                candidate, f"layout key {key!r} is unknown (use 'orientation' or [[layer]])"
            )
    if data.get("orientation", "out-in") not in ("out-in", "in-out"):
        raise LoadError(candidate, 'layout \'orientation\' must be "out-in" or "in-out"')
    entries = data.get("layer", [])
    if not isinstance(entries, list) or not all(isinstance(e, dict) for e in entries):
        raise LoadError(candidate, "layout [[layer]] entries must be tables")
    names: set[str] = set()
    for entry in entries:
        _check_entry(candidate, entry)
        if entry["name"] in names:
            raise _layout_error(candidate, entry, "is listed twice")
        names.add(entry["name"])
    data["__path__"] = str(candidate)
    return data


def _check_entry(path: Path, entry: dict[str, Any]) -> None:
    """Keys and value types of one ``[[layer]]`` entry."""
    if not isinstance(entry.get("name"), str) or not entry["name"]:
        raise LoadError(path, "every layout [[layer]] needs a 'name'")
    declares = "weight" in entry
    allowed = _DECLARE_KEYS if declares else _ADJUST_KEYS
    unknown = sorted(set(entry) - allowed)
    if unknown:
        extra = (
            "" if declares else " ('bias', 'axes' and 'groups' need a 'weight': a declared layer)"
        )
        raise _layout_error(
            path, entry, f"unknown key(s) {unknown}; allowed: {sorted(allowed)}{extra}"
        )
    if entry.get("orientation", "out-in") not in ("out-in", "in-out"):
        raise _layout_error(path, entry, 'orientation must be "out-in" or "in-out"')
    if entry.get("activation", "unknown") not in _ACTIVATIONS:
        raise _layout_error(path, entry, f"unknown activation {entry['activation']!r}")
    if entry.get("kind", "dense") not in _KINDS:
        raise _layout_error(path, entry, f"unknown kind {entry['kind']!r}")
    sources = entry.get("inputs-from", [])
    if not isinstance(sources, list) or not all(isinstance(x, str) for x in sources):
        raise _layout_error(path, entry, "inputs-from must be a list of layer names")
    if not declares:
        return
    for key in ("weight", "bias"):
        if key in entry and (not isinstance(entry[key], str) or not entry[key]):
            raise _layout_error(path, entry, f"{key} must be a tensor name")
    if "kind" in entry and _KINDS[entry["kind"]] not in _DECLARABLE:
        raise _layout_error(
            path,
            entry,
            f"kind {entry['kind']!r} cannot be declared (declare each gate's matrix as dense)",
        )
    axes = entry.get("axes")
    if axes is not None and (
        not isinstance(axes, list)
        or not all(isinstance(a, int) and not isinstance(a, bool) for a in axes)
    ):
        raise _layout_error(path, entry, "axes must be a list of stored axis numbers")
    if axes is not None and "orientation" in entry:
        raise _layout_error(path, entry, "give either axes or orientation, not both")
    groups = entry.get("groups", 1)
    if isinstance(groups, bool) or not isinstance(groups, int) or groups < 1:
        raise _layout_error(path, entry, "groups must be a positive integer")


@dataclass(frozen=True, slots=True)
class _Axes:
    """Canonical view of a declared weight: ``np.transpose(stored, axes)``."""

    axes: tuple[int, ...]

    def __call__(self, array: np.ndarray) -> np.ndarray:
        return np.transpose(array, self.axes)


def _declared_axes(entry: Mapping[str, Any], ndim: int, default: str) -> tuple[int, ...]:
    """Stored axis for each canonical axis ``[out, in/groups, *kernel]``."""
    if "axes" in entry:
        return tuple(entry["axes"])
    if entry.get("orientation", default) == "out-in":
        return tuple(range(ndim))
    # "in-out": [in, out] for 2-D weights, [*kernel, in/groups, out] for convolutions
    # (the TensorFlow/Keras/Flax order).
    return (ndim - 1, ndim - 2, *range(ndim - 2))


def _declare(
    entry: Mapping[str, Any], tensors: Mapping[str, Tensor], default: str, path: Path
) -> Layer:
    """The layer a layout entry with a ``weight`` declares, checked against the tensors."""
    weight = tensors.get(entry["weight"])
    if weight is None:
        raise _layout_error(
            path, entry, f"weight tensor {entry['weight']!r} is not in the checkpoint"
        )
    if weight.role is not TensorRole.PARAMETER:
        raise _layout_error(
            path, entry, f"weight tensor {weight.name!r} is {weight.dtype}, not a floating weight"
        )
    ndim = len(weight.shape)
    kind = (
        _KINDS[entry["kind"]]
        if "kind" in entry
        else (LayerKind.DENSE if ndim == 2 else LayerKind.CONV)
    )
    if ndim not in _DECLARABLE.get(kind, ()):
        raise _layout_error(
            path,
            entry,
            f"weight {weight.name!r} has shape {list(weight.shape)}, which a {kind.value} layer "
            f"cannot have ({' or '.join(f'{n}-D' for n in _DECLARABLE[kind])})",
        )
    axes = _declared_axes(entry, ndim, default)
    if sorted(axes) != list(range(ndim)):
        raise _layout_error(
            path, entry, f"axes {list(axes)} are no ordering of the weight's {ndim} axes"
        )
    canonical = tuple(weight.shape[a] for a in axes)
    units = canonical[0]
    groups = int(entry.get("groups", 1))
    if units % groups:
        raise _layout_error(path, entry, f"groups={groups} does not divide its {units} units")
    bias_name = entry.get("bias")
    bias = tensors.get(bias_name) if bias_name is not None else None
    if bias_name is not None:
        if bias is None:
            raise _layout_error(path, entry, f"bias tensor {bias_name!r} is not in the checkpoint")
        if bias.shape != (units,):
            raise _layout_error(
                path,
                entry,
                f"bias {bias_name!r} has shape {list(bias.shape)}, but weight "
                f"{weight.name!r} {list(weight.shape)} read as canonical "
                f"{list(canonical)} has {units} units",
            )
    transform = AS_STORED if axes == tuple(range(ndim)) else _Axes(axes)
    activation = _ACTIVATIONS[entry.get("activation", "unknown")]
    geometry = canonical_geometry(canonical, groups)
    source = stored_source(weight, transform, bias)
    return make_layer(entry["name"], kind, activation, geometry, source)


def apply_layout(
    layers: list[Layer], tensors: Mapping[str, Tensor], layout: Mapping[str, Any], source: Path
) -> list[Layer]:
    """Apply the user's layout: declared layers (entries with ``weight``) replace any inferred
    layer reading the same weight tensor and are added; other entries adjust inferred layers'
    orientation, activation, kind and links."""
    path = Path(str(layout["__path__"]))
    default = layout.get("orientation", "out-in")
    entries = list(layout.get("layer", []))
    declared = [_declare(e, tensors, default, path) for e in entries if "weight" in e]
    claimed = {layer.weight: layer.name for layer in declared}
    if len(claimed) != len(declared):
        raise LoadError(path, "two declared layers read the same weight tensor")
    kept = [layer for layer in layers if layer.weight not in claimed]
    kept_names = {layer.name for layer in kept}
    for layer in declared:
        if layer.name in kept_names:
            raise _layout_error(
                path,
                {"name": layer.name},
                "is already a layer of the checkpoint reading another tensor; pick another name",
            )
    adjust = {e["name"]: e for e in entries if "weight" not in e}
    for name in adjust:
        if name not in kept_names:
            raise LoadError(path, f"layout names layer {name!r}, which the checkpoint lacks")
    # Declared layers take the place of the inferred layer they replace, else go last.
    # Sets and maps throughout: list membership and per-layer scans of the entries would be
    # quadratic in the number of layers.
    replaced = {layer.weight: layer for layer in declared}
    merged: list[Layer] = []
    placed: set[str] = set()
    for layer in layers:
        if layer.weight in replaced:
            if layer.weight not in placed:
                placed.add(layer.weight)
                merged.append(replaced[layer.weight])
        else:
            merged.append(layer)
    merged += [layer for layer in declared if layer.weight not in placed]
    by_name = {layer.name: layer for layer in merged}
    declaring: dict[str, Mapping[str, Any]] = {}
    for e in entries:
        if "weight" in e:
            declaring.setdefault(e["name"], e)
    out: list[Layer] = []
    for layer in merged:
        entry: Mapping[str, Any] = adjust.get(layer.name) or declaring.get(layer.name, {})
        update = _adjusted(layer, tensors, entry, default) if "weight" not in entry else {}
        if "inputs-from" in entry:
            missing = [n for n in entry["inputs-from"] if n not in by_name]
            if missing:
                raise _layout_error(path, entry, f"inputs-from names unknown layer(s) {missing}")
            if "weight" in entry:
                expected = layer.in_per_group * layer.groups
                for source_name in entry["inputs-from"]:
                    producer = by_name[source_name]
                    if len(entry["inputs-from"]) == 1 and producer.units != expected:
                        raise _layout_error(
                            path,
                            entry,
                            f"reads {expected} inputs but {source_name!r} has {producer.units} units",
                        )
            update.update(
                inputs_from=tuple(entry["inputs-from"]),
                linked_by=Link.CONFIG if "weight" in entry else Link.INFERRED,
            )
        out.append(replace(layer, **update) if update else layer)
    return out


def _adjusted(
    layer: Layer, tensors: Mapping[str, Tensor], entry: Mapping[str, Any], default: str
) -> dict[str, Any]:
    """Changes an adjusting entry (or the file-wide orientation) makes to an inferred layer."""
    update: dict[str, Any] = {}
    orientation = entry.get("orientation", default)
    weight = tensors[layer.weight]
    if orientation == "in-out" and len(weight.shape) == 2 and layer.gate is None:
        update.update(
            units=weight.shape[1],
            in_per_group=weight.shape[0],
            weight_view=float_reader(weight, ColumnSlice()),
            orient=ColumnSlice(),
        )
        bias = tensors.get(layer.bias) if layer.bias else None
        if bias is not None and bias.shape != (weight.shape[1],):
            update.update(bias=None, bias_view=None)
    if "activation" in entry:
        update["activation"] = _ACTIVATIONS[entry["activation"]]
    if "kind" in entry:
        update["kind"] = _KINDS[entry["kind"]]
    return update
