"""The framework-neutral layer graph every loader produces and every rule reads.

A :class:`Checkpoint` holds lazily readable :class:`Tensor` objects and the :class:`Layer`
views built over them. A layer's weights are always exposed in one canonical orientation,
``[out, in/groups, *kernel]``, so rules never need to know where a file came from.
"""

from __future__ import annotations

import math
import struct
import zipfile
import zlib
from collections import Counter
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from enum import Enum
from typing import TYPE_CHECKING, Any

import numpy as np

from steelyard.dtypes import to_float32
from steelyard.errors import UnreadableTensor

if TYPE_CHECKING:  # the structure is built after loading, by steelyard.transformer
    from steelyard.transformer.model import Structure


class Format(str, Enum):
    """Checkpoint container formats steelyard reads."""

    SAFETENSORS = "safetensors"
    ONNX = "onnx"
    KERAS_H5 = "keras-h5"
    KERAS = "keras"
    NPZ = "npz"
    PYTORCH = "pytorch"
    GGUF = "gguf"


class LayerKind(str, Enum):
    """Unit-producing operations with stored weights."""

    DENSE = "dense"
    CONV = "conv"
    CONV_TRANSPOSE = "conv-transpose"
    EMBEDDING = "embedding"
    RECURRENT = "recurrent"


class Activation(str, Enum):
    """The nonlinearity that follows a layer's units."""

    RELU = "relu"
    LEAKY_RELU = "leaky-relu"
    GELU = "gelu"
    SILU = "silu"
    SIGMOID = "sigmoid"
    TANH = "tanh"
    SOFTMAX = "softmax"
    HARD_SIGMOID = "hard-sigmoid"
    IDENTITY = "identity"
    UNKNOWN = "unknown"

    @property
    def positive_homogeneous(self) -> bool:
        """f(a·x) = a·f(x) for a > 0: rescaling a unit's row can be undone downstream."""
        return self in (Activation.RELU, Activation.LEAKY_RELU, Activation.IDENTITY)

    @property
    def relu_family(self) -> bool:
        """Zero (or nearly) for every negative pre-activation."""
        return self in (Activation.RELU, Activation.LEAKY_RELU)

    @property
    def non_negative_output(self) -> bool:
        """The output is never negative, so consumers see non-negative inputs."""
        return self in (
            Activation.RELU,
            Activation.SIGMOID,
            Activation.SOFTMAX,
            Activation.HARD_SIGMOID,
        )


class Link(str, Enum):
    """How a layer's ``inputs_from`` was established."""

    GRAPH = "graph"
    CONFIG = "config"
    INFERRED = "inferred"
    NONE = "none"


class TensorRole(str, Enum):
    """What a stored tensor is, which decides whether it counts as a parameter."""

    PARAMETER = "parameter"
    """A floating-point model tensor (weights, biases, norm parameters, running statistics)."""
    QUANTIZED = "quantized"
    """An integer weight tensor of a quantized model; counted as parameters."""
    BOOKKEEPING = "bookkeeping"
    """Integer shapes, indices, counters, position ids, scales' zero points: not counted."""
    OPTIMIZER = "optimizer"
    """Optimizer state: kept aside as gradient support, never counted."""


class NormKind(str, Enum):
    """Normalisations whose channels are a layer's units."""

    BATCH = "batch"
    LAYER = "layer"
    GROUP = "group"
    INSTANCE = "instance"
    RMS = "rms"


#: What a lazily called reader raises when the file's bytes are broken or too large (the
#: loaders' own checks raise LoadError, which passes through untouched). Anything else a read
#: raises is a bug of steelyard's.
_BROKEN_INPUT = (
    OSError,
    ValueError,
    EOFError,
    OverflowError,
    zipfile.BadZipFile,
    struct.error,
    zlib.error,
    MemoryError,
    RecursionError,
)


