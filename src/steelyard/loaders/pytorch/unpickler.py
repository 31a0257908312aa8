"""A restricted unpickler for PyTorch checkpoints: nothing in the file is ever executed.

Every global a pickle names goes through :meth:`RestrictedUnpickler.find_class` (the GLOBAL and
STACK_GLOBAL opcodes both end there), which resolves only an allowlist, and only to inert
stand-ins defined in this module: functions that check their arguments and return plain data
(:class:`TensorRef`, :class:`StorageRef`, tuples, dicts) or placeholders that record what they
were given (:class:`Opaque`). Any other global is refused with a :class:`LoadError`.

We subclass the pure-Python unpickler (``pickle._Unpickler``, the implementation behind
``pickle.Unpickler``'s interface) rather than the C one on purpose: its opcode table can be
amended, which lets us refuse tuples nested deeper than :data:`MAX_TUPLE_DEPTH` (hashing a
tuple nested a million deep, as a dict key, overflows the C stack and kills the process) and
over-long text integers (``int()`` on them is super-linear). It is slower, but state-dict pickles
are small, and the size of every pickle is capped at :data:`MAX_PICKLE_BYTES`.

The memo lets a pickle of a few bytes refer to a large object again and again, so every cost
that an opcode's *argument* drives is metered, not just the pickle's length (see
``docs/safety.md``): opcodes that allocate a container or a memo entry count against
:data:`MAX_PICKLE_OBJECTS`; a tuple's unfolded size (what hashing or comparing it visits) is
cached per tuple and capped at :data:`MAX_TUPLE_ITEMS`; hashing keys and copying inputs in
stand-ins (``set(list)``, ``bytearray(bytes)``) count against a work budget proportional to the
pickle's size; and the checkpoint's load-seconds budget is checked as opcodes run.
"""

from __future__ import annotations

import io
import math
import pickle
import re
import threading
from collections import OrderedDict
from collections.abc import Callable, Mapping
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any, ClassVar

from steelyard.budget import Ledger
from steelyard.errors import LoadError

#: Largest pickle steelyard unpickles, checked before a compressed pickle is inflated. torch
#: writes ~120 bytes per tensor of a state dict and ~345 per parameter of a training
#: checkpoint with Adam state (measured with torch 2.13: 10,000 tensors -> 1.2 MB data.pkl;
#: 2,000 parameters + Adam -> 0.69 MB), so 8 MiB holds ~70,000 tensors or ~24,000 parameters
#: with their optimizer state. The pure-Python unpickler runs ~1.5 MB/s on such pickles, so
#: the cap also bounds the time (~5 s) and the memory a pickle of one-byte opcodes can build.
MAX_PICKLE_BYTES = 8 * 2**20
#: Most allocating opcodes (containers, calls, memo entries; see ``_WEIGHTS``) one pickle
#: may run: one-byte opcodes each building a 64-216 byte object would otherwise turn an 8 MiB
#: pickle into ~2 GiB. Real pickles use ~17 per tensor (state dict) or ~65 per parameter
#: (training checkpoint with Adam), so the byte cap binds first for them.
MAX_PICKLE_OBJECTS = 2_000_000
#: Largest unfolded size of a tuple (items, counting a memo-shared inner tuple at every place
#: it occurs): hashing or comparing a tuple visits them all, and CPython caches neither. A tuple
#: whose inner tuples are not shared never exceeds the pickle's byte count.
MAX_TUPLE_ITEMS = MAX_PICKLE_BYTES
#: Tuples nested deeper than this are refused (see the module docstring).
MAX_TUPLE_DEPTH = 64
#: Most dimensions a tensor may claim (torch itself caps at 64).
MAX_DIMS = 64
#: Most distinct TorchScript classes one archive may name.
MAX_SCRIPT_CLASSES = 10_000


class Unsupported(Exception):
    """A stand-in met something valid but unreadable; the message is the user-facing reason."""


# --------------------------------------------------------------------------- stand-in data


@dataclass(frozen=True, slots=True)
class StorageType:
    """Stand-in for ``torch.FloatStorage`` & co. and ``torch.storage.UntypedStorage``."""

    torch_name: str
    """The global it stands for, e.g. ``torch.FloatStorage``."""
    dtype: str | None
    """Element dtype short name; None when untyped (bytes) or when steelyard cannot decode it."""
    untyped: bool = False
    """True for ``UntypedStorage``: its numel counts bytes."""


