"""Keras layer classes by what they are to the audit: containers and wrappers, weight layers
(and their rank), norms, activations, layers a unit passes through unchanged, merges; and the
class a layer's default name or its weights' shapes imply when a file has no config.
"""

from __future__ import annotations

import re
from collections.abc import Mapping

from steelyard.graph import Activation, Tensor


def _words(text: str) -> list[str]:
    return text.split()


CONTAINERS = frozenset({"Sequential", "Functional", "Model"})
#: Layers that hold other layers' weights under an attribute (``layer``, ``forward_layer``,
#: ``backward_layer``): ``.weights.h5`` stores them at ``<key>/<attribute>/vars``.
WRAPPERS = frozenset({"TimeDistributed", "Bidirectional"})
WRAPPED_ATTRIBUTES = ("layer", "forward_layer", "backward_layer")
#: Bidirectional ``merge_mode`` → the merge it performs (None: outputs kept apart).
BIDIRECTIONAL_MERGE = {"concat": "Concatenate", "sum": "Add", "ave": "Average", "mul": "Multiply"}

DENSE = frozenset({"Dense"})
CONV: dict[str, int] = {
    "Conv1D": 1,
    "Conv2D": 2,
    "Conv3D": 3,
    "Convolution1D": 1,
    "Convolution2D": 2,
    "Convolution3D": 3,
}
CONV_T: dict[str, int] = {
    "Conv1DTranspose": 1,
    "Conv2DTranspose": 2,
    "Conv3DTranspose": 3,
    "Convolution1DTranspose": 1,
    "Convolution2DTranspose": 2,
    "Convolution3DTranspose": 3,
    "Deconvolution2D": 2,
    "Deconvolution3D": 3,
}
DEPTHWISE: dict[str, int] = {"DepthwiseConv1D": 1, "DepthwiseConv2D": 2}
SEPARABLE: dict[str, int] = {
    "SeparableConv1D": 1,
    "SeparableConv2D": 2,
    "SeparableConvolution1D": 1,
    "SeparableConvolution2D": 2,
}
EMBEDDING = frozenset({"Embedding"})
#: Attention layers made of EinsumDense sub-layers (``query``, ``key``, ``value``,
#: ``attention_output``, optional ``gate``); see :mod:`~steelyard.loaders.keras.attention`.
#: ``GroupQueryAttention`` is the name Keras exports (and writes in configs) for its class
#: ``GroupedQueryAttention``.
ATTENTION = frozenset({"MultiHeadAttention", "GroupQueryAttention", "GroupedQueryAttention"})
#: Config class → the Python class name Keras derives ``.weights.h5`` keys from, where they differ.
KEY_CLASS = {"GroupQueryAttention": "GroupedQueryAttention"}
#: Recurrent classes → gate order along the kernel's last axis.
RNN_GATES: dict[str, tuple[str, ...]] = {
    "LSTM": ("i", "f", "c", "o"),
    "GRU": ("z", "r", "h"),
    "SimpleRNN": ("h",),
}
BATCH_NORM = frozenset({"BatchNormalization", "SyncBatchNormalization"})
LAYER_NORM = frozenset({"LayerNormalization"})
GROUP_NORM = frozenset({"GroupNormalization"})
ACTIVATION_LAYERS = frozenset(
    {"Activation", "ReLU", "LeakyReLU", "Softmax", "ELU", "PReLU", "ThresholdedReLU"}
)
#: Layers that keep a unit's identity (channel c in → channel c out), so links look through.
PASS = (
    frozenset(
        _words(
            "Dropout SpatialDropout1D SpatialDropout2D SpatialDropout3D GaussianNoise "
            "GaussianDropout AlphaDropout ActivityRegularization Identity Masking Flatten "
            "RepeatVector UnitNormalization"
        )
        + [
            f"{prefix}{dims}D"
            for prefix in (
                "MaxPooling",
                "AveragePooling",
                "MaxPool",
                "AvgPool",
                "GlobalMaxPooling",
                "GlobalAveragePooling",
                "GlobalMaxPool",
                "GlobalAvgPool",
                "ZeroPadding",
                "Cropping",
                "UpSampling",
            )
            for dims in (1, 2, 3)
        ]
    )
    | BATCH_NORM
    | LAYER_NORM
    | GROUP_NORM
    | ACTIVATION_LAYERS
)
#: Layers that combine several inputs; a consumer sees all their producers' units.
MERGE = frozenset({"Concatenate", "Add", "Average", "Maximum", "Minimum", "Multiply", "Subtract"})
#: Pass-through layers that change which positions hold a unit, so a norm after them is not
#: a per-unit norm any more.
RESHAPING = frozenset({"Flatten", "RepeatVector"})