@dataclass(frozen=True, slots=True)
class Tensor:
    """One stored tensor, read only when asked."""

    name: str
    """Stored name (see the JSON contract for what that means per format)."""
    shape: tuple[int, ...]
    """Shape as stored."""
    dtype: str
    """Short stored dtype name, e.g. ``bf16`` or ``i64``."""
    role: TensorRole
    """Whether the tensor counts as a parameter."""
    reader: Callable[[], np.ndarray] = field(repr=False, compare=False)
    """Returns the decoded array in stored orientation (dtype as stored, native byte order)."""
    read_span: Callable[[int, int], np.ndarray] | None = field(
        default=None, repr=False, compare=False
    )
    """Optional: elements ``[start, stop)`` of the flattened tensor, dtype as stored. A loader
    that sets it promises both readers are safe to call from several threads at once; the
    audit then streams large tensors block by block instead of reading them whole."""
    stored_type: str | None = field(default=None, compare=False)
    """What the file stored when ``dtype`` is a decoded view of it (a GGUF ``Q4_K``, a packed
    ``gptq-int4``); None when ``dtype`` is the stored type."""
    read_bits: Callable[[int, int], np.ndarray] | None = field(
        default=None, repr=False, compare=False
    )
    """Optional, for ``bf16`` tensors with ``read_span``: elements ``[start, stop)`` as their
    uint16 bit patterns, so the audit widens them without decoding through ml_dtypes (whose
    import alone costs over a second with ml_dtypes 0.7)."""
    fill_span: Callable[[int, int, np.ndarray], None] | None = field(
        default=None, repr=False, compare=False
    )
    """Optional, for ``f32`` tensors with ``read_span`` (little-endian float32 bytes, or
    blocks decoded to float32 such as a dequantized GGUF tensor): writes elements
    ``[start, stop)`` into a C-contiguous float32 array of that many elements, so a streamed
    pass fills the layer's matrix directly instead of a fresh buffer it then copies (a third
    of a float32 layer's read time)."""
    factors: Callable[[], tuple[np.ndarray, np.ndarray]] | None = field(
        default=None, repr=False, compare=False
    )
    """Optional, for a tensor computed as a low-rank product (an adapter's update ΔW): its
    float64 factors ``(left [rows, r], right [r, row elements])``, the tensor being ``left @
    right`` rounded to float32, rows in stored order. What the factors determine (row and
    column sums of squares, a bound on every entry) the audit takes from them instead of a
    pass over the product, which may be thousands of times the factors' size."""

    @property
    def size(self) -> int:
        """Number of elements."""
        return math.prod(self.shape)

    def read(self) -> np.ndarray:
        """The array as stored (decoded, not converted).

        Raises :class:`~steelyard.errors.UnreadableTensor` when the bytes turn out broken."""
        try:
            return self.reader()
        except _BROKEN_INPUT as exc:
            raise UnreadableTensor(self.name, exc) from exc

    def read_part(self, start: int, stop: int) -> np.ndarray:
        """Elements ``[start, stop)`` of the flattened tensor through ``read_span`` (which
        must be set); broken bytes raise :class:`~steelyard.errors.UnreadableTensor`."""
        assert self.read_span is not None, "read_part needs a loader that sets read_span"
        try:
            return self.read_span(start, stop)
        except _BROKEN_INPUT as exc:
            raise UnreadableTensor(self.name, exc) from exc

    def widen_part(self, start: int, stop: int, out: np.ndarray) -> None:
        """Elements ``[start, stop)`` of the flattened tensor, exactly, as float32 into ``out``
        (``read_span`` must be set); broken bytes raise :class:`~steelyard.errors.UnreadableTensor`."""
        from steelyard.streaming import convert_into, widen_bf16_bits

        if (
            self.fill_span is not None
            and out.dtype == np.float32
            and out.flags.c_contiguous
            and out.size == stop - start
        ):
            try:
                self.fill_span(start, stop, out)
            except _BROKEN_INPUT as exc:
                raise UnreadableTensor(self.name, exc) from exc
            return
        if self.read_bits is None or self.dtype != "bf16":
            convert_into(self.read_part(start, stop), out)
            return
        try:
            bits = self.read_bits(start, stop)
        except _BROKEN_INPUT as exc:
            raise UnreadableTensor(self.name, exc) from exc
        widen_bf16_bits(bits, out)

    def read_float32(self) -> np.ndarray:
        """The array converted to float32 for analysis (chunk by chunk when it can be)."""
        if self.read_span is not None and self.dtype != "f32" and self.size:
            from steelyard.streaming import float32_from_parts

            return float32_from_parts(self.widen_part, self.shape)
        return to_float32(np.asarray(self.read()))