@dataclass(frozen=True, slots=True)
class DType:
    """Stand-in for a ``torch.<dtype>`` global such as ``torch.bfloat16``."""

    torch_name: str
    dtype: str | None
    """Short name (see :mod:`steelyard.dtypes`); None when steelyard cannot decode it."""


@dataclass(frozen=True, slots=True)
class StorageRef:
    """A storage record the pickle refers to by persistent id."""

    kind: StorageType
    key: str
    location: str
    numel: int
    """As stored: elements for typed storages, bytes for ``UntypedStorage``."""


@dataclass(frozen=True, slots=True)
class TensorRef:
    """What ``torch._utils._rebuild_tensor_v2/v3`` would have built, as plain data."""

    storage: StorageRef
    offset: int
    """Storage offset in elements."""
    size: tuple[int, ...]
    stride: tuple[int, ...]
    """Strides in elements."""
    dtype: str | None
    """Short dtype name; None when steelyard cannot decode the dtype."""
    dtype_name: str
    """The torch name of the dtype (for messages)."""
    requires_grad: bool = False
    parameter: bool = False
    """Rebuilt through ``_rebuild_parameter`` (an ``nn.Parameter``)."""

    @property
    def identity(self) -> tuple[str, int, tuple[int, ...], tuple[int, ...]]:
        """Two references with the same identity view the very same elements (tied weights)."""
        return (self.storage.key, self.offset, self.size, self.stride)


class TypeMarker:
    """Stand-in for a class that is only ever passed around (``torch.Tensor``), never called."""

    def __init__(self, qualname: str) -> None:
        self.qualname = qualname

    def __repr__(self) -> str:
        return f"<{self.qualname}>"


class Opaque:
    """An inert placeholder for an object steelyard does not rebuild.

    Calling the class (REDUCE), creating it with NEWOBJ, and BUILD only record their arguments;
    no method of the original class exists here, so nothing can run.
    """

    qualname: ClassVar[str] = "object"

    def __new__(cls, *args: object, **kwargs: object) -> Opaque:
        self = super().__new__(cls)
        self.args = args
        self.state = None
        return self

    def __init__(self, *args: object, **kwargs: object) -> None:
        # Arguments were recorded by __new__; NEWOBJ skips __init__, REDUCE calls both.
        pass

    args: tuple[object, ...]
    state: object

    def __setstate__(self, state: object) -> None:
        self.state = state

    def __repr__(self) -> str:
        return f"<{self.qualname} (not rebuilt)>"


class ScriptObject(Opaque):
    """A TorchScript object (``__torch__.<module>.<Class>``): its BUILD state is its attributes."""

    qualname: ClassVar[str] = "__torch__"


class StateDict(OrderedDict[Any, Any]):
    """Stand-in for ``collections.OrderedDict``; BUILD may only attach ``_metadata``."""

    def __init__(self, *args: object, **kwargs: object) -> None:
        # pickle writes an OrderedDict as OrderedDict() plus SETITEMS; items passed to the
        # call would be a copy of a (possibly memo-shared, reused) list, so none are taken.
        if args or kwargs:
            raise Unsupported("builds an OrderedDict from arguments, which torch never writes")
        super().__init__()

    def __setstate__(self, state: object) -> None:
        # torch pickles a state dict's ``_metadata`` (per-module versions) as BUILD state.
        self.metadata = state

    # OrderedDict.__reduce__ is irrelevant here: we never pickle.


def _opaque_class(qualname: str, base: type[Opaque] = Opaque) -> type[Opaque]:
    return type(qualname.rsplit(".", 1)[-1], (base,), {"qualname": qualname, "__slots__": ()})


# --------------------------------------------------------------------------- work meter


