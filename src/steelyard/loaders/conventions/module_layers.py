"""What one module is, from its name and its tensors' shapes: a normalisation (running
statistics, or a 1-D weight under a norm-like name), or a weight layer (dense, embedding,
convolution, transposed convolution), weight-normalised or not.

Everything here is a heuristic, so it errs towards saying less: a module that fits no pattern
is no layer.
"""

from __future__ import annotations

import re
from collections.abc import Callable

import numpy as np

from steelyard.graph import (
    Activation,
    ColumnSlice,
    Layer,
    LayerKind,
    Norm,
    NormKind,
    Tensor,
    TensorRole,
)
from steelyard.loaders.conventions.module_names import Module
from steelyard.loaders.conventions.views import (
    AS_STORED,
    SameOrientation,
    WeightNormView,
    stored_source,
    weight_norm_dim,
)
from steelyard.loaders.layer_parts import layer_geometry, make_layer

_EMBEDDING = re.compile(
    r"(^|[._])(embed\w*|embeddings?|wte|wpe|tok_embeddings|word_embeddings|"
    r"position_embeddings|token_type_embeddings|shared(?=$|\.)|emb)($|[._])",
    re.IGNORECASE,
)
_NORM = re.compile(r"(norm|^ln|[._]ln|ln_?\d*$|bn\d*$|^bn|[._]bn|layernorm|gn\d*$)", re.IGNORECASE)
_TRANSPOSED = re.compile(r"(convtranspose|conv_transpose|deconv|upconv|transposed)", re.IGNORECASE)


#: HF models whose Conv1D modules store Linear weights as [in, out].
_IN_OUT_MODELS = {"gpt2", "openai-gpt", "decision_transformer", "imagegpt"}
_IN_OUT_LEAVES = {"c_attn", "c_fc", "c_proj", "q_attn"}


def norm_of(module: Module) -> Norm | None:
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


def unit_count(module: Module) -> int:
    """Units of a norm module (its scale's or statistics' length); -1 when unknown."""
    leaves = module.leaves
    for key in ("weight", "gamma", "running_mean"):
        if key in leaves and leaves[key].shape:
            return leaves[key].shape[0]
    return -1


def weight_layer(module: Module, model_type: str) -> Layer | None:
    """The layer a module's 2-5-D floating weight makes (weight-normalised or not), or None."""
    weight = module.leaves.get("weight")
    gain: Tensor | None = None
    dim: int | bool | None = False
    if weight is None and "weight_g" in module.leaves and "weight_v" in module.leaves:
        gain, weight = module.leaves["weight_g"], module.leaves["weight_v"]
        dim = weight_norm_dim(gain.shape, weight.shape)
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
            transform = ColumnSlice()
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
    source = stored_source(weight, transform or AS_STORED, bias)
    if gain is not None and dim is not False:
        source["weight_view"] = WeightNormView(gain, weight, dim, transform)
        source["orient"] = transform or SameOrientation()
    return make_layer(
        module.name or weight.name,
        kind,
        Activation.UNKNOWN,
        layer_geometry(out, fan, kernel),
        source,
        aux=(gain.name,) if gain is not None else (),
    )
