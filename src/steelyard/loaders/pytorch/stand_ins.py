"""The inert values a PyTorch pickle may build, and the checks their arguments pass.

Every global a pickle names resolves (through :mod:`~steelyard.loaders.pytorch.allowlist`)
to something defined here or built from it: frozen records that say what torch would have
rebuilt (:class:`TensorRef`, :class:`StorageRef`, :class:`StorageType`, :class:`DType`) and
placeholders that only record what they were given (:class:`Opaque`, :class:`ScriptObject`,
:class:`StateDict`). None of them has a method that could run code from the file.
"""

from __future__ import annotations

from collections import OrderedDict
from dataclasses import dataclass
from typing import Any, ClassVar

#: Most dimensions a tensor may claim (torch itself caps at 64).
MAX_DIMS = 64


class Unsupported(Exception):
    """A stand-in met something valid but unreadable; the message is the user-facing reason."""


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


def opaque_class(qualname: str, base: type[Opaque] = Opaque) -> type[Opaque]:
    """A placeholder class standing for the global ``qualname``."""
    return type(qualname.rsplit(".", 1)[-1], (base,), {"qualname": qualname, "__slots__": ()})


def checked_int(value: object, what: str, minimum: int = 0) -> int:
    """``value`` when it is an integer of at least ``minimum``, else Unsupported naming ``what``."""
    if not isinstance(value, int) or isinstance(value, bool) or value < minimum:
        raise Unsupported(f"{what} is {type(value).__name__} {short(value)}, not an integer")
    return value


def checked_ints(value: object, what: str) -> tuple[int, ...]:
    """``value`` as a tuple of non-negative integers (at most :data:`MAX_DIMS`), else
    Unsupported."""
    if not isinstance(value, (tuple, list)) or len(value) > MAX_DIMS:
        raise Unsupported(f"{what} is not a short list of integers")
    if all(type(v) is int and v >= 0 for v in value):
        return tuple(value)
    return tuple(checked_int(v, what) for v in value)


def short(value: object) -> str:
    """A scalar shown for a message (cut to 40 characters); empty for anything else."""
    if isinstance(value, (int, float, str, bool)) or value is None:
        text = repr(value)
        return text if len(text) <= 40 else text[:37] + "..."
    return ""