class _Meter:
    """What one unpickle may still spend: allocating opcodes, and work driven by arguments
    (keys hashed, inputs copied), which memo references could otherwise repeat at will."""

    def __init__(self, size: int) -> None:
        self.objects = MAX_PICKLE_OBJECTS
        # Every element a legitimate pickle hashes or copies took at least one byte to write,
        # and each is normally used once; four passes leave room for honest reuse.
        self.work = 4 * max(size, 1 << 16)
        self.tuples: dict[int, tuple[tuple[Any, ...], int, int]] = {}
        """id → (the tuple, kept alive so its id is not reused; depth; unfolded items)."""

    def charge(self, units: int, what: str) -> None:
        self.work -= units
        if self.work < 0:
            raise Unsupported(
                f"{what} again and again (memo-shared input reused): more work than the "
                "pickle's size justifies"
            )

    def measure(self, value: tuple[Any, ...], limit: int = MAX_TUPLE_DEPTH + 1) -> tuple[int, int]:
        """(depth, unfolded items) of a tuple, cached by id (linear over the whole pickle)."""
        known = self.tuples.get(id(value))
        if known is not None:
            return known[1], known[2]
        if limit <= 0:
            return MAX_TUPLE_DEPTH + 1, 0
        depth, items = 1, len(value)
        for item in value:
            if isinstance(item, tuple) and item:
                inner_depth, inner_items = self.measure(item, limit - 1)
                depth = max(depth, inner_depth + 1)
                items += inner_items
        self.tuples[id(value)] = (value, depth, items)
        return depth, items

    def key_cost(self, key: object) -> int:
        """Work hashing ``key`` costs (CPython caches the hash of str and frozenset only)."""
        if isinstance(key, tuple):
            return 1 + self.measure(key)[1]
        if isinstance(key, int):
            return 1 + key.bit_length() // 64
        return 1


_local = threading.local()


def _charge(units: int, what: str) -> None:
    meter: _Meter | None = getattr(_local, "meter", None)
    if meter is not None:
        meter.charge(units, what)


def _charge_keys(keys: Any, what: str) -> None:
    meter: _Meter | None = getattr(_local, "meter", None)
    if meter is not None:
        meter.charge(sum(meter.key_cost(k) for k in keys), what)


# --------------------------------------------------------------------------- stand-in calls


def _int(value: object, what: str, minimum: int = 0) -> int:
    if not isinstance(value, int) or isinstance(value, bool) or value < minimum:
        raise Unsupported(f"{what} is {type(value).__name__} {_short(value)}, not an integer")
    return value


def _ints(value: object, what: str) -> tuple[int, ...]:
    if not isinstance(value, (tuple, list)) or len(value) > MAX_DIMS:
        raise Unsupported(f"{what} is not a short list of integers")
    if all(type(v) is int and v >= 0 for v in value):
        return tuple(value)
    return tuple(_int(v, what) for v in value)


def _short(value: object) -> str:
    if isinstance(value, (int, float, str, bool)) or value is None:
        text = repr(value)
        return text if len(text) <= 40 else text[:37] + "..."
    return ""


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
    shape = _ints(size, "a tensor's size")
    strides = _ints(stride, "a tensor's stride")
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
        offset=_int(offset, "a tensor's storage offset"),
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
    return _ints(dims, "a torch.Size")


def _device(kind: object = "cpu", index: object = None) -> str:
    if not isinstance(kind, str) or len(kind) > 64:
        raise Unsupported("a torch.device is not named by a short string")
    return kind if index is None else f"{kind}:{_int(index, 'a device index')}"


def _set(items: object = ()) -> set[Any]:
    if not isinstance(items, (list, tuple, set, frozenset)):
        raise Unsupported("a set is built from something that is not a list")
    _charge_keys(items, "builds a set from the same items")
    return set(items)


def _frozenset(items: object = ()) -> frozenset[Any]:
    return frozenset(_set(items))


def _slice(*args: object) -> slice:
    if len(args) > 3 or not all(a is None or type(a) is int for a in args):
        raise Unsupported("a slice is built from something other than integers")
    return slice(*args)


def _bytearray(data: object = b"", encoding: object = None) -> bytearray:
    if isinstance(data, (bytes, str)):
        _charge(len(data), "copies the same bytes into a bytearray")
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
    _charge(len(text), "encodes the same text")
    return text.encode("latin-1")


def _same_list(kind: type | tuple[type, ...], what: str) -> Callable[[object], list[Any]]:
    def build(data: object) -> list[Any]:
        if isinstance(data, list):
            _charge(len(data), f"checks the same list with torch.jit._pickle.{what}")
        if not isinstance(data, list) or not all(isinstance(v, kind) for v in data):
            raise Unsupported(f"torch.jit._pickle.{what} is given something else than its list")
        return data

    return build


def _restore_type_tag(value: object, type_str: object) -> object:
    return value


# --------------------------------------------------------------------------- the allowlist

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
        allowed[qualname] = _opaque_class(qualname)
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

_PY2_MODULES = {"__builtin__": "builtins", "copy_reg": "copyreg"}
_SCRIPT_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*(\.[A-Za-z_][A-Za-z0-9_]*)*$")


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


