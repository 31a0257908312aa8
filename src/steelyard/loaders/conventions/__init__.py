"""Layer graphs inferred from tensor names and shapes, with PyTorch naming conventions.

Used for files that store tensors without a graph: safetensors, npz and PyTorch state dicts.
Everything here is a heuristic, so it errs towards saying less: a link is only made when the
shapes agree *and* the names make it likely; attention projections are left unlinked.

Names recognised besides ``<module>.weight`` / ``<module>.bias``:

* weight normalisation, ``<m>.weight_g`` + ``<m>.weight_v`` (``torch.nn.utils.weight_norm``)
  and ``<m>.parametrizations.weight.original0`` (g) + ``original1`` (v)
  (``torch.nn.utils.parametrizations.weight_norm``): the layer's weight is the effective
  ``g·v/‖v‖`` that the module computes, the norm taken over every dimension but ``dim``
  (read from g's shape: g keeps v's size there and 1 elsewhere; a one-element g means the
  norm of the whole tensor). ``Layer.weight`` names v, ``Layer.aux`` names g.
* plain suffixes, as hand-written NumPy code saves them: ``fc_w``/``fc_b``,
  ``conv1_weight``/``conv1_bias``, ``lstm_w_ih``/``lstm_w_hh``/``lstm_b_ih``/``lstm_b_hh``
  (optionally ``_l<k>`` and ``_reverse``) mean ``fc.weight`` and so on. Recurrent matrices
  may be stacked PyTorch-style ``[G·H, in]`` or transposed ``[in, G·H]``; the recurrent
  matrix's shape (``[G·H, H]`` or ``[H, G·H]``) tells which, and G (4: LSTM i,f,g,o; 3: GRU
  r,z,n; 1: plain RNN) follows from it.

A convolution whose weight is ``[C·m, 1, k…]`` reads one input channel per filter: unless it
is the first layer (a one-channel input), it is depthwise, and its groups are the channel
count of the layer feeding it (the numbered sibling before it, else the convolution before it
in stored order) when that count divides its filters. A grouped ``[out, in/g, k…]`` weight gets
``g = producer channels / (in/g)`` only from a producer its name makes known.
"""

from __future__ import annotations

import json
import math
import re
from bisect import bisect_left
from collections import defaultdict
from collections.abc import Callable, Iterable, Mapping
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
from steelyard.loaders.stacked_experts import Quota, expert_layers
from steelyard.safepath import read_beside

_EMBEDDING = re.compile(
    r"(^|[._])(embed\w*|embeddings?|wte|wpe|tok_embeddings|word_embeddings|"
    r"position_embeddings|token_type_embeddings|shared(?=$|\.)|emb)($|[._])",
    re.IGNORECASE,
)
_NORM = re.compile(r"(norm|^ln|[._]ln|ln_?\d*$|bn\d*$|^bn|[._]bn|layernorm|gn\d*$)", re.IGNORECASE)
_TRANSPOSED = re.compile(r"(convtranspose|conv_transpose|deconv|upconv|transposed)", re.IGNORECASE)
#: ``weight_ih_l0`` (nn.LSTM/GRU/RNN) and ``weight_ih`` (nn.LSTMCell/GRUCell/RNNCell).
_RECURRENT = re.compile(r"^(weight|bias)_(ih|hh)(?:_l(\d+))?(_reverse)?$")
#: Plain NumPy suffixes: ``fc_w``, ``conv1_bias``, ``lstm_w_ih_l0_reverse``.
_SUFFIX = re.compile(
    r"^(?P<stem>.*[A-Za-z0-9])_(?P<kind>w|W|b|weight|bias)"
    r"(?:_(?P<part>ih|hh))?(?P<level>_l\d+)?(?P<rev>_reverse)?$"
)
#: Leaves that already follow PyTorch naming (never re-read as a suffix convention).
_TORCH_LEAVES = frozenset(
    {
        "weight",
        "bias",
        "running_mean",
        "running_var",
        "num_batches_tracked",
        "weight_g",
        "weight_v",
        "gamma",
        "beta",
        "LayerNorm",
    }
)
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
    # One confinement rule for every side file: links, FIFOs and devices count as absent.
    raw = read_beside(candidate, candidate.name, "model config", MAX_METADATA_BYTES)
    if raw is None:
        return None
    try:
        data = json.loads(raw.decode("utf-8"))
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


