"""The globals a PyTorch pickle may name, and the inert stand-in each one resolves to.

A pickle calls globals to rebuild objects; here every allowed global is a function that checks
its arguments and returns plain data (``torch._utils._rebuild_tensor_v2`` returns a
:class:`~steelyard.loaders.pytorch.stand_ins.TensorRef`), a stand-in type, or a placeholder
that records its arguments. :data:`ALLOWED` is the whole table; :func:`refusal` words the
reason for refusing any other global. Copies and hashes that a memo-shared argument could
repeat are charged to the unpickle's meter (:mod:`~steelyard.loaders.pytorch.meter`).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import replace
from typing import Any

from steelyard.loaders.pytorch.meter import charge, charge_keys
from steelyard.loaders.pytorch.stand_ins import (
    DType,
    StateDict,
    StorageRef,
    StorageType,
    TensorRef,
    TypeMarker,
    Unsupported,
    checked_int,
    checked_ints,
    opaque_class,
)


def _tensor(
    storage: object,
    offset: object,
    size: object,
    stride: object,
    requires_grad: object,
    dtype: DType | None,
) -> TensorRef:
    if not isinstance(storage, StorageRef):
        raise Unsupported("a tensor is rebuilt from something that is not a storage record")
    shape = checked_ints(size, "a tensor's size")
    strides = checked_ints(stride, "a tensor's stride")
    if len(shape) != len(strides):
        raise Unsupported(f"a tensor has size {list(shape)} but stride {list(strides)}")
    if not isinstance(requires_grad, bool):
        raise Unsupported("a tensor's requires_grad is not a bool")
    if dtype is None:
        if storage.kind.untyped:
            raise Unsupported("a tensor over an untyped storage names no dtype")
        name, torch_name = storage.kind.dtype, storage.kind.torch_name
    else:
        if not storage.kind.untyped:
            raise Unsupported(f"a tensor of {dtype.torch_name} sits on a typed storage")
        name, torch_name = dtype.dtype, dtype.torch_name
    return TensorRef(
        storage=storage,
        offset=checked_int(offset, "a tensor's storage offset"),
        size=shape,
        stride=strides,
        dtype=name,
        dtype_name=torch_name,
        requires_grad=requires_grad,
    )


def _rebuild_tensor_v2(
    storage: object,
    offset: object,
    size: object,
    stride: object,
    requires_grad: object = False,
    hooks: object = None,
    metadata: object = None,
) -> TensorRef:
    return _tensor(storage, offset, size, stride, requires_grad, None)


def _rebuild_tensor_v3(
    storage: object,
    offset: object,
    size: object,
    stride: object,
    requires_grad: object,
    hooks: object,
    dtype: object,
    metadata: object = None,
) -> TensorRef:
    if not isinstance(dtype, DType):
        raise Unsupported("a tensor names a dtype that is not a torch dtype")
    return _tensor(storage, offset, size, stride, requires_grad, dtype)


def _rebuild_parameter(
    data: object, requires_grad: object = True, hooks: object = None, state: object = None
) -> TensorRef:
    if not isinstance(data, TensorRef):
        raise Unsupported("a parameter is rebuilt from something that is not a tensor")
    return replace(data, parameter=True, requires_grad=bool(requires_grad))


def _rebuild_from_type_v2(func: object, new_type: object, args: object, state: object) -> object:
    # Tensor subclasses pickle as (rebuild function, class, args, state); only our own inert
    # rebuild functions can be ``func`` here, because it came through find_class.
    if func not in (_rebuild_tensor_v2, _rebuild_tensor_v3, _rebuild_parameter):
        raise Unsupported("a tensor subclass is rebuilt by an unknown function")
    if not isinstance(new_type, TypeMarker) or not isinstance(args, tuple):
        raise Unsupported("a tensor subclass of an unknown class is stored")
    rebuild: Callable[..., TensorRef] = func
    return rebuild(*args)


def _size(dims: object = ()) -> tuple[int, ...]:
    return checked_ints(dims, "a torch.Size")


def _device(kind: object = "cpu", index: object = None) -> str:
    if not isinstance(kind, str) or len(kind) > 64:
        raise Unsupported("a torch.device is not named by a short string")
    return kind if index is None else f"{kind}:{checked_int(index, 'a device index')}"


def _set(items: object = ()) -> set[Any]:
    if not isinstance(items, (list, tuple, set, frozenset)):
        raise Unsupported("a set is built from something that is not a list")
    charge_keys(items, "builds a set from the same items")
    return set(items)


def _frozenset(items: object = ()) -> frozenset[Any]:
    return frozenset(_set(items))


def _slice(*args: object) -> slice:
    if len(args) > 3 or not all(a is None or type(a) is int for a in args):
        raise Unsupported("a slice is built from something other than integers")
    return slice(*args)


def _bytearray(data: object = b"", encoding: object = None) -> bytearray:
    if isinstance(data, (bytes, str)):
        charge(len(data), "copies the same bytes into a bytearray")
    if isinstance(data, bytes) and encoding is None:
        return bytearray(data)
    if isinstance(data, str) and encoding in ("latin1", "latin-1"):
        return bytearray(data.encode("latin-1"))
    raise Unsupported("a bytearray is built from something other than bytes")


def _complex(real: object = 0.0, imag: object = 0.0) -> complex:
    if not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in (real, imag)):
        raise Unsupported("a complex number is built from something other than numbers")
    return complex(float(real), float(imag))  # type: ignore[arg-type]


def _codecs_encode(text: object, encoding: object = "utf-8") -> bytes:
    # Protocol 2 stores bytes as _codecs.encode(<latin-1 text>, 'latin1'): pure data.
    if not isinstance(text, str) or encoding not in ("latin1", "latin-1"):
        raise Unsupported("_codecs.encode is called with arguments other than text, 'latin1'")
    charge(len(text), "encodes the same text")
    return text.encode("latin-1")


def _same_list(kind: type | tuple[type, ...], what: str) -> Callable[[object], list[Any]]:
    def build(data: object) -> list[Any]:
        if isinstance(data, list):
            charge(len(data), f"checks the same list with torch.jit._pickle.{what}")
        if not isinstance(data, list) or not all(isinstance(v, kind) for v in data):
            raise Unsupported(f"torch.jit._pickle.{what} is given something else than its list")
        return data

    return build


def _restore_type_tag(value: object, type_str: object) -> object:
    return value


_STORAGES: dict[str, str | None] = {
    "FloatStorage": "f32",
    "DoubleStorage": "f64",
    "HalfStorage": "f16",
    "BFloat16Storage": "bf16",
    "LongStorage": "i64",
    "IntStorage": "i32",
    "ShortStorage": "i16",
    "CharStorage": "i8",
    "ByteStorage": "u8",
    "BoolStorage": "bool",
    "ComplexFloatStorage": None,
    "ComplexDoubleStorage": None,
    "QInt8Storage": None,
    "QUInt8Storage": None,
    "QInt32Storage": None,
    "QUInt4x2Storage": None,
    "QUInt2x4Storage": None,
}

_DTYPE_NAMES: dict[str, str | None] = {
    "float32": "f32",
    "float": "f32",
    "float64": "f64",
    "double": "f64",
    "float16": "f16",
    "half": "f16",
    "bfloat16": "bf16",
    "float8_e4m3fn": "f8_e4m3",
    "float8_e5m2": "f8_e5m2",
    "float8_e4m3fnuz": "f8_e4m3fnuz",
    "float8_e5m2fnuz": "f8_e5m2fnuz",
    "int64": "i64",
    "long": "i64",
    "int32": "i32",
    "int": "i32",
    "int16": "i16",
    "short": "i16",
    "int8": "i8",
    "uint8": "u8",
    "bool": "bool",
    "uint16": "u16",
    "uint32": "u32",
    "uint64": "u64",
    "complex32": None,
    "chalf": None,
    "complex64": None,
    "cfloat": None,
    "complex128": None,
    "cdouble": None,
    "float8_e8m0fnu": None,
    "float4_e2m1fn_x2": None,
    "qint8": None,
    "quint8": None,
    "qint32": None,
    "quint4x2": None,
    "quint2x4": None,
    "bits8": None,
    "bits16": None,
    "uint1": None,
    "uint2": None,
    "uint3": None,
    "uint4": None,
    "uint5": None,
    "uint6": None,
    "uint7": None,
    "int1": None,
    "int2": None,
    "int3": None,
    "int4": None,
    "int5": None,
    "int6": None,
    "int7": None,
}


def _build_allowlist() -> dict[str, object]:
    allowed: dict[str, object] = {
        "collections.OrderedDict": StateDict,
        "torch._utils._rebuild_tensor_v2": _rebuild_tensor_v2,
        "torch._utils._rebuild_tensor_v3": _rebuild_tensor_v3,
        "torch._utils._rebuild_parameter": _rebuild_parameter,
        "torch._utils._rebuild_parameter_with_state": _rebuild_parameter,
        "torch._tensor._rebuild_from_type_v2": _rebuild_from_type_v2,
        "torch.Tensor": TypeMarker("torch.Tensor"),
        "torch.nn.parameter.Parameter": TypeMarker("torch.nn.parameter.Parameter"),
        "torch.storage.UntypedStorage": StorageType("torch.storage.UntypedStorage", None, True),
        "torch.UntypedStorage": StorageType("torch.UntypedStorage", None, True),
        "torch.Size": _size,
        "torch.device": _device,
        "builtins.set": _set,
        "builtins.frozenset": _frozenset,
        "builtins.slice": _slice,
        "builtins.bytearray": _bytearray,
        "builtins.complex": _complex,
        "_codecs.encode": _codecs_encode,
        "torch.jit._pickle.build_intlist": _same_list(int, "build_intlist"),
        "torch.jit._pickle.build_doublelist": _same_list(float, "build_doublelist"),
        "torch.jit._pickle.build_boollist": _same_list(bool, "build_boollist"),
        "torch.jit._pickle.build_tensorlist": _same_list(TensorRef, "build_tensorlist"),
        "torch.jit._pickle.restore_type_tag": _restore_type_tag,
    }
    for name, short in _STORAGES.items():
        allowed[f"torch.{name}"] = StorageType(f"torch.{name}", short)
    for name, short in _DTYPE_NAMES.items():
        allowed[f"torch.{name}"] = DType(f"torch.{name}", short)
    # Placeholders that record and never rebuild: argparse namespaces and numpy values that
    # training scripts store beside the weights (epoch metrics, configs).
    for qualname in (
        "argparse.Namespace",
        "numpy.core.multiarray._reconstruct",
        "numpy._core.multiarray._reconstruct",
        "numpy.core.multiarray.scalar",
        "numpy._core.multiarray.scalar",
        "numpy.ndarray",
        "numpy.dtype",
    ):
        allowed[qualname] = opaque_class(qualname)
    return allowed


ALLOWED: Mapping[str, object] = _build_allowlist()

#: Globals refused with a more specific reason than "not allowed".
_EXPLAINED: dict[str, str] = {
    "torch._utils._rebuild_qtensor": (
        "stores a quantized tensor (torch._utils._rebuild_qtensor), which steelyard does not "
        "read; save the dequantized state dict instead"
    ),
    "torch._utils._rebuild_sparse_tensor": "stores a sparse tensor, which steelyard does not read",
    "torch._utils._rebuild_meta_tensor_no_storage": (
        "stores a tensor on the meta device, which has no values to read"
    ),
    "torch._utils._rebuild_device_tensor_from_numpy": (
        "stores a device tensor through numpy (torch._utils._rebuild_device_tensor_from_numpy), "
        "which steelyard does not read; save it from the CPU"
    ),
    "torch._utils._rebuild_wrapper_subclass": (
        "stores a tensor subclass (torch._utils._rebuild_wrapper_subclass), which steelyard "
        "does not read"
    ),
}


def refusal(module: str, name: str) -> str:
    """The one-line reason for refusing a global."""
    full = f"{module}.{name}"
    if full in _EXPLAINED:
        return _EXPLAINED[full]
    shown = full if len(full) <= 200 else full[:197] + "..."
    reason = f"refers to the global {shown!r}, which steelyard refuses to load"
    if module.startswith(("torch.nn.modules", "__main__")) or module.split(".")[0] in (
        "torchvision",
        "timm",
        "transformers",
    ):
        reason += " (a whole pickled model object; save model.state_dict() instead)"
    return reason
