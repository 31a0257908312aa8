"""One Keras atom as layers: Dense, Conv, ConvTranspose, DepthwiseConv and Embedding become one
layer, SeparableConv two (depthwise + pointwise), LSTM/GRU/SimpleRNN one per gate and part
(kernel and recurrent kernel), each in canonical orientation with its bias, activation,
constraint and regularizer."""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from steelyard.errors import LoadError
from steelyard.graph import Activation, Layer, LayerKind, Link, Tensor
from steelyard.loaders.keras import attention as ka
from steelyard.loaders.keras.layer_classes import (
    ATTENTION,
    CONV,
    CONV_T,
    DENSE,
    DEPTHWISE,
    EMBEDDING,
    RNN_GATES,
    SEPARABLE,
)
from steelyard.loaders.keras.layer_settings import activation_of, constraint_of, regularizer_of
from steelyard.loaders.keras.model_config import Atom
from steelyard.loaders.keras.orientation import (
    bias_slice,
    conv_canonical,
    conv_transpose_canonical,
    dense_canonical,
    depthwise_canonical,
    float_view,
    gate_columns,
    same,
)
from steelyard.loaders.layer_parts import (
    WeightSource,
    canonical_geometry,
    layer_geometry,
    make_layer,
    weight_source,
)


@dataclass
class Built:
    """The layers one atom became, and which of them face its inputs and its consumers."""

    layers: list[Layer]
    entry: list[str]
    """Layers whose inputs are the atom's inputs."""
    port: str | None
    """Layer whose units the atom outputs (None: outputs are not one layer's units)."""
    last: str | None
    """Layer that gets the atom's activation and norm."""


class LayerFactory:
    """Builds the layers of one atom, checking its variables' shapes against its class."""

    def __init__(self, source: Path) -> None:
        self.source = source
        self.attention: list[ka.AttentionFacts] = []
        """The head counts of every attention layer built, in model order."""

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
        return bias.name, float_view(bias, same)

    def build(self, atom: Atom, have_config: bool) -> Built | None:
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
            return _recurrent(self, atom, have_config)
        if cls in ATTENTION:
            return self._attention(atom, have_config)
        return None

    def _source(
        self,
        kernel: Tensor,
        orient: Callable[[np.ndarray], np.ndarray],
        bias: tuple[str | None, Callable[[], np.ndarray] | None] = (None, None),
    ) -> WeightSource:
        """``kernel`` read through ``orient``, with ``bias`` as :meth:`bias` returns it."""
        return weight_source(kernel.name, float_view(kernel, orient), orient, *bias)

    def _extras(
        self, atom: Atom, prefix: str, kernel: Tensor, unit_axes: set[int]
    ) -> dict[str, Any]:
        conf = atom.config
        ndim = len(kernel.shape)
        return {
            "constraint": constraint_of(conf.get(f"{prefix}_constraint"), ndim, unit_axes),
            "regularizer": regularizer_of(conf.get(f"{prefix}_regularizer")),
        }

    def _dense(self, atom: Atom, activation: Activation) -> Built:
        kernel = self.tensor(atom, "kernel")
        if len(kernel.shape) != 2:
            raise self.fail(
                atom, f"kernel {kernel.name!r} has shape {kernel.shape}, expected [in, out]"
            )
        fan, units = kernel.shape
        source = self._source(kernel, dense_canonical, self.bias(atom, units))
        extras = self._extras(atom, "kernel", kernel, {1})
        geometry = layer_geometry(units, fan)
        layer = make_layer(atom.name, LayerKind.DENSE, activation, geometry, source, **extras)
        return Built([layer], [atom.name], atom.name, atom.name)

    def _conv(self, atom: Atom, activation: Activation, rank: int, transposed: bool) -> Built:
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
        source = self._source(kernel, view, self.bias(atom, units))
        geometry = layer_geometry(units, fan, tuple(shape[:-2]), groups)
        extras = self._extras(atom, "kernel", kernel, {unit_axis})
        layer = make_layer(atom.name, kind, activation, geometry, source, **extras)
        return Built([layer], [atom.name], atom.name, atom.name)

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
        bias = self.bias(atom, units) if with_bias else (None, None)
        source = self._source(kernel, depthwise_canonical, bias)
        geometry = layer_geometry(units, 1, tuple(shape[:-2]), channels)
        extras = self._extras(atom, "depthwise", kernel, {rank, rank + 1})
        return make_layer(name, LayerKind.CONV, activation, geometry, source, **extras)

    def _depthwise(self, atom: Atom, activation: Activation, rank: int) -> Built:
        layer = self._depthwise_layer(
            atom, self.tensor(atom, "kernel"), rank, atom.name, activation, True
        )
        return Built([layer], [atom.name], atom.name, atom.name)

    def _separable(self, atom: Atom, activation: Activation, rank: int) -> Built:
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
        source = self._source(point, conv_canonical, self.bias(atom, units))
        pointwise = make_layer(
            point_name,
            LayerKind.CONV,
            activation,
            layer_geometry(units, shape[-2], tuple(shape[:-2])),
            source,
            inputs_from=(depth_name,),
            linked_by=Link.CONFIG,
            **self._extras(atom, "pointwise", point, {rank + 1}),
        )
        return Built([depthwise, pointwise], [depth_name], point_name, point_name)

    def _attention(self, atom: Atom, have_config: bool) -> Built:
        """Query, key, (gate,) value and output projections of a Keras attention layer as
        dense layers whose rows (columns for the output) run head by head; see
        :mod:`~steelyard.loaders.keras.attention`. Its facts go to :attr:`attention`."""
        try:
            found = ka.dims(atom.weights, atom.config, have_config)
        except ka.AttentionShapeError as exc:
            raise self.fail(atom, str(exc)) from None
        gated = "gate/kernel" in atom.weights
        layers: list[Layer] = []
        for part, _ in ka.PARTS:
            kernel = atom.weights.get(f"{part}/kernel")
            if kernel is None:
                continue
            shape = kernel.shape
            links: dict[str, Any] = {}
            if part == "attention_output":
                units, fan, orient = math.prod(shape[2:]), shape[0] * shape[1], ka.heads_last
                unit_axes = set(range(2, len(shape)))
                if found.kv_heads == found.heads and not gated and have_config:
                    # Input h·d_v + j is value unit h·d_v + j averaged over positions with
                    # weights that sum to 1: dead, constant or scaled as that unit is.
                    links = {"inputs_from": (f"{atom.name}/value",), "linked_by": Link.CONFIG}
            else:
                units, fan, orient, unit_axes = shape[1] * shape[2], shape[0], ka.heads_first, {1, 2}
            bias = atom.weights.get(f"{part}/bias")
            source = self._source(
                kernel, orient, (bias.name, float_view(bias, ka.flat)) if bias else (None, None)
            )
            activation = Activation.SIGMOID if part == "gate" else Activation.IDENTITY
            extras = self._extras(atom, "kernel", kernel, unit_axes)
            geometry = layer_geometry(units, fan)
            name = f"{atom.name}/{part}"
            layers.append(
                make_layer(name, LayerKind.DENSE, activation, geometry, source, **extras, **links)
            )
        self.attention.append(ka.facts(atom.name, atom.cls, found, gated, have_config))
        output = layers[-1].name
        # Query and key/value read different inputs in cross-attention; linked only when the
        # layer has one producer (self-attention).
        entry = [layer.name for layer in layers[:-1]] if len(set(atom.preds)) <= 1 else []
        return Built(layers, entry, output, output)

    def _embedding(self, atom: Atom) -> Built:
        table = self.tensor(atom, "embeddings")
        if len(table.shape) != 2:
            raise self.fail(
                atom, f"embeddings {table.name!r} has shape {table.shape}, expected [vocab, dim]"
            )
        conf = atom.config
        # Stored [vocab, dim] is already rows-first, like a lookup table elsewhere.
        layer = make_layer(
            atom.name,
            LayerKind.EMBEDDING,
            Activation.IDENTITY,
            canonical_geometry(table.shape),
            self._source(table, same),
            constraint=constraint_of(conf.get("embeddings_constraint"), 2, {0}),
            regularizer=regularizer_of(conf.get("embeddings_regularizer")),
        )
        return Built([layer], [atom.name], None, None)