# --------------------------------------------------------------------------- the unpickler


class RestrictedUnpickler(pickle._Unpickler):
    """Unpickles with only the allowlisted stand-ins; refuses everything else.

    ``persistent`` receives each persistent id (a tuple) and returns its stand-in;
    ``script`` allows ``__torch__.*`` classes (TorchScript archives) as :class:`ScriptObject`.
    """

    # The opcode table of the pure-Python unpickler, amended below (typeshed types it loosely).
    dispatch: ClassVar[dict[int, Callable[[Any], None]]] = dict(pickle._Unpickler.dispatch)
    # Attributes the pure-Python unpickler sets while loading (absent from typeshed).
    stack: list[Any]
    metastack: list[list[Any]]
    readline: Callable[[], bytes]
    read: Callable[[int], bytes]
    readinto: Callable[[Any], int]
    append: Callable[[Any], None]
    proto: int
    _file_read: Callable[[int], bytes]
    _file_readline: Callable[[], bytes]

    def __init__(
        self,
        data: bytes | io.BytesIO,
        path: Path,
        persistent: Callable[[object], object] | None = None,
        script: bool = False,
        ledger: Ledger | None = None,
        what: str = "a pickle",
    ) -> None:
        stream = data if isinstance(data, io.BytesIO) else io.BytesIO(data)
        super().__init__(stream, encoding="utf-8")
        self._path = path
        self._persistent = persistent
        self._script = script
        self._classes: dict[str, type[Opaque]] = {}
        self._ledger = ledger if ledger is not None else Ledger(path)
        self._what = what
        self._meter = _Meter(len(stream.getbuffer()) - stream.tell())

    def load(self) -> Any:
        """``pickle._Unpickler.load`` with the allocation meter and the time budget.

        The loop is the standard library's (Python 3.11 ``pickle.py``) plus two checks per
        opcode; the meter is visible to the stand-ins (thread-local) while it runs.
        """
        self._unframer = _UNFRAMER(self._file_read, self._file_readline)
        self.read = self._unframer.read
        self.readinto = self._unframer.readinto
        self.readline = self._unframer.readline
        self.metastack = []
        self.stack = []
        self.append = self.stack.append
        self.proto = 0
        read = self.read
        dispatch = self.dispatch
        weights = _WEIGHTS
        meter = self._meter
        ledger = self._ledger
        count = 0
        previous = getattr(_local, "meter", None)
        _local.meter = meter
        try:
            while True:
                key = read(1)
                if not key:
                    raise EOFError
                op = key[0]
                meter.objects -= weights[op]
                if meter.objects < 0:
                    raise Unsupported(
                        f"builds more than {MAX_PICKLE_OBJECTS:,} containers, calls or memo "
                        "entries (a state dict needs a few per tensor)"
                    )
                count += 1
                if not count & 0x3FF:
                    ledger.check_time(self._what)
                dispatch[op](self)
        except _STOP as stop:
            return getattr(stop, "value")  # noqa: B009 (_Stop carries the result)
        finally:
            _local.meter = previous

    def find_class(self, module: str, name: str) -> Any:
        if not isinstance(module, str) or not isinstance(name, str):
            raise LoadError(self._path, "names a global that is not a string")
        module = _PY2_MODULES.get(module, module)
        full = f"{module}.{name}"
        if full in ALLOWED:
            return ALLOWED[full]
        if self._script and (module == "__torch__" or module.startswith("__torch__.")):
            if len(full) > 500 or not _SCRIPT_NAME.match(full):
                raise LoadError(self._path, f"names an invalid TorchScript class {full[:80]!r}")
            if full not in self._classes:
                if len(self._classes) >= MAX_SCRIPT_CLASSES:
                    raise LoadError(self._path, "names too many TorchScript classes")
                self._classes[full] = _opaque_class(full, ScriptObject)
            return self._classes[full]
        raise LoadError(self._path, refusal(module, name))

    def persistent_load(self, pid: Any) -> Any:
        if self._persistent is None:
            raise Unsupported("a pickle that should hold plain data refers to a storage")
        return self._persistent(pid)

    # -- amended opcodes ------------------------------------------------------------------

    def _tuple_depth(self) -> None:
        # Every tuple is measured once and cached by id (flat ones too): a tuple referred to
        # many times from other tuples is never measured again.
        top = self.stack[-1]
        if not top:
            return
        depth, items = self._meter.measure(top)
        if depth > MAX_TUPLE_DEPTH:
            raise Unsupported(f"nests tuples more than {MAX_TUPLE_DEPTH} deep")
        if items > MAX_TUPLE_ITEMS:
            raise Unsupported(
                f"builds a tuple of {items:,} items counting shared inner tuples at each place "
                f"they occur (more than {MAX_TUPLE_ITEMS:,}; hashing it would take that long)"
            )

    def _charge_set_keys(self) -> None:
        # SETITEMS, ADDITEMS, DICT: the items since the last MARK are the current stack.
        self._meter.charge(
            sum(self._meter.key_cost(k) for k in self.stack[::2]), "hashes the same keys"
        )

    def _charge_added_keys(self) -> None:
        self._meter.charge(sum(self._meter.key_cost(k) for k in self.stack), "hashes the same keys")

    def _charge_setitem_key(self) -> None:
        if len(self.stack) >= 2:
            self._meter.charge(self._meter.key_cost(self.stack[-2]), "hashes the same keys")

    def _load_int(self) -> None:
        data = self.readline()
        if len(data) > 40:
            raise Unsupported("holds an over-long integer literal")
        if data == b"00\n":
            self.append(False)
        elif data == b"01\n":
            self.append(True)
        else:
            self.append(int(data, 0))

    def _load_long(self) -> None:
        data = self.readline()[:-1]
        if len(data) > 40:
            raise Unsupported("holds an over-long integer literal")
        if data and data[-1:] == b"L":
            data = data[:-1]
        self.append(int(data, 0))

    def _load_build(self) -> None:
        # BUILD may only fill our placeholders; on the frozen stand-ins (TensorRef...) it
        # would overwrite checked fields, so it is refused there.
        if len(self.stack) < 2 or not isinstance(self.stack[-2], (Opaque, StateDict)):
            raise Unsupported("applies object state to a value that takes none")
        _BUILD(self)

    def _refuse_opcode(self) -> None:
        raise Unsupported(
            "uses a pickle opcode steelyard does not accept (INST, OBJ, EXT, BYTEARRAY8 or buffers)"
        )


