"""Keras layers in canonical orientation, linked, activated and normalised from the config.

One :class:`~steelyard.loaders.keras.model_config.Atom` becomes one or more layers
(:mod:`~steelyard.loaders.keras.layer_factory`); links follow the config's producers, looking
through layers that keep a unit's identity (:mod:`~steelyard.loaders.keras.linking`).
"""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path
from typing import Any

from steelyard.errors import LoadError
from steelyard.graph import Activation, Layer, Link, mark_outputs
from steelyard.loaders.keras.attention import KEY
from steelyard.loaders.keras.layer_classes import (
    ACTIVATION_LAYERS,
    BATCH_NORM,
    DENSE,
    GROUP_NORM,
    LAYER_NORM,
    RESHAPING,
    UNIT,
)
from steelyard.loaders.keras.layer_factory import Built, LayerFactory
from steelyard.loaders.keras.layer_settings import activation_layer
from steelyard.loaders.keras.linking import Linker, norm_from
from steelyard.loaders.keras.model_config import Atom
from steelyard.loaders.keras.variables import expected_roles


def build_layers(
    atoms: list[Atom], source: Path, have_config: bool
) -> tuple[tuple[Layer, ...], list[str], dict[str, Any]]:
    """Turn atoms with attached tensors into canonical layers, linked from the config; with
    notes and the checkpoint metadata the layers declare (attention heads, see
    :mod:`~steelyard.loaders.keras.attention`).

    ``have_config`` False means the atoms were inferred from names alone: activations are
    unknown and nothing is linked.
    """
    factory = LayerFactory(source)
    notes: list[str] = []
    built: dict[str, Built] = {}
    skipped: list[str] = []
    for atom in atoms:
        if atom.cls not in UNIT:
            continue
        needed = [
            r
            for r in (expected_roles(atom.cls, atom.config if have_config else {}) or [])
            if r.rpartition("/")[2] != "bias"
        ]
        if not atom.weights or any(role not in atom.weights for role in needed):
            skipped.append(atom.name)
            continue
        try:
            result = factory.build(atom, have_config)
        except LoadError:
            if have_config:
                raise
            # The class was only guessed from a key or default name: say so, do not refuse.
            skipped.append(atom.name)
            continue
        if result is not None:
            built[atom.name] = result
    if skipped:
        notes.append(
            f"{len(skipped)} layer(s) whose weights are missing or not stored as their class "
            "stores them were not analysed: "
            + ", ".join(skipped[:5])
            + ("…" if len(skipped) > 5 else "")
        )
    metadata: dict[str, Any] = {KEY: tuple(factory.attention)} if factory.attention else {}
    layers: list[Layer] = []
    if not have_config:
        for atom in atoms:
            if atom.name in built:
                layers.extend(built[atom.name].layers)
        return tuple(layers), notes, metadata
    linker = Linker(atoms, built)
    for atom in atoms:
        result = built.get(atom.name)
        if result is None:
            continue
        sources = linker.sources(atom.name)
        finals = _finish(atom, result, linker)
        for layer in result.layers:
            update: dict[str, Any] = {}
            if layer.name in result.entry:
                if sources is not None:
                    update.update(inputs_from=tuple(sources), linked_by=Link.CONFIG)
                if linker.from_input(atom.name):
                    update["from_input"] = True
                if atom.cls in DENSE and linker.channels_last_flatten(atom.name):
                    update["channels_last_inputs"] = True
            if layer.name == result.last:
                update.update(finals)
            layers.append(replace(layer, **update) if update else layer)
    return mark_outputs(layers), notes, metadata


def _finish(atom: Atom, result: Built, linker: Linker) -> dict[str, Any]:
    """Activation and norm of the atom's output layer, from the layers that follow it."""
    if result.last is None:
        return {}
    last = next(layer for layer in result.layers if layer.name == result.last)
    out: dict[str, Any] = {}
    chain = linker.chain(atom.name)
    if last.activation is Activation.IDENTITY:
        for follower in chain:
            if follower.cls in ACTIVATION_LAYERS:
                out["activation"] = activation_layer(follower)
                break
        else:
            if not chain and linker.any_activation_consumer(atom.name):
                out["activation"] = Activation.UNKNOWN
    for follower in chain:
        if follower.cls in RESHAPING:
            break
        if follower.cls in BATCH_NORM | LAYER_NORM | GROUP_NORM:
            norm = norm_from(follower, last.units, atom)
            if norm is not None:
                out["norm"] = norm
            break
    return out
