"""Float views of quantized ONNX weights.

Every quantized operator in the ONNX operator set dequantizes linearly,
``w = (q - zero_point) * scale``, with one scale per tensor, per channel of one axis, or
(DequantizeLinear 21+) per block along that axis. DequantizeLinear's axis defaults to 1;
QLinearConv and ConvInteger weights are per output channel (axis 0 of ``[M, C/g, k...]``);
QLinearMatMul and MatMulInteger ``B [K, N]`` per column. ConvInteger and MatMulInteger carry
no scale: exporters multiply their (Cast) output by ``input_scale * weight_scale`` in a Mul,
which the loader finds and hands in as ``scale``.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field

import numpy as np

from steelyard.loaders.onnx.lookthrough import Folder, View
from steelyard.loaders.onnx.stored import DType, Node, dtype_of
from steelyard.tiled_copy import contiguous


def _f32_type() -> DType:
    found = dtype_of(1)
    assert found is not None  # code 1 (FLOAT) is always in the table
    return found


def per_axis(shape: tuple[int, ...], size: int) -> bool:
    """True when a scale/zero-point of ``shape`` is one value, or one per ``size`` channels."""
    squeezed = tuple(d for d in shape if d != 1)
    return math.prod(shape) == 1 or squeezed == (size,)


def _f32(view: View | None) -> np.ndarray | None:
    return None if view is None else np.asarray(view.read()).astype(np.float32)


def _along(values: np.ndarray, axis: int, rank: int) -> np.ndarray:
    """A per-channel vector shaped to broadcast along ``axis`` of a rank-``rank`` array."""
    flat = values.reshape(-1)
    if flat.size == 1:
        return flat.reshape(())
    shape = [1] * rank
    shape[axis] = flat.size
    return flat.reshape(shape)


def dequantize(folder: Folder, node: Node) -> View | None:
    """The float view of a DequantizeLinear whose inputs are all constants."""
    q = folder.fold(node.input(0))
    scale = folder.fold(node.input(1))
    zero = folder.fold(node.input(2)) if node.input(2) else None
    if q is None or scale is None or (node.input(2) and zero is None):
        return None
    rank = len(q.shape)
    axis = node.get_int("axis", 1)
    axis = axis + rank if axis < 0 else axis
    block = node.get_int("block_size", 0)
    if zero is not None and zero.shape != scale.shape:
        return None
    if math.prod(scale.shape) == 1:
        mode = "tensor"
    elif block > 0 and len(scale.shape) == rank and 0 <= axis < rank:
        expected = tuple(-(-d // block) if i == axis else d for i, d in enumerate(q.shape))
        if scale.shape != expected:
            return None
        mode = "block"
    elif 0 <= axis < rank and per_axis(scale.shape, q.shape[axis]) and len(scale.shape) == 1:
        mode = "axis"
    else:
        return None
    read_q, read_s = q.read, scale.read
    read_z = zero.read if zero is not None else None
    # Per-tensor scales ignore the axis (ONNX DequantizeLinear), which may then lie outside q.
    length = q.shape[axis] if mode == "block" else 0

    def read() -> np.ndarray:
        values = np.asarray(read_q()).astype(np.float32)
        s = np.asarray(read_s()).astype(np.float32)
        z = np.asarray(read_z()).astype(np.float32) if read_z else np.zeros_like(s)
        if mode == "block":
            s = np.repeat(s, block, axis=axis).take(range(length), axis=axis)
            z = np.repeat(z, block, axis=axis).take(range(length), axis=axis)
        elif mode == "axis":
            s, z = _along(s, axis, rank), _along(z, axis, rank)
        else:
            s, z = s.reshape(()), z.reshape(())
        # reference formula: ONNX DequantizeLinear, y = (x - x_zero_point) * x_scale
        return np.asarray((values - z) * s, dtype=np.float32)

    aux = tuple(dict.fromkeys((*q.aux, *scale.sources, *(zero.sources if zero else ()))))
    return View(
        q.source,
        q.shape,
        _f32_type(),
        read,
        q.sources,
        aux,
        (*q.via, "DequantizeLinear"),
        True,
        q.stored,
        q.work + scale.work + (zero.work if zero else 0) + math.prod(q.shape),
        max(q.depth, scale.depth, zero.depth if zero else 0) + 1,
    )


@dataclass(frozen=True)
class QuantWeight:
    """A quantized layer's canonical float weight (and bias) views."""

    weight: str
    shape: tuple[int, ...]
    """Canonical ``[out, in/groups, *kernel]``."""
    read: Callable[[], np.ndarray] = field(repr=False)
    bias: str | None = None
    bias_read: Callable[[], np.ndarray] | None = field(default=None, repr=False)
    scale_found: bool = True