_UNFRAMER: Any = getattr(pickle, "_Unframer")  # noqa: B009 (private, absent from typeshed)
_STOP: type[BaseException] = getattr(pickle, "_Stop")  # noqa: B009

#: Opcodes that allocate a container, call a stand-in or add a memo entry (weight 1; sets,
#: 216 bytes empty, weigh 4). The others build at most a number or a string from their own
#: bytes, or push a reference.
_WEIGHTS = [0] * 256
for _op in (
    pickle.MARK,
    pickle.EMPTY_DICT,
    pickle.EMPTY_LIST,
    pickle.DICT,
    pickle.LIST,
    pickle.TUPLE,
    pickle.TUPLE1,
    pickle.TUPLE2,
    pickle.TUPLE3,
    pickle.REDUCE,
    pickle.NEWOBJ,
    pickle.NEWOBJ_EX,
    pickle.BUILD,
    pickle.GLOBAL,
    pickle.STACK_GLOBAL,
    pickle.PERSID,
    pickle.BINPERSID,
    pickle.MEMOIZE,
    pickle.PUT,
    pickle.BINPUT,
    pickle.LONG_BINPUT,
):
    _WEIGHTS[_op[0]] = 1
for _op in (pickle.EMPTY_SET, pickle.FROZENSET):
    _WEIGHTS[_op[0]] = 4


def _before(opcode: bytes, check: Callable[[RestrictedUnpickler], None]) -> None:
    original: Callable[[Any], None] = RestrictedUnpickler.dispatch[opcode[0]]

    def run(self: RestrictedUnpickler) -> None:
        check(self)
        original(self)

    RestrictedUnpickler.dispatch[opcode[0]] = run


def _after(opcode: bytes, check: Callable[[RestrictedUnpickler], None]) -> None:
    original: Callable[[Any], None] = pickle._Unpickler.dispatch[opcode[0]]

    def run(self: RestrictedUnpickler) -> None:
        original(self)
        check(self)

    RestrictedUnpickler.dispatch[opcode[0]] = run


for _op in (pickle.TUPLE, pickle.TUPLE1, pickle.TUPLE2, pickle.TUPLE3):
    _after(_op, RestrictedUnpickler._tuple_depth)
