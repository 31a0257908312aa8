"""ONNX models: stored tensors, layers in canonical orientation, and exact graph links.

Tensors come from initializers, sparse initializers and Constant nodes, in the main graph
and in every If/Loop/Scan body. Weight bytes stay on disk until read (see
:mod:`steelyard.loaders.onnx.wire` and :mod:`steelyard.loaders.onnx.stored`); layers read
them through look-through views
(:mod:`steelyard.loaders.onnx.lookthrough`), quantized ones through their dequantization
(:mod:`steelyard.loaders.onnx.quantized`). Nodes become layer drafts in canonical orientation
(:mod:`steelyard.loaders.onnx.layer_builder`); links, biases, norms and activations come from
walks over the node graph (:mod:`steelyard.loaders.onnx.node_graph`,
:mod:`~steelyard.loaders.onnx.output_walk`, :mod:`~steelyard.loaders.onnx.input_walk`), so
they are exact, never guessed. Which stored tensors count as parameters is
:mod:`~steelyard.loaders.onnx.tensor_roles`.

A Loop or Scan state that the body hands back unchanged holds its initial value in every
iteration; when that value is a constant (exporters carry weights into loop bodies so), ops in
the body read it as that constant, and the layer it feeds names the outer initializer.
"""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path
from typing import TYPE_CHECKING

from steelyard.errors import LoadError
from steelyard.graph import Checkpoint, Format, Layer, LayerKind, Link, Tensor, mark_outputs
from steelyard.loaders.layer_parts import layer_geometry, make_layer, weight_source
from steelyard.loaders.onnx.file_bytes import FileBytes
from steelyard.loaders.onnx.input_walk import InputWalk
from steelyard.loaders.onnx.layer_builder import LayerBuilder, unique_names
from steelyard.loaders.onnx.layer_draft import Draft, f32
from steelyard.loaders.onnx.lookthrough import Folder, View
from steelyard.loaders.onnx.node_graph import Graphs
from steelyard.loaders.onnx.output_walk import OutputWalk
from steelyard.loaders.onnx.quantized import dequantize
from steelyard.loaders.onnx.recurrent import HIDDEN_GATE
from steelyard.loaders.onnx.stored import text
from steelyard.loaders.onnx.tensor_roles import tensor_roles
from steelyard.loaders.onnx.wire import parse_model
from steelyard.loaders.signatures import onnx_model

if TYPE_CHECKING:
    from onnx import ModelProto


def _layers(graphs: Graphs, folder: Folder, drafts: list[Draft]) -> tuple[Layer, ...]:
    unit_outputs: dict[str, tuple[str, ...]] = {}
    data_inputs: dict[int, int] = {}
    for draft in drafts:
        position = draft.node.inputs.index(draft.data) if draft.data in draft.node.inputs else -1
        data_inputs[draft.node.index] = position
        if draft.kind is LayerKind.EMBEDDING:
            unit_outputs[draft.out] = ()
        elif draft.kind is not LayerKind.RECURRENT and draft.out:
            unit_outputs[draft.out] = (draft.name,)
    by_node: dict[int, list[Draft]] = {}
    for draft in drafts:
        if draft.kind is LayerKind.RECURRENT:
            by_node.setdefault(draft.node.index, []).append(draft)
    for node_drafts in by_node.values():
        node = node_drafts[0].node
        gates = [d for d in node_drafts if d.own_inputs is None]
        hidden = tuple(d.name for d in gates if d.gate == HIDDEN_GATE[node.op])
        cell = tuple(d.name for d in gates if d.gate == "c")
        for position, key in enumerate(node.outputs[:3]):
            if key:
                unit_outputs[key] = cell if position == 2 else hidden
    forward = OutputWalk(graphs, folder, data_inputs)
    backward = InputWalk(graphs, folder, data_inputs, unit_outputs)
    layers: list[Layer] = []
    for draft in drafts:
        activation, norm = draft.activation, None
        bias, bias_view = draft.bias, draft.bias_view
        if activation is None:
            followed = forward.follow(
                draft.out, draft.units, draft.trailing, draft.want_bias, draft.opaque_next
            )
            activation, norm = followed.activation, followed.norm
            if followed.bias is not None and bias is None:
                bias = followed.bias.source
                bias_view = f32(followed.bias.read, shape=(draft.units,))
        if draft.own_inputs is not None:
            inputs: tuple[str, ...] | None = draft.own_inputs
        else:
            inputs = backward.sources(draft.data)
        weight = draft.weight.source if isinstance(draft.weight, View) else draft.weight.weight
        source = weight_source(
            weight, draft.view, draft.orient, bias, None if bias is None else bias_view
        )
        geometry = layer_geometry(draft.units, draft.in_per_group, draft.kernel, draft.groups)
        layers.append(
            make_layer(
                draft.name,
                draft.kind,
                activation,
                geometry,
                source,
                norm=norm,
                inputs_from=inputs or (),
                linked_by=Link.NONE if inputs is None else Link.GRAPH,
                gate=draft.gate,
            )
        )
    return _heads(mark_outputs(layers), drafts, backward.reaching())