def _modules(tensors: Mapping[str, Tensor]) -> dict[str, _Module]:
    """Tensors grouped by module, with weight-norm parametrizations and plain NumPy suffixes
    mapped onto PyTorch leaf names (the tensors keep their stored names)."""
    modules: dict[str, _Module] = {}

    def put(module: str, leaf: str, tensor: Tensor) -> bool:
        leaves = modules.setdefault(module, _Module(module, {})).leaves
        if leaf in leaves:
            return False
        leaves[leaf] = tensor
        return True

    for name, tensor in tensors.items():
        module, leaf = _split(name)
        if module.endswith("parametrizations.weight") and leaf in ("original0", "original1"):
            # parametrizations.weight_norm: original0 is g, original1 is v (torch docs).
            owner = module[: -len("parametrizations.weight")].rstrip(".")
            if put(owner, "weight_g" if leaf == "original0" else "weight_v", tensor):
                continue
        match = (
            _SUFFIX.match(leaf)
            if leaf not in _TORCH_LEAVES and not _RECURRENT.match(leaf)
            else None
        )
        if match is not None:
            stem, kind, part, level, rev = match.groups()
            mapped = "weight" if kind in ("w", "W", "weight") else "bias"
            if part:
                mapped += f"_{part}{level or ''}{rev or ''}"
            elif level or rev:
                mapped = ""
            owner = f"{module}.{stem}" if module else stem
            if mapped and put(owner, mapped, tensor):
                continue
        put(module, leaf, tensor)
    return {name: entry for name, entry in modules.items() if entry.leaves}


@dataclass(frozen=True, slots=True)
class _Same:
    """Stored orientation is canonical, but the canonical weight is not the stored tensor
    (weight norm): a plain callable, not a RowSlice, so the audit reads ``weight_view``."""

    def __call__(self, array: np.ndarray) -> np.ndarray:
        return array


@dataclass(frozen=True, slots=True)
class _ColumnsT:
    """Columns ``[start, stop)`` of a transposed recurrent matrix ``[in, G·H]``, as ``[H, in]``."""

    start: int
    stop: int

    def __call__(self, array: np.ndarray) -> np.ndarray:
        return np.asarray(array[:, self.start : self.stop].T)


def _norm_dim(g: tuple[int, ...], v: tuple[int, ...]) -> int | bool | None:
    """The ``dim`` of a weight-norm pair from the shapes of g and v: an axis, None (norm of
    the whole tensor), or False when the shapes are no weight-norm pair."""
    if math.prod(g) == 1:
        return None
    if len(g) == 1 and g[0] == v[0]:
        return 0  # g saved squeezed; the default dim=0
    if len(g) != len(v):
        return False
    axes = [d for d in range(len(v)) if g[d] != 1]
    if len(axes) == 1 and g[axes[0]] == v[axes[0]]:
        return axes[0]
    return False


