"""Absolute resource budgets that every reader checks *before* it allocates or inflates.

Relative limits (a compression ratio, a nesting depth) stop the obvious bombs but not a file
of a megabyte that is honest about ratios and still claims gigabytes. A budget is absolute:
every allocation a reader makes on behalf of a file is compared with it first, from what the
file *claims* (shape × itemsize, a member's uncompressed size, a sparse tensor's dense size,
a fill value's extent, a folded constant's size), and refused with one clear line when it is
too large. Bytes that are stored in the file count against nothing: a 10 GB safetensors file
holds 10 GB of real weights and is read in row blocks. What is limited is *expansion*, bytes
that exist only after steelyard computed them, and structure (units, elements, time).

The budget in force is process-wide (:func:`current`, :func:`using`) because readers run deep
below the engine and on worker threads; the engine sets it once per run. Each checkpoint
accumulates its expansion in a :class:`Ledger` so that many small members cannot add up to a
large one.
"""

from __future__ import annotations

import math
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, fields, replace
from pathlib import Path

from steelyard.errors import LoadError, PolicyError

_GIB = 2**30
_MIB = 2**20


@dataclass(frozen=True)
class Budget:
    """Limits on what reading one checkpoint may cost. Defaults keep an audit's peak memory
    under 1 GiB beyond its largest stored tensor (measured by ``tests/hostile``)."""

    #: Bytes one object (a tensor, a zip member, a dataset) may occupy beyond what the file
    #: stores for it: inflated members, densified sparse tensors, fill values, folded
    #: constants, broadcast views.
    expansion_bytes: int = 512 * _MIB
    #: Expansion summed over one checkpoint (every member is inflated at most once).
    checkpoint_expansion_bytes: int = 2 * _GIB
    #: Elements one tensor may claim, stored or not (2^34: 32 GiB of bf16).
    tensor_elements: int = 2**34
    #: Units one layer may have; rules keep a few numbers per unit.
    layer_units: int = 2**25
    #: Seconds the structure of one checkpoint may take to read (the parts that cannot be
    #: bounded by construction: sandboxed HDF5 parsing, unpickling).
    load_seconds: float = 60.0

    def with_overrides(self, pairs: dict[str, object]) -> Budget:
        """A copy with ``pairs`` applied, validated against :data:`CEILINGS`."""
        known = {f.name: f for f in fields(self)}
        changes: dict[str, object] = {}
        for key, raw in pairs.items():
            name = key.replace("-", "_")
            if name not in known:
                raise PolicyError(f"unknown budget key {key!r}; known: {', '.join(KEYS)}")
            value = _number(key, raw, float if name == "load_seconds" else int)
            low, high = CEILINGS[name]
            if not low <= value <= high:
                raise PolicyError(f"budget {key} = {raw} is outside [{low:g}, {high:g}]")
            changes[name] = value
        return replace(self, **changes)  # type: ignore[arg-type]


#: Accepted range of each budget key: a budget can be loosened, but not switched off.
CEILINGS: dict[str, tuple[float, float]] = {
    "expansion_bytes": (_MIB, 64 * _GIB),
    "checkpoint_expansion_bytes": (_MIB, 256 * _GIB),
    "tensor_elements": (1, 2**40),
    "layer_units": (1, 2**32),
    "load_seconds": (1.0, 3600.0),
}

KEYS = tuple(name.replace("_", "-") for name in CEILINGS)


def _number(key: str, raw: object, kind: type[int] | type[float]) -> int | float:
    if isinstance(raw, bool) or not isinstance(raw, (int, float, str)):
        raise PolicyError(f"budget {key} must be a number, not {type(raw).__name__}")
    text = str(raw).strip()
    if len(text) > 32:
        raise PolicyError(f"budget {key} is too long to be a number")
    units = {"k": 2**10, "m": _MIB, "g": _GIB, "t": 2**40}
    factor = 1
    lowered = text.lower().removesuffix("ib").removesuffix("b")
    if lowered and lowered[-1] in units and kind is int:
        factor, lowered = units[lowered[-1]], lowered[:-1]
    try:
        value = float(lowered) * factor
    except ValueError:
        raise PolicyError(f"budget {key} = {raw!r} is not a number") from None
    if not math.isfinite(value):  # NaN, inf, 1e400
        raise PolicyError(f"budget {key} = {raw!r} is not a finite number")
    return int(value) if kind is int else value