@dataclass(frozen=True, slots=True)
class RowSlice:
    """An ``orient`` that takes rows ``[start, stop)`` of the stored tensor's first axis
    (every row when ``stop`` is None) and reorders nothing else.

    A layer whose ``orient`` is a RowSlice has a canonical matrix that is one contiguous run
    of the stored elements, so the audit can stream it row-block by row-block.
    """

    start: int = 0
    stop: int | None = None

    def __call__(self, array: np.ndarray) -> np.ndarray:
        if self.start == 0 and self.stop is None:
            return array
        return array[self.start : self.stop]


@dataclass(frozen=True, slots=True)
class ColumnSlice:
    """An ``orient`` that takes columns ``[start, stop)`` of a 2-D stored tensor (every column
    when ``stop`` is None) and transposes them: the canonical rows are stored columns, as in
    GPT-2's Conv1D, a weight declared ``in-out``, or one gate of a transposed recurrent matrix.

    The audit then reads the stored rows in cache-sized runs and transposes each into place
    (:func:`steelyard.tiled_copy.transposed_from_parts`) instead of reading the whole tensor
    and copying it across.
    """

    start: int = 0
    stop: int | None = None

    def __call__(self, array: np.ndarray) -> np.ndarray:
        return np.asarray(array[:, self.start : self.stop].T)


@dataclass(frozen=True, slots=True)
class Norm:
    """A normalisation whose channels are one layer's units."""

    kind: NormKind
    scale: str | None
    """Tensor name of γ (None when the norm has no affine scale)."""
    shift: str | None = None
    """Tensor name of β."""
    mean: str | None = None
    """Running mean (batch normalisation in inference form)."""
    var: str | None = None
    """Running variance (batch normalisation in inference form)."""
    eps: float = 1e-5


@dataclass(frozen=True, slots=True)
class Constraint:
    """A weight constraint declared in the file (Keras ``kernel_constraint``)."""

    kind: str
    """``max-norm``, ``unit-norm``, ``non-neg`` or ``min-max-norm``."""
    max_value: float | None = None
    min_value: float | None = None
    rate: float = 1.0
    """Canonical-view axes the norm is taken over is always 'all but the unit axis'
    when ``per_unit`` is True; otherwise the declared axes did not map onto units."""
    per_unit: bool = True


@dataclass(frozen=True, slots=True)
class Regularizer:
    """A weight penalty declared in the file: l1·Σ|w| + l2·Σw² (Keras convention)."""

    l1: float = 0.0
    l2: float = 0.0


