"""Links between Keras layers from the config's producers: which layers' units reach a layer,
looking through layers that keep a unit's identity (dropout, pooling, norms, activations) and
merges; and the norm that follows a layer, when it normalises that layer's units."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from steelyard.graph import Norm, NormKind
from steelyard.loaders.keras.config_values import MAX_DEPTH, flag, number
from steelyard.loaders.keras.layer_classes import (
    ACTIVATION_LAYERS,
    BATCH_NORM,
    CONV,
    CONV_T,
    DENSE,
    DEPTHWISE,
    EMBEDDING,
    GROUP_NORM,
    LAYER_NORM,
    MERGE,
    PASS,
    SEPARABLE,
    UNIT,
)
from steelyard.loaders.keras.layer_factory import Built
from steelyard.loaders.keras.model_config import Atom


def unit_kind(cls: str) -> str:
    """What a class is to the links: ``unit``, ``input``, ``merge``, ``pass`` or ``opaque``."""
    if cls in UNIT:
        return "unit"
    if cls == "InputLayer":
        return "input"
    if cls in MERGE:
        return "merge"
    if cls in PASS:
        return "pass"
    return "opaque"


class Linker:
    """Producer → consumer resolution over the atom graph, looking through pass-through layers."""

    def __init__(self, atoms: list[Atom], built: Mapping[str, Built]) -> None:
        self.atoms = {atom.name: atom for atom in atoms}
        self.built = built
        # Ordered sets (dict keys): a layer read by many others stays linear to index.
        consumers: dict[str, dict[str, None]] = {atom.name: {} for atom in atoms}
        for atom in atoms:
            for pred in atom.preds:
                if pred in consumers:
                    consumers[pred][atom.name] = None
        self.consumers: dict[str, list[str]] = {k: list(v) for k, v in consumers.items()}
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

    def from_input(self, name: str) -> bool:
        """Whether atom ``name`` reads the model's own inputs (only them)."""
        found = self._preds(name, set())
        return found is not None and found[1] and not found[0]

    def channels_last_flatten(self, name: str) -> bool:
        """Whether a Flatten between a convolution and atom ``name`` ran channels-last, so
        flattened input j belongs to channel j mod C (Keras' default data format).

        Searched through pass-through and merge layers up to :data:`MAX_DEPTH` hops, visiting
        each layer once (merges of branches would otherwise be walked once per path)."""
        seen = {name}
        frontier = [name]
        for _ in range(MAX_DEPTH + 1):
            following: list[str] = []
            for current in frontier:
                for pred in self.atoms[current].preds:
                    if pred in seen:
                        continue
                    seen.add(pred)
                    atom = self.atoms[pred]
                    if atom.cls == "Flatten":
                        if atom.config.get("data_format") != "channels_first" and any(
                            p.cls not in DENSE
                            and p.cls not in EMBEDDING
                            and p.config.get("data_format") != "channels_first"
                            for p in (self.atoms[a] for a in self._unit_atoms(pred, set()))
                        ):
                            return True
                    elif unit_kind(atom.cls) in ("pass", "merge"):
                        following.append(pred)
            if not following:
                return False
            frontier = following
        return False

    def _unit_atoms(self, name: str, seen: set[str]) -> list[str]:
        """Unit-producing atoms upstream of ``name`` through pass-through and merge layers."""
        out: list[str] = []
        for pred in self.atoms[name].preds:
            if pred in seen:
                continue
            seen.add(pred)
            kind = unit_kind(self.atoms[pred].cls)
            if kind == "unit":
                out.append(pred)
            elif kind in ("pass", "merge", "input"):
                out.extend(self._unit_atoms(pred, seen))
        return out

    def _preds(self, name: str, active: set[str]) -> tuple[list[str], bool] | None:
        if name in active:
            return None
        out: dict[str, None] = {}  # ordered set: linear however many producers merge here
        raw = False
        active.add(name)
        try:
            for pred in self.atoms[name].preds:
                got = self._output(pred, active)
                if got is None:
                    return None
                out.update(dict.fromkeys(got[0]))
                raw = raw or got[1]
        finally:
            active.discard(name)
        return list(out), raw

    def _output(self, name: str, active: set[str]) -> tuple[list[str], bool] | None:
        """What atom ``name`` outputs: (layers whose units, whether raw input is mixed in)."""
        if name in self.memo:
            return self.memo[name]
        atom = self.atoms[name]
        kind = unit_kind(atom.cls)
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
            if nxt.name in seen or unit_kind(nxt.cls) != "pass":
                return out
            out.append(nxt)
            seen.add(nxt.name)
            current = nxt.name

    def any_activation_consumer(self, name: str) -> bool:
        return any(self.atoms[c].cls in ACTIVATION_LAYERS for c in self.consumers.get(name, []))


def _conv_rank(cls: str) -> int:
    for table in (CONV, CONV_T, DEPTHWISE, SEPARABLE):
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


def norm_from(atom: Atom, units: int, producer: Atom) -> Norm | None:
    """The norm ``atom`` applies to the ``units`` of ``producer``; None when it normalises
    something else."""
    conf = atom.config
    gamma, beta = atom.weights.get("gamma"), atom.weights.get("beta")
    for tensor in (gamma, beta):
        if tensor is not None and tensor.shape != (units,):
            return None
    eps = number(conf.get("epsilon"))
    eps = 1e-3 if eps is None else eps
    scale = gamma.name if gamma is not None else None
    shift = beta.name if beta is not None else None
    if atom.cls in BATCH_NORM:
        mean, var = atom.weights.get("moving_mean"), atom.weights.get("moving_variance")
        if mean is None or var is None or mean.shape != (units,) or var.shape != (units,):
            return None
        if not _channel_axis_ok(conf.get("axis", -1), producer):
            return None
        return Norm(NormKind.BATCH, scale=scale, shift=shift, mean=mean.name, var=var.name, eps=eps)
    if gamma is None and beta is None:
        return None
    if atom.cls in LAYER_NORM:
        axis = conf.get("axis", -1)
        if axis not in (-1, [-1]) or not _channel_axis_ok(-1, producer):
            return None
        kind = NormKind.RMS if flag(conf, "rms_scaling", False) else NormKind.LAYER
        return Norm(kind, scale=scale, shift=shift, eps=eps)
    if atom.cls in GROUP_NORM and _channel_axis_ok(conf.get("axis", -1), producer):
        return Norm(NormKind.GROUP, scale=scale, shift=shift, eps=eps)
    return None
