"""Decoding stored numeric types to numpy, including bf16 and fp8 via ml_dtypes.

Every analysis runs in float32; the stored dtype name is kept for reports.
"""

from __future__ import annotations

import sys
from collections.abc import Iterator, Mapping
from typing import Final

import numpy as np

_IEEE: Final[dict[str, np.dtype[np.generic]]] = {
    "f64": np.dtype(np.float64),
    "f32": np.dtype(np.float32),
    "f16": np.dtype(np.float16),
}
#: Our names of the extended floats → their type names in ``ml_dtypes``.
_EXTENDED: Final[dict[str, str]] = {
    "bf16": "bfloat16",
    "f8_e4m3": "float8_e4m3fn",
    "f8_e5m2": "float8_e5m2",
    "f8_e4m3fnuz": "float8_e4m3fnuz",
    "f8_e5m2fnuz": "float8_e5m2fnuz",
}


#: Bytes per element of every stored float dtype name, known without importing ml_dtypes.
FLOAT_ITEMSIZE: Final[dict[str, int]] = {
    "f64": 8,
    "f32": 4,
    "f16": 2,
    "bf16": 2,
    "f8_e4m3": 1,
    "f8_e5m2": 1,
    "f8_e4m3fnuz": 1,
    "f8_e5m2fnuz": 1,
}


class _ExtendedFloats(Mapping[str, "np.dtype[np.generic]"]):
    """The float dtypes, built on first use: bf16 and fp8 come from ``ml_dtypes``, whose
    import costs about a second, so commands that read no such file (``--version``,
    ``rules``, a float32 model) never pay for it."""

    def __init__(self) -> None:
        self._table: dict[str, np.dtype[np.generic]] | None = None

    def _built(self) -> dict[str, np.dtype[np.generic]]:
        if self._table is None:
            import ml_dtypes

            extended = {name: np.dtype(getattr(ml_dtypes, t)) for name, t in _EXTENDED.items()}
            self._table = {**_IEEE, **extended}
        return self._table

    def __getitem__(self, key: str) -> np.dtype[np.generic]:
        # The IEEE types need no ml_dtypes: a float32 file never imports it.
        plain = _IEEE.get(key)
        return plain if plain is not None else self._built()[key]

    def __contains__(self, key: object) -> bool:
        return key in _IEEE or key in _EXTENDED

    def __iter__(self) -> Iterator[str]:
        return iter(self._built())

    def __len__(self) -> int:
        return len(self._built())


class _Joined(Mapping[str, "np.dtype[np.generic]"]):
    """Two dtype tables read as one, without building the lazy one before it is used."""

    def __init__(self, *parts: Mapping[str, np.dtype[np.generic]]) -> None:
        self._parts = parts

    def __getitem__(self, key: str) -> np.dtype[np.generic]:
        for part in self._parts:
            if key in part:
                return part[key]
        raise KeyError(key)

    def __iter__(self) -> Iterator[str]:
        for part in self._parts:
            yield from part

    def __len__(self) -> int:
        return sum(len(part) for part in self._parts)


#: Canonical short names used in reports, keyed by numpy dtype.
FLOAT_DTYPES: Final[Mapping[str, np.dtype[np.generic]]] = _ExtendedFloats()

INT_DTYPES: Final[Mapping[str, np.dtype[np.generic]]] = {
    "bool": np.dtype(np.bool_),
    "u8": np.dtype(np.uint8),
    "i8": np.dtype(np.int8),
    "u16": np.dtype(np.uint16),
    "i16": np.dtype(np.int16),
    "u32": np.dtype(np.uint32),
    "i32": np.dtype(np.int32),
    "u64": np.dtype(np.uint64),
    "i64": np.dtype(np.int64),
}

ALL_DTYPES: Final[Mapping[str, np.dtype[np.generic]]] = _Joined(FLOAT_DTYPES, INT_DTYPES)


def itemsize_of(name: str) -> int:
    """Bytes per element of a stored dtype name (without importing ml_dtypes for bf16/fp8)."""
    size = FLOAT_ITEMSIZE.get(name)
    return size if size is not None else ALL_DTYPES[name].itemsize


def is_float_name(name: str) -> bool:
    """True for a stored floating-point dtype name (as in :data:`FLOAT_DTYPES`)."""
    return name in FLOAT_DTYPES


def name_of(dtype: np.dtype[np.generic]) -> str:
    """Short name of a numpy dtype (byte order ignored); ``"other"`` when unknown.

    The IEEE and integer tables are searched first; the extended floats only for a dtype of
    kind ``"V"`` (what ml_dtypes' types are) and only when ml_dtypes is already imported,
    since no such dtype can exist before. Naming a float32 array thus never imports ml_dtypes,
    whose import costs about a second (docs/performance.md, Start-up).
    """
    base = dtype.newbyteorder("=") if dtype.byteorder not in ("=", "|") else dtype
    for table in (_IEEE, INT_DTYPES):
        for key, value in table.items():
            if base == value:
                return key
    if dtype.kind == "V" and "ml_dtypes" in sys.modules:
        for key, value in FLOAT_DTYPES.items():
            if base == value:
                return key
    if dtype.kind == "c":
        return "c64" if dtype.itemsize == 8 else "c128"
    return "other"


def to_float32(array: np.ndarray) -> np.ndarray:
    """Return ``array`` as float32 (a copy only when the dtype differs)."""
    if array.dtype == np.float32:
        return array
    with np.errstate(over="ignore"):  # beyond float32: ±Inf, counted as such by nonfinite
        return array.astype(np.float32)
