"""The protobuf wire format of ONNX files: a cheap content sniff, and the pass that keeps
weight bytes on disk.

An ONNX file is one protobuf message, so the package can only parse all of it at once. To keep
weights on disk until a rule asks for them, :func:`strip_raw_data` walks the wire format first
and swaps every ``TensorProto.raw_data`` payload of 20 bytes or more for a 20-byte marker
holding the payload's file offset and length. The rebuilt (small) message is then parsed by
the ``onnx`` package, and a tensor's reader memory-maps its bytes later. Payloads shorter than
a marker stay inline, so a 20-byte ``raw_data`` is always a marker.
"""

from __future__ import annotations

import mmap
import struct
from pathlib import Path
from typing import Any

from steelyard.errors import LoadError

#: A protobuf message cannot exceed 2 GiB; ONNX files past that use external data.
MAX_MODEL_BYTES = 2**31 - 1
#: Nesting bound for the wire walk (the protobuf runtime's own default recursion limit).
MAX_DEPTH = 100

MARK = b"SYRD"
MARK_LEN = 20  # magic + u64 offset + u64 length

# Message kinds of onnx.proto that can (transitively) hold a TensorProto.
_MODEL, _GRAPH, _NODE, _ATTR, _TENSOR, _SPARSE, _TRAINING, _FUNCTION = range(8)
#: kind → {field number: child kind} for the length-delimited fields worth descending into.
_CHILDREN: dict[int, dict[int, int]] = {
    _MODEL: {7: _GRAPH, 20: _TRAINING, 25: _FUNCTION},
    _GRAPH: {1: _NODE, 5: _TENSOR, 15: _SPARSE},
    _NODE: {5: _ATTR},
    _ATTR: {5: _TENSOR, 6: _GRAPH, 10: _TENSOR, 11: _GRAPH, 22: _SPARSE, 23: _SPARSE},
    _SPARSE: {1: _TENSOR, 2: _TENSOR},
    _TRAINING: {1: _GRAPH, 2: _GRAPH},
    _FUNCTION: {7: _NODE, 11: _ATTR},
    _TENSOR: {},
}
_RAW_DATA = 9


class Malformed(Exception):
    """The wire walk met bytes that are not a protobuf message (converted to LoadError)."""


def _varint(buf: Any, pos: int, end: int) -> tuple[int, int]:
    result = 0
    shift = 0
    while True:
        if pos >= end:
            raise Malformed("a varint runs past the end of its message")
        byte = buf[pos]
        pos += 1
        result |= (byte & 0x7F) << shift
        if not byte & 0x80:
            return result, pos
        shift += 7
        if shift >= 70:
            raise Malformed("a varint is longer than 10 bytes")


def _encode_varint(value: int) -> bytes:
    out = bytearray()
    while True:
        byte = value & 0x7F
        value >>= 7
        if value:
            out.append(byte | 0x80)
        else:
            out.append(byte)
            return bytes(out)


def _rebuild(buf: Any, start: int, end: int, kind: int, depth: int) -> bytes | None:
    """The message in ``buf[start:end]`` with raw payloads swapped, or None if unchanged."""
    if depth > MAX_DEPTH:
        raise Malformed(f"messages are nested more than {MAX_DEPTH} deep")
    children = _CHILDREN[kind]
    parts: list[bytes] = []
    copied = start
    pos = start
    while pos < end:
        field_start = pos
        tag, pos = _varint(buf, pos, end)
        number, wire = tag >> 3, tag & 7
        if number == 0:
            raise Malformed("a field has number 0")
        if wire == 0:
            _, pos = _varint(buf, pos, end)
        elif wire == 1:
            pos += 8
        elif wire == 5:
            pos += 4
        elif wire == 2:
            tag_end = pos
            length, pos = _varint(buf, pos, end)
            body = pos
            pos += length
            if pos > end:
                raise Malformed("a field's length runs past the end of its message")
            replacement: bytes | None = None
            if kind == _TENSOR and number == _RAW_DATA and length >= MARK_LEN:
                marker = MARK + struct.pack("<QQ", body, length)
                replacement = bytes(buf[field_start:tag_end]) + _encode_varint(MARK_LEN) + marker
            elif number in children:
                inner = _rebuild(buf, body, pos, children[number], depth + 1)
                if inner is not None:
                    replacement = (
                        bytes(buf[field_start:tag_end]) + _encode_varint(len(inner)) + inner
                    )
            if replacement is not None:
                parts.append(bytes(buf[copied:field_start]))
                parts.append(replacement)
                copied = pos
        else:
            raise Malformed(f"a field uses wire type {wire}, which ONNX never writes")
        if pos > end:
            raise Malformed("a field runs past the end of its message")
    if not parts:
        return None
    parts.append(bytes(buf[copied:end]))
    return b"".join(parts)