ACTIVATIONS: dict[str, Activation] = {
    "relu": Activation.RELU,
    "leaky_relu": Activation.LEAKY_RELU,
    "gelu": Activation.GELU,
    "silu": Activation.SILU,
    "swish": Activation.SILU,
    "sigmoid": Activation.SIGMOID,
    "tanh": Activation.TANH,
    "softmax": Activation.SOFTMAX,
    "hard_sigmoid": Activation.HARD_SIGMOID,
    "linear": Activation.IDENTITY,
}


def unit_classes() -> frozenset[str]:
    """Every class that becomes one or more :class:`Layer` objects."""
    return frozenset(
        set(DENSE)
        | set(CONV)
        | set(CONV_T)
        | set(DEPTHWISE)
        | set(SEPARABLE)
        | set(EMBEDDING)
        | set(RNN_GATES)
        | set(ATTENTION)
    )


UNIT = unit_classes()


def to_snake_case(name: str) -> str:
    """Keras' own naming rule for ``.weights.h5`` keys (``Conv2DTranspose`` → ``conv2d_transpose``)."""
    name = re.sub(r"\W+", "", name)
    name = re.sub("(.)([A-Z][a-z]+)", r"\1_\2", name)
    return re.sub("([a-z])([A-Z])", r"\1_\2", name).lower()


#: snake_case family → class, for files without a config (default layer names / keys).
FAMILY: dict[str, str] = {
    to_snake_case(KEY_CLASS.get(c, c)): c
    for c in sorted(
        set(UNIT) - {"GroupedQueryAttention"}
        | BATCH_NORM
        | LAYER_NORM
        | GROUP_NORM
        | {"PReLU"}
        | set(CONTAINERS)
    )
}


def class_from_name(name: str) -> str | None:
    """The class a default Keras name implies: ``dense_3`` → ``Dense``; None when unknown.

    The names Keras gives wrapped layers count too: ``forward_lstm`` / ``backward_gru_2``
    (Bidirectional's halves) and ``lstm_cell`` (an RNN's cell) name their RNN class.
    """
    family = re.sub(r"_\d+$", "", name)
    family = re.sub(r"^(forward|backward)_", "", family)
    family = re.sub(r"_\d+$", "", family)
    if family.endswith("_cell") and family[: -len("_cell")] in ("lstm", "gru", "simple_rnn"):
        family = family[: -len("_cell")]
    return FAMILY.get(family)


def class_from_shapes(weights: Mapping[str, Tensor]) -> str | None:
    """The unit class that named weights' shapes leave no doubt about, for files without a
    config whose layer names say nothing (a Keras 2 ``TimeDistributed`` stores its Dense
    as ``time_distributed/kernel:0``).

    Only unambiguous cases: a 2-D ``kernel`` with a matching ``bias`` is a Dense (a 2-D
    kernel alone could be an embedding-like table, but Keras names those ``embeddings``);
    ``kernel`` + ``recurrent_kernel`` ``[H, G·H]`` is an LSTM (G=4), GRU (3) or SimpleRNN (1).
    Convolution kernels are never guessed: ``[k, a, b]`` fits a Conv, a ConvTranspose and a
    DepthwiseConv alike.
    """
    roles = set(weights)
    kernel = weights.get("kernel")
    bias = weights.get("bias")
    if kernel is None:
        return None
    if roles == {"kernel", "bias"} and len(kernel.shape) == 2 and bias is not None:
        return "Dense" if bias.shape == (kernel.shape[1],) else None
    recurrent = weights.get("recurrent_kernel")
    if recurrent is not None and roles <= {"kernel", "recurrent_kernel", "bias"}:
        if len(recurrent.shape) != 2 or len(kernel.shape) != 2 or not recurrent.shape[0]:
            return None
        hidden, width = recurrent.shape
        gates = width // hidden if width % hidden == 0 else 0
        cls = {4: "LSTM", 3: "GRU", 1: "SimpleRNN"}.get(gates)
        return cls if kernel.shape[1] == width else None
    return None