def _heads(layers: tuple[Layer, ...], drafts: list[Draft], reach: set[str]) -> tuple[Layer, ...]:
    """Keep ``is_output`` only where the graph shows that no layer reads the output at all.

    ``mark_outputs`` sees known links only; a layer whose consumer's link is unknown would
    otherwise pass for a head. A recurrent node is a head when none of its outputs reach a
    layer, and then only its hidden-state W gates are marked (the other gates and the R
    layers are internal to the cell).
    """
    out: list[Layer] = []
    for layer, draft in zip(layers, drafts, strict=True):
        if layer.kind is LayerKind.RECURRENT:
            head = (
                draft.own_inputs is None
                and draft.gate == HIDDEN_GATE[draft.node.op]
                and bool(layer.inputs_from)
                and not any(k in reach for k in draft.node.outputs if k)
            )
        else:
            head = layer.is_output and draft.out not in reach
        out.append(replace(layer, is_output=head) if head != layer.is_output else layer)
    return tuple(out)


def _describe(model: ModelProto) -> str:
    opsets = (
        ", ".join(f"{text(o.domain) or 'ai.onnx'} {o.version}" for o in model.opset_import)
        or "none"
    )
    producer = " ".join(p for p in (text(model.producer_name), text(model.producer_version)) if p)
    return f"ONNX IR version {model.ir_version}, opsets: {opsets}" + (
        f", produced by {producer}" if producer else ""
    )


class OnnxLoader:
    """ONNX protobuf models (``.onnx``), with external data files beside them."""

    format = Format.ONNX

    def sniff(self, path: Path, head: bytes) -> bool:
        """True when the first bytes parse as ModelProto fields (content, not extension)."""
        return onnx_model(path, head)

    def load(self, path: Path) -> Checkpoint:
        """Read the model's structure; tensor bytes stay on disk until read."""
        try:
            files = FileBytes(path)
        except OSError as exc:
            raise LoadError(path, f"cannot be opened ({exc.strerror})") from None
        model = parse_model(path, files.size)
        graphs = Graphs(files)
        graphs.walk(model.graph)
        folder = Folder(
            graphs.stored, graphs.producer, path, dequantize, graphs.invariant, files.ledger
        )
        builder = LayerBuilder(graphs, folder)
        drafts = builder.drafts()
        unique_names(drafts)
        layers = _layers(graphs, folder, drafts)
        roles = tensor_roles(graphs, folder, drafts, builder.scale_uses)
        tensors = {
            key: Tensor(
                name=key,
                shape=s.shape,
                dtype=s.dtype.name,
                role=roles[key],
                reader=s.reader,
                read_span=s.span,
                fill_span=s.fill,
            )
            for key, s in graphs.stored.items()
        }
        notes = [_describe(model), *builder.notes]
        if files.files:
            notes.append(f"external data read from {len(files.files)} file(s)")
        if graphs.skipped:
            notes.append(f"{len(graphs.skipped)} string tensor(s) left out")
        return Checkpoint(
            path=str(path),
            format=self.format,
            tensors=tensors,
            layers=layers,
            file_size=files.size + sum(files.files.values()),
            files=(str(path), *(str(f) for f in files.files)),
            notes=tuple(notes),
        )


__all__ = ["OnnxLoader"]
