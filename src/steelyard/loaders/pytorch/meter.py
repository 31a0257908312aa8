"""What one unpickle may spend, and the meter that counts it.

The memo lets a pickle of a few bytes refer to a large object again and again, so every cost
that an opcode's *argument* drives is metered, not just the pickle's length (see
``docs/safety.md``): opcodes that allocate a container or a memo entry count against
:data:`MAX_PICKLE_OBJECTS` (their weights are :data:`OPCODE_WEIGHTS`); a tuple's unfolded size
(what hashing or comparing it visits) is cached per tuple and capped at
:data:`MAX_TUPLE_ITEMS`; hashing keys and copying inputs in stand-ins (``set(list)``,
``bytearray(bytes)``) count against a work budget proportional to the pickle's size.

The unpickler makes its meter the current one (:func:`metering`) while it runs, so that the
stand-ins, which the pickle calls with no reference to the unpickler, can :func:`charge` it.
"""

from __future__ import annotations

import pickle
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

from steelyard.loaders.pytorch.stand_ins import Unsupported

#: Largest pickle steelyard unpickles, checked before a compressed pickle is inflated. torch
#: writes ~120 bytes per tensor of a state dict and ~345 per parameter of a training
#: checkpoint with Adam state (measured with torch 2.13: 10,000 tensors -> 1.2 MB data.pkl;
#: 2,000 parameters + Adam -> 0.69 MB), so 8 MiB holds ~70,000 tensors or ~24,000 parameters
#: with their optimizer state. The pure-Python unpickler runs ~1.5 MB/s on such pickles, so
#: the cap also bounds the time (~5 s) and the memory a pickle of one-byte opcodes can build.
MAX_PICKLE_BYTES = 8 * 2**20
#: Most allocating opcodes (containers, calls, memo entries; see ``OPCODE_WEIGHTS``) one pickle
#: may run: one-byte opcodes each building a 64-216 byte object would otherwise turn an 8 MiB
#: pickle into ~2 GiB. Real pickles use ~17 per tensor (state dict) or ~65 per parameter
#: (training checkpoint with Adam), so the byte cap binds first for them.
MAX_PICKLE_OBJECTS = 2_000_000
#: Largest unfolded size of a tuple (items, counting a memo-shared inner tuple at every place
#: it occurs): hashing or comparing a tuple visits them all, and CPython caches neither. A tuple
#: whose inner tuples are not shared never exceeds the pickle's byte count.
MAX_TUPLE_ITEMS = MAX_PICKLE_BYTES
#: Tuples nested deeper than this are refused (see the unpickler's module docstring).
MAX_TUPLE_DEPTH = 64


class Meter:
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


@contextmanager
def metering(meter: Meter) -> Iterator[None]:
    """Make ``meter`` the one :func:`charge` and :func:`charge_keys` spend from, in this thread."""
    previous = getattr(_local, "meter", None)
    _local.meter = meter
    try:
        yield
    finally:
        _local.meter = previous


def charge(units: int, what: str) -> None:
    """Spend ``units`` of the current unpickle's work budget (no-op outside an unpickle)."""
    meter: Meter | None = getattr(_local, "meter", None)
    if meter is not None:
        meter.charge(units, what)


def charge_keys(keys: Any, what: str) -> None:
    """Spend what hashing ``keys`` costs (see :meth:`Meter.key_cost`)."""
    meter: Meter | None = getattr(_local, "meter", None)
    if meter is not None:
        meter.charge(sum(meter.key_cost(k) for k in keys), what)


#: Opcodes that allocate a container, call a stand-in or add a memo entry (weight 1; sets,
#: 216 bytes empty, weigh 4). The others build at most a number or a string from their own
#: bytes, or push a reference.
OPCODE_WEIGHTS = [0] * 256
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
    OPCODE_WEIGHTS[_op[0]] = 1
for _op in (pickle.EMPTY_SET, pickle.FROZENSET):
    OPCODE_WEIGHTS[_op[0]] = 4
