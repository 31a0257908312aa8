"""safetensors files, single or sharded, parsed and read without the package.

We parse the header ourselves because the package's numpy backend cannot read FP8 (one FP8
tensor breaks the whole file) and needs ``ml_dtypes`` imported for BF16. Every claim of the
header is checked against the file before any byte is viewed.
"""

from __future__ import annotations

import math
import struct
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from steelyard.dtypes import ALL_DTYPES, FLOAT_DTYPES, itemsize_of
from steelyard.errors import LoadError
from steelyard.graph import Checkpoint, Format, Tensor
from steelyard.loaders.base import MAX_METADATA_BYTES, file_size, inside, parse_json, read_exactly
from steelyard.loaders.conventions import inferred_checkpoint, role_for
from steelyard.loaders.signatures import safetensors_head

#: safetensors dtype tag → our short name.
_DTYPES: dict[str, str] = {
    "F64": "f64",
    "F32": "f32",
    "F16": "f16",
    "BF16": "bf16",
    "F8_E4M3": "f8_e4m3",
    "F8_E5M2": "f8_e5m2",
    "F8_E4M3FNUZ": "f8_e4m3fnuz",
    "F8_E5M2FNUZ": "f8_e5m2fnuz",
    "BOOL": "bool",
    "U8": "u8",
    "I8": "i8",
    "U16": "u16",
    "I16": "i16",
    "U32": "u32",
    "I32": "i32",
    "U64": "u64",
    "I64": "i64",
}

_INDEX_SUFFIX = ".safetensors.index.json"


class _Shard:
    """One safetensors file: validated header plus a lazily opened memory map."""

    def __init__(self, path: Path) -> None:
        self.path = path
        self.size = file_size(path)
        if self.size < 8:
            raise LoadError(path, f"is {self.size} bytes long, too short for a safetensors header")
        with open(path, "rb") as handle:
            (length,) = struct.unpack("<Q", handle.read(8))
            if length > MAX_METADATA_BYTES:
                raise LoadError(path, f"header claims {length} bytes, more than the 100 MB cap")
            if 8 + length > self.size:
                raise LoadError(path, f"header claims {length} bytes but the file has {self.size}")
            raw = handle.read(length)
        header = parse_json(raw, path, "header")
        if not isinstance(header, dict):
            raise LoadError(path, "header is not a JSON object")
        self.data_start = 8 + length
        self.metadata: dict[str, str] = {}
        meta = header.pop("__metadata__", None)
        if meta is not None:
            if not isinstance(meta, dict) or not all(
                isinstance(k, str) and isinstance(v, str) for k, v in meta.items()
            ):
                raise LoadError(path, "__metadata__ must map strings to strings")
            self.metadata = meta
        self.entries: dict[str, tuple[str, tuple[int, ...], int, int]] = {}
        spans: list[tuple[int, int, str]] = []
        for name, entry in header.items():
            dtype, shape, begin, end = self._check_entry(name, entry)
            self.entries[name] = (dtype, shape, begin, end)
            spans.append((begin, end, name))
        self._check_tiling(spans)

    def _check_entry(self, name: str, entry: Any) -> tuple[str, tuple[int, ...], int, int]:
        path = self.path
        if not isinstance(entry, dict):
            raise LoadError(path, f"tensor {name!r}: entry is not an object")
        tag = entry.get("dtype")
        if not isinstance(tag, str) or tag not in _DTYPES:
            raise LoadError(path, f"tensor {name!r}: unsupported dtype {tag!r}")
        shape = entry.get("shape")
        if not isinstance(shape, list) or not all(
            isinstance(d, int) and not isinstance(d, bool) and d >= 0 for d in shape
        ):
            raise LoadError(path, f"tensor {name!r}: shape {shape!r} is not a list of sizes")
        offsets = entry.get("data_offsets")
        if (
            not isinstance(offsets, list)
            or len(offsets) != 2
            or not all(isinstance(o, int) and not isinstance(o, bool) for o in offsets)
        ):
            raise LoadError(path, f"tensor {name!r}: data_offsets {offsets!r} is not [begin, end]")
        begin, end = offsets
        if begin < 0 or end < begin or self.data_start + end > self.size:
            raise LoadError(
                path,
                f"tensor {name!r}: data_offsets [{begin}, {end}] fall outside the "
                f"{self.size - self.data_start} data bytes",
            )
        dtype = _DTYPES[tag]
        expected = math.prod(shape) * itemsize_of(dtype)
        if end - begin != expected:
            raise LoadError(
                path,
                f"tensor {name!r}: {tag} {shape} needs {expected} bytes but its offsets span "
                f"{end - begin}",
            )
        return dtype, tuple(shape), begin, end

    def _check_tiling(self, spans: list[tuple[int, int, str]]) -> None:
        position = 0
        for begin, end, name in sorted(spans):
            if begin < position:
                raise LoadError(self.path, f"tensor {name!r} overlaps the tensor before it")
            if begin > position:
                raise LoadError(self.path, f"tensor {name!r} leaves a gap before its data")
            position = end
        if self.data_start + position != self.size:
            raise LoadError(
                self.path,
                f"has {self.size - self.data_start - position} bytes after the last tensor",
            )

    def _read_into(self, buffer: np.ndarray, offset: int) -> np.ndarray:
        """Fill ``buffer`` with the bytes at ``offset`` of the data section (positioned reads,
        :func:`steelyard.loaders.base.read_exactly`)."""
        short = "ended before the tensor data its header describes (truncated?)"
        read_exactly(self.path, self.data_start + offset, buffer, short)
        return buffer

    # The numpy dtype is looked up when a tensor is read, not when it is listed: a bf16 or fp8
    # dtype comes from ml_dtypes, whose import alone takes over a second (ml_dtypes 0.7).
    def reader(self, name: str) -> Callable[[], np.ndarray]:
        dtype, shape, begin, end = self.entries[name]

        def read() -> np.ndarray:
            if end == begin:
                return np.zeros(shape, dtype=ALL_DTYPES[dtype])
            return self._read_into(np.empty(shape, dtype=ALL_DTYPES[dtype].newbyteorder("<")), begin)

        return read

    def span_reader(self, name: str, bits: bool = False) -> Callable[[int, int], np.ndarray]:
        """Elements ``[start, stop)`` of the flattened tensor; with ``bits``, as unsigned
        integers of the element's width (the raw patterns: how bf16 is widened without
        ml_dtypes)."""
        dtype, shape, begin, _end = self.entries[name]
        size = math.prod(shape)
        width = itemsize_of(dtype)

        def read_span(start: int, stop: int) -> np.ndarray:
            start, stop = max(0, start), min(size, stop)
            stored = np.dtype(f"<u{width}") if bits else ALL_DTYPES[dtype].newbyteorder("<")
            buffer = np.empty(max(0, stop - start), dtype=stored)
            if buffer.size == 0:
                return buffer
            return self._read_into(buffer, begin + start * width)

        return read_span

    def fill_reader(self, name: str) -> Callable[[int, int, np.ndarray], None] | None:
        """For a float32 tensor: elements ``[start, stop)`` read straight into a float32 array
        of that many elements (``Tensor.fill_span``); None for every other dtype."""
        dtype, shape, begin, _end = self.entries[name]
        size = math.prod(shape)
        if dtype != "f32" or sys.byteorder != "little":
            return None

        def fill_span(start: int, stop: int, out: np.ndarray) -> None:
            if not 0 <= start <= stop <= size or out.size != stop - start:
                raise ValueError(f"elements [{start}, {stop}) of {size} into {out.size}")
            if out.size:
                self._read_into(out, begin + start * 4)

        return fill_span


