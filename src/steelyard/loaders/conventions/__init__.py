"""Layer graphs inferred from tensor names and shapes, with PyTorch naming conventions.

Used for files that store tensors without a graph: safetensors, npz and PyTorch state dicts
(:func:`inferred_checkpoint`). Everything here is a heuristic, so it errs towards saying less.
The steps, one module each:

* :mod:`.module_names`: tensor names grouped into modules, weight-norm parametrizations and
  plain NumPy suffixes (``fc_w``, ``lstm_w_ih_l0``) mapped onto PyTorch leaf names;
* :mod:`.module_layers`: each module read as a norm or a weight layer (with
  :mod:`.views`, how its canonical weight is read, e.g. weight norm's ``g·v/‖v‖``);
* :mod:`.recurrent`: recurrent modules split into one layer per gate;
* :mod:`.wiring` (with :mod:`.numbering`): depthwise and grouped convolutions, norms beside
  their layer, producer → consumer links;
* :mod:`.layout_file`: the user's layout file, which adjusts inferred layers or declares new
  ones.
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from steelyard.errors import LoadError
from steelyard.graph import (
    Activation,
    Checkpoint,
    Format,
    Layer,
    Norm,
    OptimizerState,
    Tensor,
    TensorRole,
    mark_outputs,
)
from steelyard.loaders.base import MAX_METADATA_BYTES, checkpoint_from
from steelyard.loaders.conventions.layout_file import apply_layout, read_layout
from steelyard.loaders.conventions.module_layers import norm_of, weight_layer
from steelyard.loaders.conventions.module_names import group_modules
from steelyard.loaders.conventions.recurrent import recurrent_layers
from steelyard.loaders.conventions.wiring import attach_norms, infer_groups, link_layers
from steelyard.loaders.stacked_experts import Quota, expert_layers
from steelyard.safepath import read_beside

#: HF ``hidden_act`` values → activation.
_HF_ACT: dict[str, Activation] = {
    "relu": Activation.RELU,
    "gelu": Activation.GELU,
    "gelu_new": Activation.GELU,
    "gelu_pytorch_tanh": Activation.GELU,
    "gelu_fast": Activation.GELU,
    "quick_gelu": Activation.GELU,
    "silu": Activation.SILU,
    "swish": Activation.SILU,
    "tanh": Activation.TANH,
    "sigmoid": Activation.SIGMOID,
    "leaky_relu": Activation.LEAKY_RELU,
}


def role_for(name: str, is_float: bool) -> TensorRole:
    """Floating tensors are parameters; integer ones are bookkeeping unless a quantized weight."""
    if is_float:
        return TensorRole.PARAMETER
    leaf = name.rsplit(".", 1)[-1]
    if leaf in ("weight", "qweight") or leaf.endswith("_weight"):
        return TensorRole.QUANTIZED
    return TensorRole.BOOKKEEPING


def read_hf_config(folder: Path) -> dict[str, Any] | None:
    """A Hugging Face style ``config.json`` beside the checkpoint, if present and sane."""
    candidate = folder / "config.json"
    # One confinement rule for every side file: links, FIFOs and devices count as absent.
    raw = read_beside(candidate, candidate.name, "model config", MAX_METADATA_BYTES)
    if raw is None:
        return None
    try:
        data = json.loads(raw.decode("utf-8"))
    except (UnicodeDecodeError, ValueError, RecursionError) as exc:
        raise LoadError(candidate, f"is not valid JSON ({exc})") from None
    return data if isinstance(data, dict) else None


def inferred_checkpoint(
    path: Path,
    format: Format,
    tensors: dict[str, Tensor],
    files: tuple[Path, ...],
    size: int,
    notes: tuple[str, ...] | list[str] = (),
    optimizer: OptimizerState | None = None,
) -> Checkpoint:
    """The checkpoint of a graph-less file (safetensors, npz, PyTorch): layers inferred from
    the tensor names and a ``config.json`` beside ``path``, their notes after ``notes``."""
    layers, layer_notes = build_layers(tensors, read_hf_config(path.parent), source=path)
    return checkpoint_from(path, format, size, (tensors, layers, optimizer, layer_notes), files, notes)


def build_layers(
    tensors: Mapping[str, Tensor],
    config: Mapping[str, Any] | None,
    source: Path,
) -> tuple[tuple[Layer, ...], list[str]]:
    """Infer layers, norms and links from names and shapes (PyTorch conventions).

    Returns the layers (``linked_by`` ``inferred`` where a link was made, else ``none``) and
    notes for the report.
    """
    modules = group_modules(tensors)
    # First appearance is module registration order for state dicts, the best order we have.
    order = list(modules)
    model_type = str((config or {}).get("model_type", "")).lower()
    hidden_act = _HF_ACT.get(str((config or {}).get("hidden_act", "")).lower())
    notes: list[str] = []

    layers: list[Layer] = []
    norms: dict[str, Norm] = {}
    quota = Quota()
    for module_name in order:
        entry = modules[module_name]
        norm = norm_of(entry)
        if norm is not None:
            norms[module_name] = norm
            continue
        layers.extend(recurrent_layers(entry))
        layers.extend(
            expert_layers(entry.name, entry.leaves, tensors, quota)
        )  # stacked [experts, …]
        layer = weight_layer(entry, model_type)
        if layer is not None:
            layers.append(layer)

    layers = attach_norms(layers, modules, norms)
    layers = infer_groups(layers, notes)
    layers, linked = link_layers(layers, hidden_act)
    layout = read_layout(source)
    if layout is not None:
        layers = apply_layout(layers, tensors, layout, source)
        notes.append(f"layers adjusted by the layout file {layout['__path__']}")
        linked = linked or any(layer.inputs_from for layer in layers)
    if config is not None:
        notes.append("layer roles refined with config.json beside the checkpoint")
    if layers and not linked:
        notes.append("no producer-consumer links could be inferred from names and shapes")
    return mark_outputs(layers), notes
