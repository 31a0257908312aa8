"""Layer graphs inferred from tensor names and shapes, with PyTorch naming conventions.

Used for files that store tensors without a graph: safetensors, npz and PyTorch state dicts.
Everything here is a heuristic, so it errs towards saying less: a link is only made when the
shapes agree *and* the names make it likely; attention projections are left unlinked.
"""

from __future__ import annotations

import json
import re
from collections.abc import Callable, Mapping
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np

from steelyard.errors import LoadError
from steelyard.graph import (
    Activation,
    Checkpoint,
    Format,
    Layer,
    LayerKind,
    Link,
    Norm,
    NormKind,
    OptimizerState,
    RowSlice,
    Tensor,
    TensorRole,
    mark_outputs,
)
from steelyard.loaders.base import MAX_METADATA_BYTES

_EMBEDDING = re.compile(
    r"(^|[._])(embed\w*|embeddings?|wte|wpe|tok_embeddings|word_embeddings|"
    r"position_embeddings|token_type_embeddings|shared|emb)($|[._])",
    re.IGNORECASE,
)
_NORM = re.compile(r"(norm|^ln|[._]ln|ln_?\d*$|bn\d*$|^bn|[._]bn|layernorm|gn\d*$)", re.IGNORECASE)
_TRANSPOSED = re.compile(r"(convtranspose|conv_transpose|deconv|upconv|transposed)", re.IGNORECASE)
#: ``weight_ih_l0`` (nn.LSTM/GRU/RNN) and ``weight_ih`` (nn.LSTMCell/GRUCell/RNNCell).
_RECURRENT = re.compile(r"^(weight|bias)_(ih|hh)(?:_l(\d+))?(_reverse)?$")
#: Producer → consumer leaf names that mark the two halves of a feed-forward block.
_PAIRS: tuple[tuple[str, str], ...] = (
    ("fc1", "fc2"),
    ("c_fc", "c_proj"),
    ("up_proj", "down_proj"),
    ("gate_proj", "down_proj"),
    ("w1", "w2"),
    ("w3", "w2"),
    ("wi", "wo"),
    ("wi_0", "wo"),
    ("wi_1", "wo"),
    ("fc_in", "fc_out"),
    ("dense_h_to_4h", "dense_4h_to_h"),
    ("lin1", "lin2"),
    ("linear1", "linear2"),
)
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
#: HF models whose Conv1D modules store Linear weights as [in, out].
_IN_OUT_MODELS = {"gpt2", "openai-gpt", "decision_transformer", "imagegpt"}
_IN_OUT_LEAVES = {"c_attn", "c_fc", "c_proj", "q_attn"}
_GATES = {4: ("i", "f", "g", "o"), 3: ("r", "z", "n"), 1: ("h",)}
_GATE_ACT = {
    "i": Activation.SIGMOID,
    "f": Activation.SIGMOID,
    "o": Activation.SIGMOID,
    "r": Activation.SIGMOID,
    "z": Activation.SIGMOID,
    "g": Activation.TANH,
    "n": Activation.TANH,
    "h": Activation.TANH,
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
    if not candidate.is_file() or candidate.is_symlink():
        return None
    if candidate.stat().st_size > MAX_METADATA_BYTES:
        raise LoadError(candidate, "is larger than the 100 MB cap")
    try:
        data = json.loads(candidate.read_text(encoding="utf-8"))
    except (UnicodeDecodeError, ValueError, RecursionError) as exc:
        raise LoadError(candidate, f"is not valid JSON ({exc})") from None
    return data if isinstance(data, dict) else None


@dataclass
class _Module:
    """Tensors sharing one module prefix (``a.b.weight`` and ``a.b.bias`` → ``a.b``)."""

    name: str
    leaves: dict[str, Tensor]

    @property
    def parent(self) -> str:
        return self.name.rsplit(".", 1)[0] if "." in self.name else ""

    @property
    def leaf(self) -> str:
        return self.name.rsplit(".", 1)[-1]


def _split(name: str) -> tuple[str, str]:
    if "." in name:
        module, leaf = name.rsplit(".", 1)
        return module, leaf
    return "", name


def _float_reader(
    tensor: Tensor, transform: Callable[[np.ndarray], np.ndarray] | None = None
) -> Callable[[], np.ndarray]:
    def read() -> np.ndarray:
        array = tensor.read_float32()
        return np.ascontiguousarray(transform(array)) if transform else array

    return read


#: Stored orientation is canonical; a RowSlice (not a bare function) tells the audit so.
_identity = RowSlice()


def _rows(rows: slice) -> RowSlice:
    """A transform taking one gate's rows of a stacked recurrent matrix."""
    return RowSlice(rows.start or 0, rows.stop)


def _norm_of(module: _Module) -> Norm | None:
    """A module that is a normalisation (1-D weight and/or running statistics)."""
    leaves = module.leaves
    weight = leaves.get("weight") or leaves.get("gamma")
    bias = leaves.get("bias") or leaves.get("beta")
    if "running_mean" in leaves and "running_var" in leaves:
        return Norm(
            kind=NormKind.BATCH,
            scale=weight.name if weight is not None and len(weight.shape) == 1 else None,
            shift=bias.name if bias is not None else None,
            mean=leaves["running_mean"].name,
            var=leaves["running_var"].name,
            eps=1e-5,
        )
    if weight is None or len(weight.shape) != 1:
        return None
    if not _NORM.search(module.name) and module.leaf not in ("LayerNorm",):
        return None
    kind = NormKind.RMS if bias is None and "rms" in module.name.lower() else NormKind.LAYER
    if bias is None and kind is NormKind.LAYER and re.search(r"(^|[._])(ln|norm)", module.name):
        kind = NormKind.RMS if "layernorm" not in module.name.lower() else NormKind.LAYER
    if re.search(r"(group_?norm|(^|[._])gn\d*$)", module.name, re.IGNORECASE):
        kind = NormKind.GROUP
    return Norm(
        kind=kind, scale=weight.name, shift=bias.name if bias is not None else None, eps=1e-5
    )


def _unit_count(module: _Module) -> int:
    leaves = module.leaves
    for key in ("weight", "gamma", "running_mean"):
        if key in leaves and leaves[key].shape:
            return leaves[key].shape[0]
    return -1


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
    return Checkpoint(
        path=str(path),
        format=format,
        tensors=tensors,
        layers=layers,
        file_size=size,
        files=tuple(str(f) for f in files),
        optimizer=optimizer,
        notes=(*notes, *layer_notes),
    )


def build_layers(
    tensors: Mapping[str, Tensor],
    config: Mapping[str, Any] | None,
    source: Path,
) -> tuple[tuple[Layer, ...], list[str]]:
    """Infer layers, norms and links from names and shapes (PyTorch conventions).

    Returns the layers (``linked_by`` ``inferred`` where a link was made, else ``none``) and
    notes for the report.
    """
    modules: dict[str, _Module] = {}
    for name, tensor in tensors.items():
        module, leaf = _split(name)
        modules.setdefault(module, _Module(module, {})).leaves[leaf] = tensor
    # First appearance is module registration order for state dicts, the best order we have.
    order = list(modules)
    model_type = str((config or {}).get("model_type", "")).lower()
    hidden_act = _HF_ACT.get(str((config or {}).get("hidden_act", "")).lower())
    notes: list[str] = []

    layers: list[Layer] = []
    norms: dict[str, Norm] = {}
    for module_name in order:
        entry = modules[module_name]
        norm = _norm_of(entry)
        if norm is not None:
            norms[module_name] = norm
            continue
        layers.extend(_recurrent_layers(entry))
        layer = _weight_layer(entry, model_type)
        if layer is not None:
            layers.append(layer)

    layers = _attach_norms(layers, modules, norms)
    layers, linked = _link(layers, hidden_act)
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


def _weight_layer(module: _Module, model_type: str) -> Layer | None:
    weight = module.leaves.get("weight")
    if weight is None or weight.role is not TensorRole.PARAMETER or len(weight.shape) < 2:
        return None
    bias = module.leaves.get("bias")
    if bias is not None and (len(bias.shape) != 1 or bias.role is not TensorRole.PARAMETER):
        bias = None
    shape = weight.shape
    transform: Callable[[np.ndarray], np.ndarray] | None = None
    if len(shape) == 2:
        if model_type in _IN_OUT_MODELS and module.leaf in _IN_OUT_LEAVES:
            out, fan = shape[1], shape[0]
            transform = np.transpose
        else:
            out, fan = shape
        kind = (
            LayerKind.EMBEDDING
            if _EMBEDDING.search(module.name) and bias is None
            else LayerKind.DENSE
        )
        kernel: tuple[int, ...] = ()
    elif len(shape) in (3, 4, 5):
        if _TRANSPOSED.search(module.name):
            kind = LayerKind.CONV_TRANSPOSE
            # PyTorch ConvTranspose stores [in, out/groups, k...]; canonical rows are outputs.
            out, fan = shape[1], shape[0]
            transform = lambda a: np.swapaxes(a, 0, 1)  # noqa: E731
        else:
            kind = LayerKind.CONV
            out, fan = shape[0], shape[1]
        kernel = tuple(shape[2:])
    else:
        return None
    if bias is not None and bias.shape[0] != out:
        bias = None
    return Layer(
        name=module.name or weight.name,
        kind=kind,
        weight=weight.name,
        bias=bias.name if bias is not None else None,
        units=out,
        in_per_group=fan,
        kernel=kernel,
        groups=1,
        activation=Activation.UNKNOWN,
        weight_view=_float_reader(weight, transform),
        bias_view=_float_reader(bias) if bias is not None else None,
        orient=transform or _identity,
    )


def _recurrent_layers(module: _Module) -> list[Layer]:
    """``weight_ih_l{k}`` / ``weight_hh_l{k}`` split into one layer per gate."""
    out: list[Layer] = []
    for leaf, weight in module.leaves.items():
        match = _RECURRENT.match(leaf)
        if not match or match.group(1) != "weight" or len(weight.shape) != 2:
            continue
        _, which, depth, reverse = match.groups()
        level = f"_l{depth}" if depth is not None else ""
        suffix = f"_{which}{level}{reverse or ''}"
        hh = module.leaves.get(f"weight_hh{level}{reverse or ''}")
        hidden = hh.shape[1] if hh is not None and len(hh.shape) == 2 else None
        rows = weight.shape[0]
        if not hidden or rows % hidden or rows // hidden not in _GATES:
            continue
        gates = _GATES[rows // hidden]
        bias = module.leaves.get(f"bias{suffix}")
        for index, gate in enumerate(gates):
            sl = slice(index * hidden, (index + 1) * hidden)
            out.append(
                Layer(
                    name=f"{module.name + '.' if module.name else ''}{which}{level}{reverse or ''}.{gate}",
                    kind=LayerKind.RECURRENT,
                    weight=weight.name,
                    bias=bias.name if bias is not None else None,
                    units=hidden,
                    in_per_group=weight.shape[1],
                    kernel=(),
                    groups=1,
                    activation=_GATE_ACT[gate],
                    weight_view=_float_reader(weight, _rows(sl)),
                    orient=_rows(sl),
                    bias_view=_float_reader(bias, _rows(sl)) if bias is not None else None,
                    gate=gate,
                )
            )
    return out


def _sibling_norm(name: str, parent: str, leaf: str, norms: Mapping[str, Norm]) -> str | None:
    """The norm module that normalises this layer's units, by PyTorch naming habits."""
    prefix = f"{parent}." if parent else ""
    candidates: list[str] = []
    digits = re.search(r"(\d+)$", leaf)
    if leaf.isdigit():
        candidates.append(f"{prefix}{int(leaf) + 1}")
    if digits and not leaf.isdigit():
        number = digits.group(1)
        for stem in ("bn", "norm", "gn", "ln", "batchnorm", "bn_"):
            candidates.append(f"{prefix}{stem}{number}")
    if leaf in ("conv", "dense"):
        candidates += [f"{prefix}bn", f"{prefix}norm", f"{prefix}LayerNorm", f"{prefix}layer_norm"]
    if leaf == "dense":
        candidates += [f"{prefix}LayerNorm"]
    for candidate in candidates:
        if candidate in norms:
            return candidate
    return None


def _attach_norms(
    layers: list[Layer], modules: Mapping[str, _Module], norms: Mapping[str, Norm]
) -> list[Layer]:
    out: list[Layer] = []
    for layer in layers:
        if layer.kind in (LayerKind.RECURRENT, LayerKind.EMBEDDING):
            out.append(layer)
            continue
        parent, leaf = _split(layer.name)
        found = _sibling_norm(layer.name, parent, leaf, norms)
        if found is not None and _unit_count(modules[found]) == layer.units:
            out.append(replace(layer, norm=norms[found]))
        else:
            out.append(layer)
    return out


def _link(layers: list[Layer], hidden_act: Activation | None) -> tuple[list[Layer], bool]:
    """Producer → consumer links where shapes agree and names make it likely."""
    by_name = {layer.name: layer for layer in layers}
    sources: dict[str, list[str]] = {}
    activations: dict[str, Activation] = {}
    for layer in layers:
        if layer.kind not in (LayerKind.DENSE, LayerKind.CONV, LayerKind.CONV_TRANSPOSE):
            continue
        parent, leaf = _split(layer.name)
        prefix = f"{parent}." if parent else ""
        found: list[str] = []
        for producer_leaf, consumer_leaf in _PAIRS:
            if leaf == consumer_leaf and f"{prefix}{producer_leaf}" in by_name:
                found.append(f"{prefix}{producer_leaf}")
        # BERT-style: <block>.intermediate.dense → <block>.output.dense
        if layer.name.endswith(".output.dense") and ".attention." not in layer.name:
            block = layer.name[: -len(".output.dense")]
            if f"{block}.intermediate.dense" in by_name:
                found.append(f"{block}.intermediate.dense")
        # Numbered siblings: convN → convN+1, fcN → fcN+1, seq.N → next numbered layer.
        previous = _previous_sibling(layer, parent, leaf, by_name)
        if previous is not None and not found:
            found.append(previous)
        found = [
            name
            for name in found
            if by_name[name].units * (layer.groups or 1) == layer.in_per_group * layer.groups
            and by_name[name].kind is not LayerKind.EMBEDDING
        ]
        if found:
            sources[layer.name] = found
            if hidden_act is not None:
                for name in found:
                    producer_leaf = _split(name)[1]
                    if producer_leaf in ("up_proj", "w3", "wi_1"):
                        activations[name] = Activation.IDENTITY
                    elif name.endswith("intermediate.dense") or producer_leaf in dict(_PAIRS):
                        activations[name] = hidden_act
    linked: list[Layer] = []
    for layer in layers:
        update: dict[str, Any] = {}
        if layer.name in sources:
            update.update(inputs_from=tuple(sources[layer.name]), linked_by=Link.INFERRED)
        if layer.name in activations:
            update["activation"] = activations[layer.name]
        linked.append(replace(layer, **update) if update else layer)
    return linked, bool(sources)


def _previous_sibling(
    layer: Layer, parent: str, leaf: str, by_name: Mapping[str, Layer]
) -> str | None:
    prefix = f"{parent}." if parent else ""
    if leaf.isdigit():
        for index in range(int(leaf) - 1, -1, -1):
            name = f"{prefix}{index}"
            if name in by_name:
                return name
        return None
    match = re.fullmatch(r"(conv|fc|linear|dense|layer|lin|hidden)(_?)(\d+)", leaf)
    if match:
        stem, sep, number = match.groups()
        for index in range(int(number) - 1, -1, -1):
            name = f"{prefix}{stem}{sep}{index}"
            if name in by_name:
                return name
    return None


#: Layout files beside a checkpoint: ``<file stem>.layout.toml`` or ``steelyard.layout.toml``.
LAYOUT_NAMES = ("{stem}.layout.toml", "steelyard.layout.toml")
_ACTIVATIONS = {a.value: a for a in Activation}
_KINDS = {k.value: k for k in LayerKind}


def read_layout(source: Path) -> dict[str, Any] | None:
    """The user's layout file for ``source``, validated, or None."""
    from steelyard._toml import tomllib

    for pattern in LAYOUT_NAMES:
        candidate = source.parent / pattern.format(stem=source.name.split(".")[0])
        if candidate.is_file() and not candidate.is_symlink():
            break
    else:
        return None
    try:
        data = tomllib.loads(candidate.read_text(encoding="utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError, OSError) as exc:
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
    allowed = {"name", "orientation", "activation", "inputs-from", "kind"}
    for entry in entries:
        unknown = set(entry) - allowed
        if unknown or not isinstance(entry.get("name"), str):
            raise LoadError(
                candidate, f"layout [[layer]] needs a 'name' and only {sorted(allowed)}"
            )
        if entry.get("orientation", "out-in") not in ("out-in", "in-out"):
            raise LoadError(
                candidate, f"layer {entry['name']!r}: orientation must be out-in or in-out"
            )
        if entry.get("activation", "unknown") not in _ACTIVATIONS:
            raise LoadError(
                candidate, f"layer {entry['name']!r}: unknown activation {entry['activation']!r}"
            )
        if entry.get("kind", "dense") not in _KINDS:
            raise LoadError(candidate, f"layer {entry['name']!r}: unknown kind {entry['kind']!r}")
        sources = entry.get("inputs-from", [])
        if not isinstance(sources, list) or not all(isinstance(x, str) for x in sources):
            raise LoadError(
                candidate, f"layer {entry['name']!r}: inputs-from must be a list of names"
            )
    data["__path__"] = str(candidate)
    return data


def apply_layout(
    layers: list[Layer], tensors: Mapping[str, Tensor], layout: Mapping[str, Any], source: Path
) -> list[Layer]:
    """Apply the user's orientation, activation, kind and link overrides."""
    by_name = {entry["name"]: entry for entry in layout.get("layer", [])}
    known = {layer.name for layer in layers}
    for name in by_name:
        if name not in known:
            raise LoadError(
                str(layout["__path__"]), f"layout names layer {name!r}, which the checkpoint lacks"
            )
    default = layout.get("orientation", "out-in")
    out: list[Layer] = []
    for layer in layers:
        entry = by_name.get(layer.name, {})
        orientation = entry.get("orientation", default)
        update: dict[str, Any] = {}
        weight = tensors[layer.weight]
        if orientation == "in-out" and len(weight.shape) == 2 and layer.gate is None:
            update.update(
                units=weight.shape[1],
                in_per_group=weight.shape[0],
                weight_view=_float_reader(weight, np.transpose),
                orient=np.transpose,
            )
            bias = tensors.get(layer.bias) if layer.bias else None
            if bias is not None and bias.shape != (weight.shape[1],):
                update.update(bias=None, bias_view=None)
        if "activation" in entry:
            update["activation"] = _ACTIVATIONS[entry["activation"]]
        if "kind" in entry:
            update["kind"] = _KINDS[entry["kind"]]
        if "inputs-from" in entry:
            missing = [n for n in entry["inputs-from"] if n not in known]
            if missing:
                raise LoadError(
                    str(layout["__path__"]), f"layer {layer.name!r} is fed by unknown {missing}"
                )
            update.update(inputs_from=tuple(entry["inputs-from"]), linked_by=Link.INFERRED)
        out.append(replace(layer, **update) if update else layer)
    return out