_before(pickle.SETITEMS, RestrictedUnpickler._charge_set_keys)
_before(pickle.DICT, RestrictedUnpickler._charge_set_keys)
_before(pickle.ADDITEMS, RestrictedUnpickler._charge_added_keys)
_before(pickle.FROZENSET, RestrictedUnpickler._charge_added_keys)
_before(pickle.SETITEM, RestrictedUnpickler._charge_setitem_key)
RestrictedUnpickler.dispatch[pickle.INT[0]] = RestrictedUnpickler._load_int
RestrictedUnpickler.dispatch[pickle.LONG[0]] = RestrictedUnpickler._load_long
_BUILD: Callable[[Any], None] = pickle._Unpickler.dispatch[pickle.BUILD[0]]
RestrictedUnpickler.dispatch[pickle.BUILD[0]] = RestrictedUnpickler._load_build
# BYTEARRAY8 allocates its declared length before reading (a hostile length costs gigabytes);
# out-of-band buffers never occur in torch files. Neither are needed, so all are refused.
for _op in (
    pickle.INST,
    pickle.OBJ,
    pickle.EXT1,
    pickle.EXT2,
    pickle.EXT4,
    pickle.BYTEARRAY8,
    pickle.NEXT_BUFFER,
    pickle.READONLY_BUFFER,
):
    RestrictedUnpickler.dispatch[_op[0]] = RestrictedUnpickler._refuse_opcode


def restricted_load(
    data: bytes | io.BytesIO,
    path: Path,
    what: str,
    persistent: Callable[[object], object] | None = None,
    script: bool = False,
    ledger: Ledger | None = None,
) -> Any:
    """Unpickle ``data`` (named ``what`` in messages) with the allowlist, or raise LoadError.

    ``ledger`` is the checkpoint's: its load-seconds budget bounds the unpickling time."""
    size = len(data) if isinstance(data, bytes) else len(data.getbuffer()) - data.tell()
    if size > MAX_PICKLE_BYTES:
        raise LoadError(path, f"{what} is {size} bytes, more than the {MAX_PICKLE_BYTES} cap")
    try:
        return RestrictedUnpickler(data, path, persistent, script, ledger, what).load()
    except LoadError:
        raise
    except Unsupported as exc:
        raise LoadError(path, f"{what}: {exc}") from None
    except RecursionError:
        raise LoadError(path, f"{what} is nested too deeply") from None
    except MemoryError:
        raise LoadError(path, f"{what} needs more memory than is available") from None
    except Exception as exc:
        # The unpickler meets arbitrary bytes: every failure is a malformed pickle.
        raise LoadError(
            path, f"{what} is not a readable pickle ({type(exc).__name__}: {str(exc)[:120]})"
        ) from None


def parse_storage_id(pid: object) -> tuple[StorageType, str, str, int, object]:
    """Split ``('storage', type, key, location, numel[, view])`` after checking every part."""
    if not isinstance(pid, tuple) or len(pid) not in (5, 6):
        raise Unsupported("refers to a persistent object that is not a storage record")
    tag = pid[0].decode("ascii", "replace") if isinstance(pid[0], bytes) else pid[0]
    if tag == "module":
        raise Unsupported("stores a whole pickled model object; save model.state_dict() instead")
    if tag != "storage":
        raise Unsupported(f"refers to a persistent object of kind {_short(tag)}")
    kind, key, location, numel = pid[1], pid[2], pid[3], pid[4]
    view = pid[5] if len(pid) == 6 else None
    if not isinstance(kind, StorageType):
        raise Unsupported("names a storage whose type is not a torch storage class")
    if not isinstance(key, str) or not re.fullmatch(r"[A-Za-z0-9_]{1,64}", key):
        raise Unsupported(f"names a storage with an invalid key {_short(key)}")
    if not isinstance(location, str) or len(location) > 64:
        raise Unsupported("names a storage with an invalid device")
    return kind, key, location, _int(numel, "a storage's numel"), view


def elements(ref: TensorRef) -> int:
    """Number of elements a tensor reference spans."""
    return math.prod(ref.size)


__all__ = [
    "ALLOWED",
    "MAX_PICKLE_BYTES",
    "MAX_PICKLE_OBJECTS",
    "MAX_TUPLE_ITEMS",
    "DType",
    "Opaque",
    "RestrictedUnpickler",
    "ScriptObject",
    "StateDict",
    "StorageRef",
    "StorageType",
    "TensorRef",
    "TypeMarker",
    "Unsupported",
    "elements",
    "parse_storage_id",
    "refusal",
    "restricted_load",
]