@dataclass(frozen=True)
class _WeightNormView:
    """The effective weight ``g·v/‖v‖`` of a weight-normalised module, in canonical form.

    torch.nn.utils.weight_norm: ``w = g · v / ‖v‖`` with the norm over every dimension but
    ``dim`` (https://pytorch.org/docs/stable/generated/torch.nn.utils.weight_norm.html); the
    parametrization API computes the same (torch.nn.utils.parametrizations.weight_norm)."""

    g: Tensor
    v: Tensor
    dim: int | None
    transform: Callable[[np.ndarray], np.ndarray] | None = None

    def __call__(self) -> np.ndarray:
        v = self.v.read_float32().astype(np.float64)
        g = self.g.read_float32().astype(np.float64)
        if self.dim is None:
            norm: np.ndarray | float = float(np.sqrt(np.sum(v * v)))
            scale = g.reshape(())
        else:
            axes = tuple(d for d in range(v.ndim) if d != self.dim)
            norm = np.sqrt(np.sum(v * v, axis=axes, keepdims=True))
            shape = [1] * v.ndim
            shape[self.dim] = v.shape[self.dim]
            scale = g.reshape(shape)
        with np.errstate(divide="ignore", invalid="ignore"):
            weight = (v * (scale / norm)).astype(np.float32)
        return np.ascontiguousarray(self.transform(weight) if self.transform else weight)


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
    modules = _modules(tensors)
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
        norm = _norm_of(entry)
        if norm is not None:
            norms[module_name] = norm
            continue
        layers.extend(_recurrent_layers(entry))
        layers.extend(expert_layers(entry.name, entry.leaves, tensors, quota))  # stacked [experts, …]
        layer = _weight_layer(entry, model_type)
        if layer is not None:
            layers.append(layer)

    layers = _attach_norms(layers, modules, norms)
    layers = _infer_groups(layers, notes)
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
    gain: Tensor | None = None
    dim: int | bool | None = False
    if weight is None and "weight_g" in module.leaves and "weight_v" in module.leaves:
        gain, weight = module.leaves["weight_g"], module.leaves["weight_v"]
        dim = _norm_dim(gain.shape, weight.shape)
        if dim is False or gain.role is not TensorRole.PARAMETER:
            return None
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
    view: Callable[[], np.ndarray] = _float_reader(weight, transform)
    orient: Callable[[np.ndarray], np.ndarray] = transform or _identity
    if gain is not None and dim is not False:
        view = _WeightNormView(gain, weight, dim, transform)
        orient = transform or _Same()
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
        weight_view=view,
        bias_view=_float_reader(bias) if bias is not None else None,
        orient=orient,
        aux=(gain.name,) if gain is not None else (),
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
        # The pair decides the layout for both matrices (a square ``hh`` alone cannot).
        ih = module.leaves.get(
            f"weight_ih{level}{reverse or ''}", weight if which == "ih" else None
        )
        if ih is None or hh is None:
            continue
        layout = _recurrent_layout(ih.shape, hh.shape)
        if layout is None:
            continue
        hidden, count, transposed = layout
        gates = _GATES[count]
        fan = weight.shape[0] if transposed else weight.shape[1]
        bias = module.leaves.get(f"bias{suffix}")
        if bias is not None and bias.shape != (count * hidden,):
            bias = None
        for index, gate in enumerate(gates):
            sl = slice(index * hidden, (index + 1) * hidden)
            pick: Callable[[np.ndarray], np.ndarray] = (
                _ColumnsT(sl.start, sl.stop) if transposed else _rows(sl)
            )
            out.append(
                Layer(
                    name=f"{module.name + '.' if module.name else ''}{which}{level}{reverse or ''}.{gate}",
                    kind=LayerKind.RECURRENT,
                    weight=weight.name,
                    bias=bias.name if bias is not None else None,
                    units=hidden,
                    in_per_group=fan,
                    kernel=(),
                    groups=1,
                    activation=_GATE_ACT[gate],
                    weight_view=_float_reader(weight, pick),
                    orient=pick,
                    bias_view=_float_reader(bias, _rows(sl)) if bias is not None else None,
                    gate=gate,
                )
            )
    return out