def _weight(
    q: View, scale: View | None, zero: View | None, rows_axis: int, transpose: bool
) -> Callable[[], np.ndarray]:
    read_q = q.read
    read_s = scale.read if scale is not None else None
    read_z = zero.read if zero is not None else None
    rank = len(q.shape)

    def read() -> np.ndarray:
        values = np.asarray(read_q()).astype(np.float32)
        s = np.asarray(read_s()).astype(np.float32) if read_s else np.ones(1, np.float32)
        z = np.asarray(read_z()).astype(np.float32) if read_z else np.zeros(1, np.float32)
        # reference formula: ONNX QLinearConv/QLinearMatMul/ConvInteger/MatMulInteger,
        # real value = (quantized - zero_point) * scale, per output channel or per tensor
        out = (values - _along(z, rows_axis, rank)) * _along(s, rows_axis, rank)
        return contiguous(out.T if transpose else out, np.float32)

    return read


def _scales_fit(views: tuple[View | None, ...], size: int) -> bool:
    return all(v is None or per_axis(v.shape, size) for v in views)


def qlinear_conv(folder: Folder, node: Node) -> QuantWeight | None:
    """QLinearConv ``(x, x_scale, x_zp, w, w_scale, w_zp, y_scale, y_zp, B)``."""
    q = folder.fold(node.input(3))
    scale, zero = folder.fold(node.input(4)), folder.fold(node.input(5))
    if q is None or scale is None or len(q.shape) < 3 or q.dtype.is_float:
        return None
    units = q.shape[0]
    if not _scales_fit((scale, zero), units):
        return None
    bias_key, bias_read = None, None
    bias = folder.fold(node.input(8))
    x_scale = folder.scalar(node.input(1))
    if bias is not None and x_scale is not None and per_axis(bias.shape, units):
        read_b, read_s = bias.read, scale.read

        def bias_read_f() -> np.ndarray:
            # reference: ONNX QLinearConv, B is quantized with scale x_scale * w_scale, zp 0
            b = np.asarray(read_b()).astype(np.float32).reshape(-1)
            s = np.asarray(read_s()).astype(np.float32).reshape(-1)
            return np.asarray(b * np.float32(x_scale) * s, dtype=np.float32).reshape(units)

        bias_key, bias_read = bias.source, bias_read_f
    return QuantWeight(q.source, q.shape, _weight(q, scale, zero, 0, False), bias_key, bias_read)


def qlinear_matmul(folder: Folder, node: Node) -> QuantWeight | None:
    """QLinearMatMul ``(a, a_scale, a_zp, b, b_scale, b_zp, y_scale, y_zp)`` with constant b."""
    q = folder.fold(node.input(3))
    scale, zero = folder.fold(node.input(4)), folder.fold(node.input(5))
    if q is None or scale is None or len(q.shape) != 2 or q.dtype.is_float:
        return None
    if not _scales_fit((scale, zero), q.shape[1]):
        return None
    shape = (q.shape[1], q.shape[0])
    return QuantWeight(q.source, shape, _weight(q, scale, zero, 1, True))


def conv_integer(folder: Folder, node: Node, scale_key: str | None) -> QuantWeight | None:
    """ConvInteger ``(x, w, x_zp, w_zp)``; ``scale_key`` is the weight scale found downstream."""
    q = folder.fold(node.input(1))
    zero = folder.fold(node.input(3)) if node.input(3) else None
    scale = folder.fold(scale_key) if scale_key else None
    if q is None or len(q.shape) < 3 or q.dtype.is_float:
        return None
    if not _scales_fit((zero,), q.shape[0]) or not _scales_fit((scale,), q.shape[0]):
        return None
    return QuantWeight(
        q.source, q.shape, _weight(q, scale, zero, 0, False), scale_found=scale is not None
    )


def matmul_integer(folder: Folder, node: Node, scale_key: str | None) -> QuantWeight | None:
    """MatMulInteger ``(a, b, a_zp, b_zp)`` with constant ``b [K, N]``."""
    q = folder.fold(node.input(1))
    zero = folder.fold(node.input(3)) if node.input(3) else None
    scale = folder.fold(scale_key) if scale_key else None
    if q is None or len(q.shape) != 2 or q.dtype.is_float:
        return None
    if not _scales_fit((zero,), q.shape[1]) or not _scales_fit((scale,), q.shape[1]):
        return None
    shape = (q.shape[1], q.shape[0])
    return QuantWeight(
        q.source, shape, _weight(q, scale, zero, 1, True), scale_found=scale is not None
    )


@dataclass(frozen=True)
class IntegerScale:
    """The weight scale found after a ConvInteger/MatMulInteger (see :func:`integer_scale`)."""

    key: str | None
    """The constant weight scale, None when none was found."""
    out: str | None
    """The rescaled value (where the layer's float units are), None when not found."""
    use: tuple[int, int] | None = None
    """(node index, input position) where the scale is read: a bookkeeping use, not a weight."""


