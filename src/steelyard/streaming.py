"""Reading tensors in bounded blocks and converting them to float32 one chunk at a time.

A bf16 tensor converted in one go needs its stored bytes and its float32 copy in memory at
once (three times the stored size); converted chunk by chunk into a preallocated float32
array it needs the float32 copy plus one chunk. The helpers here are what loaders and
:class:`~steelyard.stats.LayerStats` use to keep peak memory near the largest block.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator

import numpy as np

#: Float32 bytes converted per chunk (and the default row-block size of streamed passes).
CHUNK_BYTES = 16 * 2**20


def convert_into(source: np.ndarray, out: np.ndarray) -> None:
    """Write ``source`` converted to float32 into ``out`` (same element count), exactly.

    bf16 is the upper half of an IEEE float32, so widening is a 16-bit shift of the bit
    pattern (NaN payloads and infinities included); that is several times faster than a
    generic cast and releases the GIL. float16 is widened from its bit patterns too
    (:func:`widen_f16_bits`), and float8 e4m3fn and e5m2 likewise (:func:`widen_fp8_bits`);
    every other dtype goes through numpy's cast.
    """
    flat_out = out.reshape(-1)
    flat_in = source.reshape(-1)
    native = flat_in.dtype.byteorder in ("=", "|", "<")
    if flat_in.dtype.name == "bfloat16" and native:
        widen_bf16_bits(flat_in.view(np.uint16), flat_out)
    elif flat_in.dtype == np.float16 and native:
        widen_f16_bits(flat_in.view(np.uint16), flat_out)
    elif flat_in.dtype.name in _FP8:
        widen_fp8_bits(flat_in.view(np.uint8), flat_out, flat_in.dtype.name)
    else:
        # float64 beyond the float32 range becomes ±Inf, as the non-finite counts judge it
        with np.errstate(over="ignore"):
            flat_out[...] = flat_in


def widen_bf16_bits(bits: np.ndarray, out: np.ndarray) -> None:
    """Write the bf16 values whose bit patterns are ``bits`` (native uint16) into the float32
    array ``out`` (same element count): each pattern is the upper half of the float32's.

    One ``left_shift`` with the uint32 loop and ``out`` given: numpy casts the patterns in
    cache-sized buffers, so the float32 words are written once. A copy into the words then
    a shift of them in place passes twice over them, which costs more as soon as they leave
    the cache: 0.36 against 0.25 ns a value at 590k values, 0.48 against 0.25 at 4M, 1.78
    against 0.40 at 16M (one thread, docs/performance.md, "Fourteenth session"); below
    ``_SHIFT_IN_PLACE`` values the two passes stay in the cache and are a little faster."""
    words = out.reshape(-1).view(np.uint32)
    flat = bits.reshape(-1)
    if flat.size < _SHIFT_IN_PLACE:
        np.copyto(words, flat, casting="safe")
        np.left_shift(words, 16, out=words)
    else:
        np.left_shift(flat, 16, out=words, dtype=np.uint32)


#: Fewer bf16 values than this are widened by a copy and a shift in place (0.19 against
#: 0.23 ns a value at 65,536).
_SHIFT_IN_PLACE = 2**17


#: Keeps the sign bit and the 15 magnitude bits of a float16 pattern shifted into place.
_F16_KEEP = np.uint32(0x8FFFE000).view(np.int32)
#: 2^(127 − 15): moves a float16 exponent to float32's bias.
_F16_REBIAS = np.float32(2.0**112)
#: Bits of float32's all-ones exponent (Inf and NaN).
_F32_TOP = np.int32(0x7F800000)
#: Values widened per block (1 MiB of float32).
_F16_BLOCK = 2**18


def widen_f16_bits(bits: np.ndarray, out: np.ndarray) -> None:
    """Write the IEEE binary16 values whose bit patterns are ``bits`` (native uint16) into
    the float32 array ``out`` (same element count), bit for bit as numpy's cast.

    The pattern, sign-extended to 32 bits and shifted left by 13, puts the sign in float32's
    sign bit and the 15 magnitude bits under float32's exponent and mantissa; read as a
    float32 that is the value times 2^-112, subnormals included, so one multiplication by
    2^112 (exact: a power of two) finishes it. Inf and NaN (exponent all ones) come out as
    ±2^16·(1 + m/1024), beyond every finite float16 (65504), and get float32's all-ones
    exponent back, payload kept. Three passes of plain integer and float arithmetic (the
    sign extension and the shift in one, as in :func:`widen_bf16_bits`) and two reductions
    over cache-sized blocks: 1.3 against numpy's 1.7 ns per value into freshly allocated
    arrays (8 × 4M values, one thread), 1.35 against 1.52 s for the 543M values of an fp16
    checkpoint inside the audit, where memory traffic outside the cache (the stored bytes,
    the first writes to each layer matrix) takes the rest; with the shift in one pass 0.50
    against 0.69 ns per value into a warm 4M-value array (numpy 0.85). Checked on all
    65,536 patterns against numpy in the tests."""
    words = out.reshape(-1).view(np.int32)
    signed = bits.reshape(-1).view(np.int16)
    special = _shifted_into(signed, out, 13, _F16_KEEP, _F16_REBIAS, 65536.0)
    words[special] |= _F32_TOP


def _shifted_into(
    signed: np.ndarray, out: np.ndarray, shift: int, keep: np.int32, factor: np.float32,
    special_at: float,
) -> np.ndarray:
    """The shared steps of :func:`widen_f16_bits` and :func:`widen_fp8_bits`: each pattern
    (``signed``: int16 or int8, sign-extended by the shift's int32 loop) shifted left by
    ``shift``, only the bits of ``keep`` kept, times ``factor``, into the float32 ``out``.
    Returns the flat positions of the patterns whose exponent bits are all ones (magnitude
    ``special_at`` or more), which the caller finishes; empty when there are none."""
    flat = out.reshape(-1)
    words = flat.view(np.int32)
    special = False
    # In blocks of 1 MiB of float32, so that every pass after the first reads the cache.
    for start in range(0, signed.size, _F16_BLOCK):
        stop = min(signed.size, start + _F16_BLOCK)
        part, values = words[start:stop], flat[start:stop]
        np.left_shift(signed[start:stop], shift, out=part, dtype=np.int32)  # one pass, as bf16
        np.bitwise_and(part, keep, out=part)
        np.multiply(values, factor, out=values)
        special = special or bool(values.max() >= special_at or values.min() <= -special_at)
    if not special:
        return np.empty(0, dtype=np.intp)
    return np.flatnonzero(np.abs(flat) >= special_at)


#: float8 e4m3fn and e5m2, as for float16: the 7 magnitude bits shifted under float32's
#: exponent and mantissa read as the value times 2^-120 (2^-112), so one exact multiplication
#: finishes it; magnitudes from ``special`` up are the patterns whose exponent bits are all
#: ones. (shift, bits kept, factor, special)
_FP8 = {
    "float8_e4m3fn": (20, np.uint32(0x87F00000).view(np.int32), np.float32(2.0**120), 480.0),
    "float8_e5m2": (21, np.uint32(0x8FE00000).view(np.int32), np.float32(2.0**112), 65536.0),
}
_SIGN = np.uint32(0x80000000).view(np.int32)
_QUIET_NAN = np.int32(0x7FC00000)
_MANTISSA = np.int32(0x007FFFFF)


def widen_fp8_bits(bits: np.ndarray, out: np.ndarray, dtype_name: str) -> None:
    """Write the float8 values (``float8_e4m3fn`` or ``float8_e5m2``, ml_dtypes' names) whose
    bit patterns are ``bits`` (uint8) into the float32 array ``out``, bit for bit as ml_dtypes
    casts them, by :func:`widen_f16_bits`' method: 0.7-1.2 against 4.9-5.1 ns a value for
    ml_dtypes' cast (4M values, one thread). e5m2's ±Inf (``0x7C``) keeps its sign; every NaN
    pattern becomes the quiet NaN of its sign, as ml_dtypes makes it (e4m3fn has no Inf, and
    its only NaN patterns are ``0x7F``/``0xFF``). Checked on all 256 patterns of each."""
    shift, keep, factor, special_at = _FP8[dtype_name]
    words = out.reshape(-1).view(np.int32)
    where = _shifted_into(bits.reshape(-1).view(np.int8), out, shift, keep, factor, special_at)
    if where.size:
        found = words[where]
        infinite = (found & _MANTISSA) == 0 if dtype_name == "float8_e5m2" else False
        words[where] = np.where(infinite, found | _F32_TOP, (found & _SIGN) | _QUIET_NAN)


def float32_from_parts(
    widen: Callable[[int, int, np.ndarray], None], shape: tuple[int, ...]
) -> np.ndarray:
    """The whole tensor as float32, ``widen(start, stop, into)`` filling one chunk at a time."""
    out = np.empty(shape, dtype=np.float32)
    flat = out.reshape(-1)
    for start, stop in chunks(flat.size):
        widen(start, stop, flat[start:stop])
    return out


def chunks(size: int, chunk_elements: int | None = None) -> Iterator[tuple[int, int]]:
    """``(start, stop)`` element ranges of at most ``chunk_elements`` (default: one
    :data:`CHUNK_BYTES` of float32) covering ``size``."""
    step = max(1, chunk_elements if chunk_elements is not None else CHUNK_BYTES // 4)
    for start in range(0, size, step):
        yield start, min(size, start + step)


def row_blocks(
    rows: int, row_elements: int, block_bytes: int | None = None
) -> Iterator[tuple[int, int]]:
    """``(start, stop)`` row ranges whose float32 size stays near ``block_bytes`` (default
    :data:`CHUNK_BYTES`), at least one row each."""
    budget = block_bytes if block_bytes is not None else CHUNK_BYTES
    per_block = max(1, budget // max(1, 4 * row_elements))
    for start in range(0, rows, per_block):
        yield start, min(rows, start + per_block)