@dataclass(frozen=True, slots=True)
class Layer:
    """A unit-producing op with stored weights, in canonical orientation."""

    name: str
    kind: LayerKind
    weight: str
    """Stored name of the weight tensor."""
    bias: str | None
    units: int
    """Rows of the canonical view."""
    in_per_group: int
    kernel: tuple[int, ...]
    groups: int
    activation: Activation
    weight_view: Callable[[], np.ndarray] = field(repr=False, compare=False)
    """Returns float32 ``[units, in_per_group, *kernel]``."""
    bias_view: Callable[[], np.ndarray] | None = field(default=None, repr=False, compare=False)
    """Returns float32 ``[units]``."""
    orient: Callable[[np.ndarray], np.ndarray] | None = field(
        default=None, repr=False, compare=False
    )
    """Maps an array shaped like the stored weight tensor to the canonical view; used to
    put optimizer moments and gradient sidecars in the layer's orientation."""
    norm: Norm | None = None
    inputs_from: tuple[str, ...] = ()
    """Names of the layers whose units are this layer's inputs (in input order)."""
    linked_by: Link = Link.NONE
    gate: str | None = None
    """For recurrent layers split per gate: which gate (e.g. ``i``, ``f``, ``g``, ``o``)."""
    constraint: Constraint | None = None
    regularizer: Regularizer | None = None
    from_input: bool = False
    """The layer reads the model's own inputs (graph inputs), which is where interval bound
    propagation from a declared input range starts."""
    channels_last_inputs: bool = False
    """A flattening between producer convolutions and this dense layer ran channels-last
    (Keras): input j·spatial… belongs to channel j otherwise, to channel j mod C here."""
    is_output: bool = False
    """Feeds no other layer while at least one layer feeds it (a model head)."""
    aux: tuple[str, ...] = ()
    """Other stored tensors this layer's weights are made from (quantization scales and zero
    points, a weight-norm gain, a second recurrent matrix): they count as covered."""

    @property
    def tensor_names(self) -> tuple[str, ...]:
        """Every stored tensor the layer reads: weight, bias, norm parameters, ``aux``."""
        names = [self.weight]
        if self.bias is not None:
            names.append(self.bias)
        if self.norm is not None:
            names += [
                n
                for n in (self.norm.scale, self.norm.shift, self.norm.mean, self.norm.var)
                if n is not None
            ]
        names += self.aux
        return tuple(names)

    @property
    def fan_in(self) -> int:
        """Inputs per unit: (in/groups) × prod(kernel)."""
        return self.in_per_group * math.prod(self.kernel)

    def matrix(self) -> np.ndarray:
        """The canonical weights flattened to ``W[units, fan_in]`` float32."""
        return self.weight_view().reshape(self.units, self.fan_in)

    def bias_vector(self) -> np.ndarray | None:
        """Bias as float32 ``[units]`` or None."""
        return None if self.bias_view is None else self.bias_view().reshape(self.units)


@dataclass(frozen=True, slots=True)
class UnitGroup:
    """A run of a layer's units (rows) or inputs (columns) that belongs to one attention
    head or one expert: a grouping finer than the layer, coarser than the unit."""

    kind: str
    """``head`` (a query head's rows, or its output columns), ``kv-head`` (a key/value head's
    rows, shared by the query heads of its group), ``expert``, ``shared-expert``, or ``mlp``
    (the gate and up halves of a fused gate/up projection)."""
    index: int
    """The head's or expert's number within its block (0-based)."""
    part: str
    """Which projection the run belongs to: ``q``, ``k``, ``v``, ``o``; ``router``, ``gate``,
    ``up``, ``down`` for experts."""
    axis: str
    """``rows`` (units of the canonical view) or ``columns`` (its inputs)."""
    start: int
    stop: int
    """The run ``[start, stop)`` along ``axis``."""
    block: str
    """The attention or mixture-of-experts block it belongs to (a module name)."""


@dataclass(frozen=True, slots=True)
class OptimizerSlots:
    """Optimizer state for one model tensor, in the tensor's stored orientation."""

    first_moment: Tensor | None
    second_moment: Tensor | None


@dataclass(frozen=True, slots=True)
class OptimizerState:
    """Optimizer state stored with the model, mapped to model tensor names."""

    kind: str
    """``adam``, ``adamw``, ``rmsprop``, ``sgd`` or ``unknown``."""
    slots: Mapping[str, OptimizerSlots]
    """Model tensor name → its slots."""
    step: int | None = None
    beta1: float | None = None
    beta2: float | None = None
    eps: float | None = None
    weight_decay: float | None = None
    decoupled: bool | None = None
    """True for AdamW-style decay applied to the weights, False for decay in the gradient."""
    source: str = ""
    """Where in the file the state was found (for the report header)."""


