"""bitsandbytes layouts: 4-bit NF4/FP4 with block absmax (optionally double-quantized) and
8-bit LLM.int8 with per-row scales.

**4-bit** (as bitsandbytes' ``QuantState.as_dict(packed=True)`` serializes it; read from its
published source): ``<m>.weight`` is uint8 holding the flattened ``[out, in]`` weight two codes
per byte, *high nibble first* (``byte = q[2k] << 4 | q[2k+1]``); ``<m>.weight.absmax`` has one
scale per ``blocksize`` consecutive flattened elements; ``<m>.weight.quant_map`` is the 16-entry
code table; ``<m>.weight.quant_state.bitsandbytes__<nf4|fp4>`` is a uint8 tensor holding the
UTF-8 JSON of the non-tensor fields (``quant_type``, ``blocksize``, ``dtype``, ``shape``, and
with double quantization ``nested_blocksize``, ``nested_dtype``, ``nested_offset``). Double
quantization stores ``absmax`` itself as uint8 codes of an 8-bit blockwise quantization:
``absmax[b] = nested_quant_map[code[b]] * nested_absmax[b // nested_blocksize] + nested_offset``.
Inference computes ``W.flat[i] = table[q[i]] * absmax[i // blocksize]`` with the kernel's
built-in table for the quant type (not the stored map, which is checked against it).

**8-bit** (``Linear8bitLt``): ``<m>.weight`` int8 ``[out, in]`` and ``<m>.SCB`` float ``[out]``,
the absmax of each row; ``W[o, i] = q[o, i] * SCB[o] / 127`` (the vector-wise quantization of
Dettmers et al. 2022, "LLM.int8()"). ``<m>.weight_format`` other than 0 (row-major) names a
GPU tile layout and is refused.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from steelyard.budget import check_elements
from steelyard.errors import LoadError
from steelyard.loaders.base import parse_json
from steelyard.loaders.packed.stored import Part
from steelyard.loaders.packed.unpacked import UnpackedWeight, part_size

#: NF4 code values as listed in the QLoRA paper (Dettmers et al. 2023, "QLoRA: Efficient
#: Finetuning of Quantized LLMs", arXiv 2305.14314, Appendix E; recalled from memory) and,
#: checked digit by digit, in bitsandbytes' published CPU backend table ``_NF4_QUANT_TABLE``.
NF4 = np.array(
    [
        -1.0, -0.6961928009986877, -0.5250730514526367, -0.39491748809814453,
        -0.28444138169288635, -0.18477343022823334, -0.09105003625154495, 0.0,
        0.07958029955625534, 0.16093020141124725, 0.24611230194568634, 0.33791524171829224,
        0.44070982933044434, 0.5626170039176941, 0.7229568362236023, 1.0,
    ],
    dtype=np.float32,
)
#: bitsandbytes' FP4 (e2m1 with its own code order, sign in bit 3), normalised so the largest
#: magnitude is 1: the values of its CUDA decoder ``dDequantizeFP4Tree`` (recalled from memory:
#: 1/192, 2/3, 1/3, 1/6); the published CPU table rounds 1/192 to 0.0052.
FP4 = np.array(
    [0.0, 1 / 192, 2 / 3, 1.0, 1 / 3, 0.5, 1 / 6, 0.25,
     -0.0, -1 / 192, -2 / 3, -1.0, -1 / 3, -0.5, -1 / 6, -0.25],
    dtype=np.float32,
)
TABLES = {"nf4": NF4, "fp4": FP4}
#: The packed quant-state JSON is a few hundred bytes; anything longer is not one.
_STATE_BYTES = 65536


def quant_state(path: Path, name: str, stored: Part) -> dict[str, Any]:
    """The JSON object packed into a ``quant_state.bitsandbytes__*`` uint8 tensor."""
    if stored.ndim != 1 or stored.shape[0] > _STATE_BYTES:
        raise LoadError(path, f"{name}: bitsandbytes quant_state is not a short byte vector")
    raw = np.asarray(stored).astype(np.uint8).tobytes()
    state = parse_json(raw, path, f"{name} quant_state")
    if not isinstance(state, dict):
        raise LoadError(path, f"{name}: bitsandbytes quant_state is not a JSON object")
    return state


def _positive(path: Path, name: str, state: Mapping[str, Any], key: str) -> int:
    value = state.get(key)
    if isinstance(value, bool) or not isinstance(value, int) or value <= 0:
        raise LoadError(path, f"{name}: bitsandbytes {key} {value!r} is not a positive integer")
    return value


@dataclass(frozen=True)
class Bnb4Weight:
    """One 4-bit bitsandbytes weight, checked, with float rows on demand."""

    path: Path
    name: str
    packed: Part
    absmax: Part
    table: np.ndarray
    quant_type: str
    blocksize: int
    dims: tuple[int, int]
    nested: tuple[Part, np.ndarray, int, float] | None
    """Double quantization: (nested absmax, nested code map, nested block size, offset)."""

    @classmethod
    def build(cls, path: Path, name: str, parts: Mapping[str, Part]) -> Bnb4Weight:
        """Check the parts and the quant state against each other; lies are LoadErrors."""
        keys = [k for k in parts if k.startswith("quant_state.bitsandbytes__")]
        if len(keys) != 1 or "weight" not in parts or "absmax" not in parts:
            raise LoadError(path, f"{name}: bitsandbytes 4-bit needs weight, absmax and one "
                            "quant_state")
        state = quant_state(path, name, parts[keys[0]])
        quant_type = state.get("quant_type")
        if quant_type not in TABLES or keys[0] != f"quant_state.bitsandbytes__{quant_type}":
            raise LoadError(path, f"{name}: bitsandbytes quant type {quant_type!r} is not nf4/fp4")
        blocksize = _positive(path, name, state, "blocksize")
        shape = state.get("shape")
        if not (isinstance(shape, list) and len(shape) == 2 and all(
                isinstance(d, int) and not isinstance(d, bool) and d > 0 for d in shape)):
            raise LoadError(path, f"{name}: bitsandbytes shape {shape!r} is not [out, in]")
        dims = (shape[0], shape[1])
        n = check_elements(path, dims, f"{name} (dequantized)")
        packed = parts["weight"]
        if packed.ndim not in (1, 2) or (packed.ndim == 2 and packed.shape[1] != 1):
            raise LoadError(path, f"{name}: bitsandbytes packed weight {list(packed.shape)} is not "
                            "a column of bytes")
        if parts["absmax"].ndim != 1:
            raise LoadError(path, f"{name}: bitsandbytes 4-bit needs a 1-D absmax")
        # quant_storage other than uint8 (bf16, fp16, fp32 for sharded training) holds the
        # same bytes viewed as wider elements.
        stored_bytes = part_size(packed) * packed.dtype.itemsize
        if stored_bytes != -(-n // 2):
            raise LoadError(path, f"{name}: bitsandbytes packed weight holds "
                            f"{2 * stored_bytes} codes, not the {n} of {list(dims)}")
        blocks = -(-n // blocksize)
        absmax = parts["absmax"]
        if part_size(absmax) != blocks:
            raise LoadError(path, f"{name}: bitsandbytes absmax has {part_size(absmax)} entries, "
                            f"not one per {blocksize}-element block ({blocks})")
        table = TABLES[quant_type]
        if "quant_map" in parts:
            if part_size(parts["quant_map"]) != 16:  # checked before reading
                raise LoadError(path, f"{name}: bitsandbytes quant_map does not have 16 codes")
            stored = np.asarray(parts["quant_map"], dtype=np.float32).reshape(-1)
            if not np.allclose(stored, table, atol=1e-3):
                raise LoadError(path, f"{name}: bitsandbytes quant_map is not the {quant_type} "
                                "table")
        nested = cls._nested(path, name, parts, state, blocks)
        return cls(path, name, parts["weight"], absmax, table, quant_type, blocksize, dims, nested)

    @staticmethod
    def _nested(
        path: Path, name: str, parts: Mapping[str, Part], state: Mapping[str, Any], blocks: int
    ) -> tuple[Part, np.ndarray, int, float] | None:
        if "nested_absmax" not in parts:
            if parts["absmax"].dtype.kind != "f":
                raise LoadError(path, f"{name}: bitsandbytes absmax is integer without the "
                                "nested quantization state")
            return None
        nested_block = _positive(path, name, state, "nested_blocksize")
        offset = state.get("nested_offset")
        if isinstance(offset, bool) or not isinstance(offset, (int, float)) or not np.isfinite(
                offset):
            raise LoadError(path, f"{name}: bitsandbytes nested_offset {offset!r} is not a number")
        if parts["absmax"].dtype != np.uint8 or "nested_quant_map" not in parts:
            raise LoadError(path, f"{name}: double-quantized absmax needs uint8 codes and a "
                            "nested_quant_map")
        nested_absmax = parts["nested_absmax"]
        if (part_size(parts["nested_quant_map"]) != 256
                or part_size(nested_absmax) != -(-blocks // nested_block)):
            raise LoadError(path, f"{name}: bitsandbytes nested absmax/quant_map sizes do not "
                            f"match {blocks} blocks of {nested_block}")
        code = np.asarray(parts["nested_quant_map"], dtype=np.float32).reshape(-1)
        return nested_absmax, code, nested_block, float(offset)

    @property
    def shape(self) -> tuple[int, int]:
        """Canonical ``[out, in]`` shape."""
        return self.dims

    @property
    def stored_type(self) -> str:
        """What was stored, for reports (``bnb-nf4``, ``bnb-fp4-dq`` when double-quantized)."""
        return f"bnb-{self.quant_type}" + ("-dq" if self.nested else "")

    def _scales(self, first: int, last: int) -> np.ndarray:
        """Float absmax of blocks ``[first, last)``."""
        raw = self.absmax
        if self.nested is None:
            return np.asarray(raw[first:last], dtype=np.float32)
        nested_absmax, code, nested_block, offset = self.nested
        codes = np.asarray(raw[first:last]).astype(np.intp)
        outer = np.asarray(nested_absmax).reshape(-1).astype(np.float32)
        which = np.arange(first, last) // nested_block
        return code[codes] * outer[which] + np.float32(offset)

    def _codes(self, s0: int, s1: int) -> np.ndarray:
        """4-bit codes of flattened elements ``[s0, s1)``, high nibble first in each byte."""
        b0, b1 = s0 // 2, -(-s1 // 2)
        width = self.packed.dtype.itemsize
        i0, i1 = b0 // width, -(-b1 // width)
        words = np.ascontiguousarray(np.asarray(self.packed[i0:i1])).reshape(-1)
        raw = words.view(np.uint8)[b0 - i0 * width : b1 - i0 * width]
        codes = np.empty(2 * raw.size, dtype=np.uint8)
        codes[0::2] = raw >> 4
        codes[1::2] = raw & 0x0F
        return codes[s0 - 2 * b0 : s1 - 2 * b0]

    def rows(self, start: int, stop: int) -> np.ndarray:
        """Dequantized float32 rows ``[start, stop)``: the whole absmax blocks covering them
        are decoded (at most two blocks more) so each block's scale is one broadcast."""
        n_in = self.dims[1]
        e0, e1 = start * n_in, stop * n_in
        if e1 <= e0:
            return np.empty((max(0, stop - start), n_in), dtype=np.float32)
        size, first = self.dims[0] * n_in, e0 // self.blocksize
        last = -(-e1 // self.blocksize)
        s0, s1 = first * self.blocksize, min(size, last * self.blocksize)
        values = np.take(self.table, self._codes(s0, s1))
        scales = self._scales(first, last)
        whole = (s1 - s0) // self.blocksize
        blocks = values[: whole * self.blocksize].reshape(whole, self.blocksize)
        blocks *= scales[:whole, None]
        if whole < last - first:  # the tensor's last block is short
            values[whole * self.blocksize :] *= scales[-1]
        return values[e0 - s0 : e1 - s0].reshape(stop - start, n_in)


@dataclass(frozen=True)
class Bnb8Weight(UnpackedWeight):
    """One LLM.int8 weight ``[out, in]`` with its row scales."""

    scb: np.ndarray

    @classmethod
    def build(cls, path: Path, name: str, parts: Mapping[str, Part]) -> Bnb8Weight:
        """Check the int8 weight against its row scales."""
        weight = parts.get("weight")
        if weight is None or weight.ndim != 2 or weight.dtype != np.int8:
            raise LoadError(path, f"{name}: LLM.int8 needs a 2-D int8 weight")
        n_out = weight.shape[0]
        check_elements(path, weight.shape, f"{name} (dequantized)")
        scb = parts["SCB"]
        if part_size(scb) != n_out or scb.ndim not in (1, 2):
            raise LoadError(path, f"{name}: LLM.int8 SCB has {part_size(scb)} scales for {n_out} rows")
        if "weight_format" in parts:
            fmt = np.asarray(parts["weight_format"]).reshape(-1)
            if fmt.size != 1 or int(fmt[0]) != 0:
                raise LoadError(path, f"{name}: LLM.int8 weight_format {fmt.tolist()} is a GPU "
                                "tile layout, not row-major")
        scales = np.asarray(scb, dtype=np.float32).reshape(n_out)
        return cls(path, name, weight, scales)

    @property
    def stored_type(self) -> str:
        """What was stored, for reports."""
        return "bnb-int8"

    def rows(self, start: int, stop: int) -> np.ndarray:
        """Dequantized float32 rows ``[start, stop)``."""
        return self.codes(start, stop) * (self.scb[start:stop, None] / np.float32(127))