def _recurrent_layout(ih: tuple[int, ...], hh: tuple[int, ...]) -> tuple[int, int, bool] | None:
    """(hidden size, gate count, transposed) of a recurrent pair, or None.

    PyTorch stacks gates along rows: ``ih [G·H, in]``, ``hh [G·H, H]``; hand-written NumPy
    code often keeps ``x @ W`` order, ``[in, G·H]`` and ``[H, G·H]``. The recurrent matrix
    decides, since it is ``[G·H, H]`` or ``[H, G·H]``; a square one (G = 1) is read the
    PyTorch way unless only the transposed reading fits the input matrix.
    """
    if len(ih) != 2 or len(hh) != 2 or not hh[0] or not hh[1]:
        return None
    torch_fit = hh[0] % hh[1] == 0 and hh[0] // hh[1] in _GATES and ih[0] == hh[0]
    numpy_fit = hh[1] % hh[0] == 0 and hh[1] // hh[0] in _GATES and ih[1] == hh[1]
    if torch_fit:
        return hh[1], hh[0] // hh[1], False
    if numpy_fit:
        return hh[0], hh[1] // hh[0], True
    return None


def _infer_groups(layers: list[Layer], notes: list[str]) -> list[Layer]:
    """Groups of convolutions whose weight reads fewer input channels than their producer
    has (see the module docstring for the rule)."""
    by_name = {layer.name: layer for layer in layers}
    siblings = _Siblings(by_name)
    # Natural name order, not stored order: safetensors sorts its keys, so "seq.10" would
    # otherwise come before "seq.2".
    ordered = sorted(layers, key=lambda layer: _natural(layer.name))
    before: dict[str, Layer | None] = {}
    last: Layer | None = None
    for layer in ordered:
        before[layer.name] = last
        if layer.kind in (LayerKind.CONV, LayerKind.CONV_TRANSPOSE):
            last = layer
    out: list[Layer] = []
    changed: list[str] = []
    unknown: list[str] = []
    for layer in layers:
        previous = before.get(layer.name)
        if layer.kind is LayerKind.CONV and layer.groups == 1:
            parent, leaf = _split(layer.name)
            named = siblings.previous(parent, leaf)
            producer = by_name.get(named) if named is not None else None
            if producer is not None and producer.kind not in (
                LayerKind.CONV,
                LayerKind.CONV_TRANSPOSE,
            ):
                producer = None
            if producer is None and layer.in_per_group == 1:
                producer = previous  # depthwise: the convolution before it in stored order
            groups = 1
            if producer is not None and producer.units % layer.in_per_group == 0:
                groups = producer.units // layer.in_per_group
            if groups > 1 and layer.units % groups == 0:
                layer = replace(layer, groups=groups)
                changed.append(
                    f"{layer.name} ({groups}, from {producer.name if producer else '?'})"
                )
            elif layer.in_per_group == 1 and producer is None:
                unknown.append(layer.name)
        out.append(layer)
    if unknown:
        notes.append(
            "one input channel per filter and no known producer (depthwise, or a one-channel "
            "input?), groups taken as 1: "
            + ", ".join(unknown[:5])
            + ("…" if len(unknown) > 5 else "")
        )
    if changed:
        notes.append(
            "groups inferred from the producer's channel count: "
            + ", ".join(changed[:5])
            + ("…" if len(changed) > 5 else "")
        )
    return out


def _natural(text: str) -> list[tuple[int, int, str]]:
    """Sort key that puts ``seq.10`` after ``seq.2``.

    Numbers compare by length, then digits (leading zeros dropped), never through ``int``:
    a name may carry more digits than ``int`` converts, and converting would be quadratic.
    """
    key: list[tuple[int, int, str]] = []
    for part in _DIGIT_RUNS.split(text):
        if part.isascii() and part.isdigit():
            digits = part.lstrip("0")
            key.append((0, len(digits), digits))
        else:
            key.append((1, 0, part))
    return key


_DIGIT_RUNS = re.compile(r"([0-9]+)", re.ASCII)