@dataclass(frozen=True)
class Checkpoint:
    """Everything steelyard knows about one checkpoint, read lazily."""

    path: str
    format: Format
    tensors: Mapping[str, Tensor]
    """Every stored tensor by name, optimizer state excluded."""
    layers: tuple[Layer, ...]
    file_size: int
    files: tuple[str, ...] = ()
    """Every file that was read (shards, external data), the main path first."""
    optimizer: OptimizerState | None = None
    notes: tuple[str, ...] = ()
    """What the loader wants the user to know (e.g. which state-dict key was used)."""
    metadata: Mapping[str, Any] = field(default_factory=dict)
    """Architecture metadata stored in the file itself (GGUF scalar key/values such as
    ``llama.attention.head_count``; a Keras file's attention head counts under
    ``keras.attention``, see :mod:`steelyard.loaders.keras.attention`); empty for formats
    that store none."""
    unit_groups: Mapping[str, tuple[UnitGroup, ...]] = field(default_factory=dict)
    """Layer name → its units grouped into attention heads or experts (set after loading by
    :func:`steelyard.transformer.annotate`; empty when no such structure was recognised)."""
    transformer: Structure | None = None
    """The recognised transformer blocks (heads, experts), or None."""

    def __post_init__(self) -> None:
        # Every loader ends here, so claims are checked once for all formats, before any rule
        # allocates per unit or per input: a tensor's shape against the element budget, and
        # a layer's units and inputs against the unit budget. A zero-element tensor such as
        # [2**40, 0] stores nothing and would otherwise become a layer of 2**40 units.
        from steelyard import budget

        for tensor in self.tensors.values():
            budget.check_elements(self.path, tensor.shape, f"tensor {tensor.name!r}")
        for layer in self.layers:
            what = f"layer {layer.name!r}"
            budget.check_units(self.path, layer.units, what)
            budget.check_units(self.path, layer.in_per_group * layer.groups, f"{what} (inputs)")
            budget.check_elements(
                self.path, (layer.units, layer.fan_in), f"{what} (canonical weights)"
            )

    @property
    def counted(self) -> list[Tensor]:
        """Tensors that count as parameters (floating and quantized weights)."""
        return [
            t
            for t in self.tensors.values()
            if t.role in (TensorRole.PARAMETER, TensorRole.QUANTIZED)
        ]

    @property
    def parameters(self) -> int:
        """Total elements of counted tensors."""
        return sum(t.size for t in self.counted)

    @property
    def dtypes(self) -> dict[str, int]:
        """Counted tensors per stored dtype."""
        return dict(Counter(t.dtype for t in self.counted))

    def layer(self, name: str) -> Layer | None:
        """The layer with that name, if any."""
        for layer in self.layers:
            if layer.name == name:
                return layer
        return None

    def consumers(self) -> dict[str, list[Layer]]:
        """Layer name → layers that take its units as inputs."""
        out: dict[str, list[Layer]] = {layer.name: [] for layer in self.layers}
        for layer in self.layers:
            for source in layer.inputs_from:
                if source in out:
                    out[source].append(layer)
        return out


def mark_outputs(layers: tuple[Layer, ...] | list[Layer]) -> tuple[Layer, ...]:
    """Set ``is_output`` on layers that feed nothing while something feeds them.

    Loaders call this once their links are known; with no links at all nothing is marked,
    because then "feeds nothing" carries no information.
    """
    from dataclasses import replace

    fed = {source for layer in layers for source in layer.inputs_from}
    out: list[Layer] = []
    for layer in layers:
        head = bool(layer.inputs_from) and layer.name not in fed
        # replace() costs tens of microseconds: only for layers whose flag changes.
        out.append(layer if layer.is_output == head else replace(layer, is_output=head))
    return tuple(out)