def _recurrent(factory: LayerFactory, atom: Atom, have_config: bool) -> Built:
    """One layer per gate of the kernel and of the recurrent kernel ``[in or H, G·H]``."""
    gates = RNN_GATES[atom.cls]
    kernel = factory.tensor(atom, "kernel")
    recurrent = factory.tensor(atom, "recurrent_kernel")
    if len(recurrent.shape) != 2 or recurrent.shape[1] != len(gates) * recurrent.shape[0]:
        raise factory.fail(
            atom,
            f"recurrent kernel {recurrent.name!r} has shape {recurrent.shape}, expected [H, {len(gates)}·H]",
        )
    hidden = recurrent.shape[0]
    if len(kernel.shape) != 2 or kernel.shape[1] != len(gates) * hidden:
        raise factory.fail(
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
            raise factory.fail(atom, f"bias {bias.name!r} has shape {bias.shape}")
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
        extras = factory._extras(atom, prefix, tensor, {1})
        for index, gate in enumerate(gates):
            columns = slice(index * hidden, (index + 1) * hidden)
            name = f"{atom.name}/{part}/{gate}"
            bias_part: tuple[str | None, Callable[[], np.ndarray] | None] = (None, None)
            if bias is not None and row is not None:
                bias_part = (bias.name, float_view(bias, bias_slice(columns, row)))
            source = factory._source(tensor, gate_columns(columns), bias_part)
            geometry = layer_geometry(hidden, tensor.shape[0])
            layer = make_layer(
                name, LayerKind.RECURRENT, gate_acts[gate], geometry, source, gate=gate, **extras
            )
            layers.append(layer)
            if part == "kernel":
                entry.append(name)
    return Built(layers, entry, None, None)