def _sibling_norm(name: str, parent: str, leaf: str, norms: Mapping[str, Norm]) -> str | None:
    """The norm module that normalises this layer's units, by PyTorch naming habits."""
    prefix = f"{parent}." if parent else ""
    candidates: list[str] = []
    # The trailing digits, by stripping: a regex search for them backtracks quadratically
    # over a long run of digits that is not at the end.
    digits = leaf[len(leaf.rstrip("0123456789")) :]
    numbered = _numbered(leaf)
    if numbered is not None and not numbered[0]:
        candidates.append(f"{prefix}{numbered[2] + 1}")
    if digits and digits != leaf:
        for stem in ("bn", "norm", "gn", "ln", "batchnorm", "bn_"):
            candidates.append(f"{prefix}{stem}{digits}")
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
    siblings = _Siblings(by_name)
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
        previous = siblings.previous(parent, leaf)
        if previous is not None and not found:
            found.append(previous)
        found = [
            name
            for name in found
            if by_name[name].units == layer.in_per_group * layer.groups
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


#: Leaves numbered the way the numbered-sibling search understands: ``seq.<N>`` (no stem)
#: and ``convN``/``fc_N``/``layerN``… Only ASCII digits: ``str.isdigit`` accepts superscripts
#: that ``int`` refuses.
_NUMBERED = re.compile(r"(?:(conv|fc|linear|dense|layer|lin|hidden)(_?))?([0-9]+)", re.ASCII)
#: Longest number read from a name (a layer index has a handful of digits; a name carrying a
#: longer number is simply not a numbered sibling, so no search and no int conversion limit).
_MAX_DIGITS = 18


def _numbered(leaf: str) -> tuple[str, str, int] | None:
    """(stem, separator, number) of a numbered leaf (``("", "", 3)`` for ``"3"``), else None."""
    match = _NUMBERED.fullmatch(leaf)
    if match is None or len(match.group(3)) > _MAX_DIGITS:
        return None
    return match.group(1) or "", match.group(2) or "", int(match.group(3))


class _Siblings:
    """Numbered layers indexed by (parent, stem, separator), numbers sorted.

    The previous numbered sibling of ``seq.7`` is the highest-numbered ``seq.<k>`` with
    ``k < 7``; looking it up by bisection keeps the search linear in the number of layers
    whatever number a (hostile) name carries.
    """

    def __init__(self, names: Iterable[str]) -> None:
        groups: dict[tuple[str, str, str], set[int]] = defaultdict(set)
        for name in names:
            parent, leaf = _split(name)
            found = _numbered(leaf)
            # The search names candidates by the canonical number (``seq.6``, never
            # ``seq.06``), so only canonically spelled layers can be found.
            if found is not None and leaf == f"{found[0]}{found[1]}{found[2]}":
                groups[(parent, found[0], found[1])].add(found[2])
        self._numbers = {key: sorted(numbers) for key, numbers in groups.items()}

    def previous(self, parent: str, leaf: str) -> str | None:
        """The nearest lower-numbered sibling of ``<parent>.<leaf>``, None when none."""
        found = _numbered(leaf)
        if found is None:
            return None
        stem, sep, number = found
        numbers = self._numbers.get((parent, stem, sep), [])
        position = bisect_left(numbers, number)
        if position == 0:
            return None
        prefix = f"{parent}." if parent else ""
        return f"{prefix}{stem}{sep}{numbers[position - 1]}"


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
    units, fan, kernel = canonical[0], canonical[1], canonical[2:]
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
    transform = _identity if axes == tuple(range(ndim)) else _Axes(axes)
    return Layer(
        name=entry["name"],
        kind=kind,
        weight=weight.name,
        bias=bias.name if bias is not None else None,
        units=units,
        in_per_group=fan,
        kernel=kernel,
        groups=groups,
        activation=_ACTIVATIONS[entry.get("activation", "unknown")],
        weight_view=_float_reader(weight, None if transform is _identity else transform),
        bias_view=_float_reader(bias) if bias is not None else None,
        orient=transform,
    )


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
    return update