_lock = threading.Lock()
_active = Budget()


def current() -> Budget:
    """The budget in force."""
    return _active


@contextmanager
def using(budget: Budget) -> Iterator[Budget]:
    """Run a block under ``budget`` (process-wide; restored afterwards)."""
    global _active
    with _lock:
        previous, _active = _active, budget
    try:
        yield budget
    finally:
        with _lock:
            _active = previous


def _size(nbytes: int) -> str:
    for unit, scale in (("GiB", _GIB), ("MiB", _MIB), ("KiB", 2**10)):
        if nbytes >= scale:
            return f"{nbytes / scale:,.1f} {unit}"
    return f"{nbytes:,} bytes"


def check_expansion(path: str | Path, claimed: int, stored: int, what: str) -> None:
    """Refuse ``what`` when it would occupy ``claimed`` bytes of which only ``stored`` are in
    the file, and the difference exceeds the per-object expansion budget."""
    limit = current().expansion_bytes
    if claimed < 0:
        raise LoadError(path, f"{what} claims a negative size")
    if claimed - max(stored, 0) > limit:
        raise LoadError(
            path,
            f"{what} would expand to {_size(claimed)} from {_size(max(stored, 0))} stored, "
            f"beyond the {_size(limit)} expansion budget (raise it with --budget "
            "expansion-bytes=... if the file is trusted)",
        )


def check_elements(path: str | Path, shape: tuple[int, ...], what: str) -> int:
    """The element count of ``shape``, refused above the per-tensor element budget.

    Computed with Python integers so that a lying shape cannot overflow to a small number.
    """
    count = 1
    for dim in shape:
        if dim < 0:
            raise LoadError(path, f"{what} has a negative dimension in {list(shape)}")
        count *= dim
    limit = current().tensor_elements
    if count > limit:
        raise LoadError(
            path, f"{what} claims {count:,} elements, more than the {limit:,} element budget"
        )
    return count


def check_units(path: str | Path, units: int, what: str) -> None:
    """Refuse a layer with more units than the budget allows (rules keep numbers per unit)."""
    limit = current().layer_units
    if units > limit:
        raise LoadError(path, f"{what} claims {units:,} units, more than the {limit:,} unit budget")


class Ledger:
    """Expansion spent on one checkpoint, and the time its reading started.

    Thread-safe: lazily read tensors charge it from worker threads.
    """

    def __init__(self, path: str | Path) -> None:
        self.path = str(path)
        self.spent = 0
        self.started = time.monotonic()
        self._lock = threading.Lock()

    def charge(self, nbytes: int, what: str) -> None:
        """Add ``nbytes`` of expansion for ``what``; refuse past the checkpoint budget."""
        limit = current().checkpoint_expansion_bytes
        with self._lock:
            if self.spent + nbytes > limit:
                raise LoadError(
                    self.path,
                    f"{what} would bring the bytes inflated for this checkpoint to "
                    f"{_size(self.spent + nbytes)}, beyond the {_size(limit)} budget",
                )
            self.spent += nbytes

    def check_time(self, what: str) -> None:
        """Refuse once reading the checkpoint's structure has taken longer than the budget."""
        limit = current().load_seconds
        if time.monotonic() - self.started > limit:
            raise LoadError(
                self.path, f"reading {what} took longer than the {limit:g} s time budget"
            )


__all__ = [
    "CEILINGS",
    "KEYS",
    "Budget",
    "Ledger",
    "check_elements",
    "check_expansion",
    "check_units",
    "current",
    "using",
]
