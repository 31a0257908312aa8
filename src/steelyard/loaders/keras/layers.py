"""Keras layers in canonical orientation, linked, activated and normalised from the config.

One :class:`~steelyard.loaders.keras.model_config.Atom` becomes one layer (Dense, Conv,
ConvTranspose, DepthwiseConv, Embedding), two (SeparableConv: depthwise + pointwise) or one
per gate and part (LSTM/GRU/SimpleRNN kernel and recurrent kernel). Links follow the
config's producers, looking through layers that keep a unit's identity.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass, replace
from functools import partial
from pathlib import Path
from typing import Any

import numpy as np

from steelyard.errors import LoadError
from steelyard.graph import (
    Activation,
    Layer,
    LayerKind,
    Link,
    Norm,
    NormKind,
    Tensor,
    mark_outputs,
)
from steelyard.loaders.keras.model_config import (
    ACTIVATION_LAYERS,
    BATCH_NORM,
    CONV,
    CONV_T,
    DENSE,
    DEPTHWISE,
    EMBEDDING,
    GROUP_NORM,
    LAYER_NORM,
    MAX_DEPTH,
    MERGE,
    PASS,
    RESHAPING,
    RNN_GATES,
    SEPARABLE,
    UNIT,
    Atom,
    activation_layer,
    activation_of,
    constraint_of,
    conv_canonical,
    conv_transpose_canonical,
    dense_canonical,
    depthwise_canonical,
    expected_roles,
    flag,
    number,
    regularizer_of,
)


@dataclass(frozen=True)
class _View:
    """A tensor read as float32 and brought into canonical orientation.

    A class rather than a closure so that checkpoints built in the HDF5 child process can be
    pickled back to the parent."""

    tensor: Tensor
    transform: Callable[[np.ndarray], np.ndarray]

    def __call__(self) -> np.ndarray:
        return np.ascontiguousarray(self.transform(self.tensor.read_float32()), dtype=np.float32)


def _view(tensor: Tensor, transform: Callable[[np.ndarray], np.ndarray]) -> _View:
    return _View(tensor, transform)


def _same(array: np.ndarray) -> np.ndarray:
    return array


def _gate(kernel: np.ndarray, columns: slice) -> np.ndarray:
    return np.asarray(kernel[:, columns].T)


def _gate_bias(bias: np.ndarray, columns: slice, row: int) -> np.ndarray:
    return np.asarray(bias[columns] if row == -1 else bias[row, columns])


def _gate_columns(columns: slice) -> Callable[[np.ndarray], np.ndarray]:
    """One gate of a recurrent kernel ``[in, G·H]`` → ``[H, in]``."""
    return partial(_gate, columns=columns)


def _bias_slice(columns: slice, row: int) -> Callable[[np.ndarray], np.ndarray]:
    """One gate of a recurrent bias: ``[G·H]`` (row -1) or row ``row`` of ``[2, G·H]``."""
    return partial(_gate_bias, columns=columns, row=row)


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
        if cls in DENSE:
            return self._dense(atom, activation)
        if cls in CONV:
            return self._conv(atom, activation, CONV[cls], transposed=False)
        if cls in CONV_T:
            return self._conv(atom, activation, CONV_T[cls], transposed=True)
        if cls in DEPTHWISE:
            return self._depthwise(atom, activation, DEPTHWISE[cls])
        if cls in SEPARABLE:
            return self._separable(atom, activation, SEPARABLE[cls])
        if cls in EMBEDDING:
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
            orient=dense_canonical,
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
            orient=view,
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
            orient=depthwise_canonical,
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
            orient=conv_canonical,
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
            orient=_same,
            constraint=constraint_of(conf.get("embeddings_constraint"), 2, {0}),
            regularizer=regularizer_of(conf.get("embeddings_regularizer")),
        )
        return _Built([layer], [atom.name], None, None)

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
                        orient=_gate_columns(columns),
                        bias_view=bias_view,
                        gate=gate,
                        **extras,
                    )
                )
                if part == "kernel":
                    entry.append(name)
        return _Built(layers, entry, None, None)


def _kind(cls: str) -> str:
    if cls in UNIT:
        return "unit"
    if cls == "InputLayer":
        return "input"
    if cls in MERGE:
        return "merge"
    if cls in PASS:
        return "pass"
    return "opaque"


class _Linker:
    """Producer → consumer resolution over the atom graph, looking through pass-through layers."""

    def __init__(self, atoms: list[Atom], built: Mapping[str, _Built]) -> None:
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
                    elif _kind(atom.cls) in ("pass", "merge"):
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
            kind = _kind(self.atoms[pred].cls)
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


def _norm_from(atom: Atom, units: int, producer: Atom) -> Norm | None:
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
        if atom.cls not in UNIT:
            continue
        needed = [
            r
            for r in (expected_roles(atom.cls, atom.config if have_config else {}) or [])
            if r != "bias"
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
                if sources is not None:
                    update.update(inputs_from=tuple(sources), linked_by=Link.CONFIG)
                if linker.from_input(atom.name):
                    update["from_input"] = True
                if atom.cls in DENSE and linker.channels_last_flatten(atom.name):
                    update["channels_last_inputs"] = True
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
            norm = _norm_from(follower, last.units, atom)
            if norm is not None:
                out["norm"] = norm
            break
    return out