def integer_scale(
    consumers: Mapping[str, list[tuple[Node, int]]],
    producer: Mapping[str, tuple[Node, int]],
    folder: Folder,
    node: Node,
) -> IntegerScale:
    """The constant weight scale applied after ConvInteger/MatMulInteger, and the rescaled value.

    Exporters write ``Cast(int32 → float) → Mul(·, s)`` with ``s`` the weight scale itself or
    ``Mul(input_scale, weight_scale)``; the returned value key is the Mul's output (where the
    layer's float units are), the scale key None when no constant scale was found.
    """
    key = node.outputs[0] if node.outputs else ""
    for _ in range(2):
        users = consumers.get(key, [])
        if len(users) != 1:
            return IntegerScale(None, None)
        user, position = users[0]
        if user.op == "Cast":
            key = user.outputs[0] if user.outputs else ""
            continue
        if user.op != "Mul":
            return IntegerScale(None, None)
        other = user.input(1 - position)
        out = user.outputs[0] if user.outputs else None
        if folder.is_const(other):
            return IntegerScale(other, out, (user.index, 1 - position))
        found = producer.get(other)
        if found is not None and found[0].op == "Mul":
            consts = [p for p, k in enumerate(found[0].inputs) if folder.is_const(k)]
            if len(consts) == 1:
                return IntegerScale(found[0].inputs[consts[0]], out, (found[0].index, consts[0]))
        return IntegerScale(None, out)
    return IntegerScale(None, None)


#: (input positions holding quantized values, positions holding scales / zero points).
#: A constant in a value position is a weight of the model; one in a scale or zero-point
#: position is bookkeeping. Sources: the ONNX operator spec (docs/Operators.md:
#: DequantizeLinear ``x, x_scale, x_zero_point``; QuantizeLinear ``x, y_scale, y_zero_point``
#: (x is float: a plain value); QLinearConv ``x, x_scale, x_zero_point, w, w_scale,
#: w_zero_point, y_scale, y_zero_point, B``; QLinearMatMul ``a, a_scale, a_zero_point, b,
#: b_scale, b_zero_point, y_scale, y_zero_point``; ConvInteger ``x, w, x_zero_point,
#: w_zero_point``; MatMulInteger ``A, B, a_zero_point, b_zero_point``) and onnxruntime's
#: contrib operator spec (docs/ContribOperators.md, domain com.microsoft).
_STANDARD_ROLES: dict[str, tuple[tuple[int, ...], tuple[int, ...]]] = {
    "DequantizeLinear": ((0,), (1, 2)),
    "QuantizeLinear": ((), (1, 2)),
    "QLinearConv": ((0, 3, 8), (1, 2, 4, 5, 6, 7)),
    "QLinearMatMul": ((0, 3), (1, 2, 4, 5, 6, 7)),
    "ConvInteger": ((0, 1), (2, 3)),
    "MatMulInteger": ((0, 1), (2, 3)),
}
_CONTRIB_ROLES: dict[str, tuple[tuple[int, ...], tuple[int, ...]]] = {
    **_STANDARD_ROLES,
    # A, A_scale, A_zero_point, B, B_scale, B_zero_point, C_scale, C_zero_point
    "QLinearAdd": ((0, 3), (1, 2, 4, 5, 6, 7)),
    "QLinearMul": ((0, 3), (1, 2, 4, 5, 6, 7)),
    # A, a_scale, a_zero_point, B, b_scale, b_zero_point, C, y_scale, y_zero_point
    "QGemm": ((0, 3, 6), (1, 2, 4, 5, 7, 8)),
    # X, X_scale, X_zero_point, Y_scale, Y_zero_point
    "QLinearSigmoid": ((0,), (1, 2, 3, 4)),
    "QLinearLeakyRelu": ((0,), (1, 2, 3, 4)),
    "QLinearAveragePool": ((0,), (1, 2, 3, 4)),
    "QLinearGlobalAveragePool": ((0,), (1, 2, 3, 4)),
    # A, B, b_scale, b_zero_point, bias
    "DynamicQuantizeMatMul": ((1, 4), (2, 3)),
    # A, B, a_scale, b_scale, a_zero_point, b_zero_point, bias
    "MatMulIntegerToFloat": ((0, 1, 6), (2, 3, 4, 5)),
}


def input_roles(node: Node) -> tuple[tuple[int, ...], tuple[int, ...]] | None:
    """(quantized value positions, scale / zero-point positions) of a quantized op, else None."""
    if node.standard:
        return _STANDARD_ROLES.get(node.op)
    if node.domain != "com.microsoft":
        return None
    if node.op == "QLinearConcat":
        # Y_scale, Y_zero_point, then (tensor, scale, zero point) per input.
        count = len(node.inputs)
        values = tuple(p for p in range(2, count) if (p - 2) % 3 == 0)
        return values, tuple(p for p in range(count) if p not in values)
    return _CONTRIB_ROLES.get(node.op)