def strip_raw_data(buf: Any) -> bytes:
    """The model message with every large ``raw_data`` replaced by an offset marker."""
    rebuilt = _rebuild(buf, 0, len(buf), _MODEL, 0)
    return bytes(buf[:]) if rebuilt is None else rebuilt


#: ModelProto field number → wire type, for the content sniff.
_MODEL_FIELDS = {1: 0, 2: 2, 3: 2, 4: 2, 5: 0, 6: 2, 7: 2, 8: 2, 14: 2, 20: 2, 25: 2, 26: 2}


def looks_like_model(head: bytes, size: int) -> bool:
    """Walk the first protobuf fields: each must be a ModelProto field of the right type."""
    pos, fields = 0, 0
    while pos < len(head):
        tag, pos, ok = _head_varint(head, pos)
        if not ok:
            return fields > 0 and len(head) < size  # cut off by the end of the head
        number, wire = tag >> 3, tag & 7
        if _MODEL_FIELDS.get(number) != wire:
            return False
        if wire == 0:
            value, pos, ok = _head_varint(head, pos)
            if not ok:
                return len(head) < size
            if number == 1 and not 1 <= value < 1 << 16:
                return False
        else:
            length, pos, ok = _head_varint(head, pos)
            if not ok:
                return len(head) < size
            if pos + length > size:
                return False
            pos += length
        fields += 1
    return fields > 0


def _head_varint(head: bytes, pos: int) -> tuple[int, int, bool]:
    value, shift = 0, 0
    while pos < len(head) and shift < 64:
        byte = head[pos]
        pos += 1
        value |= (byte & 0x7F) << shift
        if not byte & 0x80:
            return value, pos, True
        shift += 7
    return value, pos, False


def parse_model(path: Path, size: int) -> Any:
    """The model with large raw payloads swapped for markers, parsed by the onnx package."""
    if size == 0:
        raise LoadError(path, "is empty")
    if size > MAX_MODEL_BYTES:
        raise LoadError(path, f"is {size} bytes, past the 2 GiB protobuf limit of ONNX")
    try:
        with (
            open(path, "rb") as handle,
            mmap.mmap(handle.fileno(), 0, access=mmap.ACCESS_READ) as mapped,
        ):
            stripped = strip_raw_data(mapped)
    except Malformed as exc:
        raise LoadError(path, f"is not a valid ONNX protobuf ({exc})") from None
    except (OSError, ValueError) as exc:
        raise LoadError(path, f"cannot be read ({exc})") from None
    # Only the schema: the onnx package (with ml_dtypes) takes about a second to import, which
    # neither the content sniff nor reading the file needs (see the schema module).
    from steelyard.loaders.onnx.schema import model_proto_class

    model = model_proto_class()()
    try:
        model.ParseFromString(stripped)
    except Exception as exc:  # protobuf raises DecodeError, RuntimeError… by backend
        raise LoadError(
            path, f"is not a valid ONNX protobuf ({type(exc).__name__}: {exc})"
        ) from None
    if not model.HasField("graph"):
        raise LoadError(path, "has no graph, so it is not an ONNX model")
    return model
