"""ONNX ops grouped by what they do to a layer's units, for the walks over the node graph
(:mod:`~steelyard.loaders.onnx.output_walk`, :mod:`~steelyard.loaders.onnx.input_walk`) and
the tensor roles (:mod:`~steelyard.loaders.onnx.tensor_roles`).
"""

from __future__ import annotations

from steelyard.graph import Activation, NormKind

#: Ops that run a subgraph; the ops of their bodies are walked instead.
CONTROL_FLOW = ("If", "Loop", "Scan")
#: Single-input ops after which a unit is still the same unit (possibly pooled or reshaped).
KEEP = {
    "Identity",
    "Dropout",
    "Cast",
    "Flatten",
    "Squeeze",
    "Unsqueeze",
    "Transpose",
    "Reshape",
    "MaxPool",
    "AveragePool",
    "GlobalAveragePool",
    "GlobalMaxPool",
    "LpPool",
    "Pad",
    "QuantizeLinear",
    "DequantizeLinear",
    "Upsample",
    "Resize",
    "LRN",
}
#: Ops that compute one element from the same element of each input.
ELEMENTWISE = {"Add", "Sub", "Mul", "Div", "Sum", "Max", "Min", "Mean"}
#: Normalisation ops and the kind of norm each computes.
NORMS = {
    "BatchNormalization": NormKind.BATCH,
    "LayerNormalization": NormKind.LAYER,
    "GroupNormalization": NormKind.GROUP,
    "InstanceNormalization": NormKind.INSTANCE,
    "RMSNormalization": NormKind.RMS,
    "SimplifiedLayerNormalization": NormKind.RMS,  # com.microsoft
}
#: Activation ops and the activation each computes.
ACTIVATIONS = {
    "Relu": Activation.RELU,
    "LeakyRelu": Activation.LEAKY_RELU,
    "Sigmoid": Activation.SIGMOID,
    "Tanh": Activation.TANH,
    "Softmax": Activation.SOFTMAX,
    "HardSigmoid": Activation.HARD_SIGMOID,
    "Gelu": Activation.GELU,
    "FastGelu": Activation.GELU,  # com.microsoft
    "QuickGelu": Activation.GELU,  # com.microsoft
    "BiasGelu": Activation.GELU,  # com.microsoft
    "Swish": Activation.SILU,
}
#: Nonlinearities with no member in :class:`Activation`.
OTHER_NONLINEAR = {
    "Elu",
    "Selu",
    "Celu",
    "Softplus",
    "Softsign",
    "PRelu",
    "HardSwish",
    "Mish",
    "ThresholdedRelu",
    "LogSoftmax",
    "Erf",
    "Exp",
    "Abs",
    "Sin",
    "Cos",
    "Sqrt",
    "Log",
}
#: Single-input ops a walk back from a layer's input passes through (the unit stays the unit).
BACK_THROUGH = KEEP | set(ACTIVATIONS) | OTHER_NONLINEAR | set(NORMS) | {"Clip"}
