"""A restricted unpickler for PyTorch checkpoints: nothing in the file is ever executed.

Every global a pickle names goes through :meth:`RestrictedUnpickler.find_class` (the GLOBAL and
STACK_GLOBAL opcodes both end there), which resolves only the allowlist
(:mod:`~steelyard.loaders.pytorch.allowlist`), and only to inert stand-ins
(:mod:`~steelyard.loaders.pytorch.stand_ins`): functions that check their arguments and return
plain data (:class:`TensorRef`, :class:`StorageRef`, tuples, dicts) or placeholders that record
what they were given (:class:`Opaque`). Any other global is refused with a :class:`LoadError`.

We subclass the pure-Python unpickler (``pickle._Unpickler``, the implementation behind
``pickle.Unpickler``'s interface) rather than the C one on purpose: its opcode table can be
amended, which lets us refuse tuples nested deeper than :data:`MAX_TUPLE_DEPTH` (hashing a
tuple nested a million deep, as a dict key, overflows the C stack and kills the process) and
over-long text integers (``int()`` on them is super-linear). It is slower, but state-dict pickles
are small, and the size of every pickle is capped at :data:`MAX_PICKLE_BYTES`.

Costs that the memo could multiply are metered (:mod:`~steelyard.loaders.pytorch.meter`), and
the checkpoint's load-seconds budget is checked as opcodes run.
"""

from __future__ import annotations

import io
import pickle
import re
from collections.abc import Callable
from pathlib import Path
from typing import Any, ClassVar

from steelyard.budget import Ledger
from steelyard.errors import LoadError
from steelyard.loaders.pytorch.allowlist import ALLOWED, refusal
from steelyard.loaders.pytorch.meter import (
    MAX_PICKLE_BYTES,
    MAX_PICKLE_OBJECTS,
    MAX_TUPLE_DEPTH,
    MAX_TUPLE_ITEMS,
    OPCODE_WEIGHTS,
    Meter,
    metering,
)
from steelyard.loaders.pytorch.stand_ins import (
    Opaque,
    ScriptObject,
    StateDict,
    StorageType,
    Unsupported,
    checked_int,
    opaque_class,
    short,
)

#: Most distinct TorchScript classes one archive may name.
MAX_SCRIPT_CLASSES = 10_000


_PY2_MODULES = {"__builtin__": "builtins", "copy_reg": "copyreg"}
_SCRIPT_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*(\.[A-Za-z_][A-Za-z0-9_]*)*$")


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
        self._meter = Meter(len(stream.getbuffer()) - stream.tell())

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
        weights = OPCODE_WEIGHTS
        meter = self._meter
        ledger = self._ledger
        count = 0
        with metering(meter):
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
                self._classes[full] = opaque_class(full, ScriptObject)
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
        raise Unsupported(f"refers to a persistent object of kind {short(tag)}")
    kind, key, location, numel = pid[1], pid[2], pid[3], pid[4]
    view = pid[5] if len(pid) == 6 else None
    if not isinstance(kind, StorageType):
        raise Unsupported("names a storage whose type is not a torch storage class")
    if not isinstance(key, str) or not re.fullmatch(r"[A-Za-z0-9_]{1,64}", key):
        raise Unsupported(f"names a storage with an invalid key {short(key)}")
    if not isinstance(location, str) or len(location) > 64:
        raise Unsupported("names a storage with an invalid device")
    return kind, key, location, checked_int(numel, "a storage's numel"), view


__all__ = [
    "MAX_PICKLE_BYTES",
    "RestrictedUnpickler",
    "parse_storage_id",
    "restricted_load",
]