def _is_index(head: bytes) -> bool:
    return head.lstrip()[:1] == b"{" and b"weight_map" in head


class SafetensorsLoader:
    """Single files, ``*.safetensors.index.json`` sets, and folders holding either."""

    format = Format.SAFETENSORS

    def sniff(self, path: Path, head: bytes) -> bool:
        if path.name.endswith(_INDEX_SUFFIX) or (path.suffix == ".json" and _is_index(head)):
            return True
        if path.suffix == ".safetensors":
            return True  # claim it so that a broken file gets a safetensors-specific reason
        if not safetensors_head(head):
            return False
        (length,) = struct.unpack("<Q", head[:8])
        return length > 1

    def load(self, path: Path) -> Checkpoint:
        shards = self._shards_from_index(path) if path.name.endswith(".json") else [_Shard(path)]
        tensors: dict[str, Tensor] = {}
        origin: dict[str, Path] = {}
        for shard in shards:
            for name, (dtype, shape, _b, _e) in shard.entries.items():
                if name in tensors:
                    raise LoadError(shard.path, f"tensor {name!r} appears in two shards")
                tensors[name] = Tensor(
                    name=name,
                    shape=shape,
                    dtype=dtype,
                    role=role_for(name, dtype in FLOAT_DTYPES),
                    reader=shard.reader(name),
                    read_span=shard.span_reader(name),
                    read_bits=shard.span_reader(name, bits=True) if dtype == "bf16" else None,
                    fill_span=shard.fill_reader(name),
                )
                origin[name] = shard.path
        # Packed layers (GPTQ, AWQ, bitsandbytes, FP8, MLX...) become logical float weights;
        # imported here so that sniffing other formats never loads the packed package.
        from steelyard.loaders.packed.assemble import unpack_checkpoint

        tensors, notes = unpack_checkpoint(path, tensors, origin)
        return inferred_checkpoint(
            path,
            self.format,
            tensors,
            tuple(s.path for s in shards),
            sum(s.size for s in shards),
            notes=notes,
        )

    def _shards_from_index(self, path: Path) -> list[_Shard]:
        if file_size(path) > MAX_METADATA_BYTES:
            raise LoadError(path, "index file is larger than the 100 MB cap")
        index = parse_json(path.read_bytes(), path, "index")
        weight_map = index.get("weight_map") if isinstance(index, dict) else None
        if not isinstance(weight_map, dict) or not all(
            isinstance(k, str) and isinstance(v, str) for k, v in weight_map.items()
        ):
            raise LoadError(path, "index has no weight_map of tensor name to shard file")
        shards: dict[str, _Shard] = {}
        for tensor, file in weight_map.items():
            if file not in shards:
                shards[file] = _Shard(inside(path.parent, file, path))
            if tensor not in shards[file].entries:
                raise LoadError(path, f"index puts {tensor!r} in {file!r}, which lacks it")
        return list(shards.values())
