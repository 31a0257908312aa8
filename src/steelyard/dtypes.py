"""Decoding stored numeric types to numpy, including bf16 and fp8 via ml_dtypes.

Every analysis runs in float32; the stored dtype name is kept for reports.
"""

from __future__ import annotations

from typing import Final

import ml_dtypes
import numpy as np

#: Canonical short names used in reports, keyed by numpy dtype.
FLOAT_DTYPES: Final[dict[str, np.dtype[np.generic]]] = {
    "f64": np.dtype(np.float64),
    "f32": np.dtype(np.float32),
    "f16": np.dtype(np.float16),
    "bf16": np.dtype(ml_dtypes.bfloat16),
    "f8_e4m3": np.dtype(ml_dtypes.float8_e4m3fn),
    "f8_e5m2": np.dtype(ml_dtypes.float8_e5m2),
    "f8_e4m3fnuz": np.dtype(ml_dtypes.float8_e4m3fnuz),
    "f8_e5m2fnuz": np.dtype(ml_dtypes.float8_e5m2fnuz),
}

INT_DTYPES: Final[dict[str, np.dtype[np.generic]]] = {
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

ALL_DTYPES: Final[dict[str, np.dtype[np.generic]]] = {**FLOAT_DTYPES, **INT_DTYPES}


def is_float_name(name: str) -> bool:
    """True for a stored floating-point dtype name (as in :data:`FLOAT_DTYPES`)."""
    return name in FLOAT_DTYPES


def name_of(dtype: np.dtype[np.generic]) -> str:
    """Short name of a numpy dtype (byte order ignored); ``"other"`` when unknown."""
    base = dtype.newbyteorder("=") if dtype.byteorder not in ("=", "|") else dtype
    for key, value in ALL_DTYPES.items():
        if base == value:
            return key
    if dtype.kind == "c":
        return "c64" if dtype.itemsize == 8 else "c128"
    return "other"


def to_float32(array: np.ndarray) -> np.ndarray:
    """Return ``array`` as float32 (a copy only when the dtype differs)."""
    if array.dtype == np.float32:
        return array
    return array.astype(np.float32)
