"""Hostile GGUF files: lying counts, lengths, offsets, sizes and types.

Every file is generated at test time and is small: it *claims* much (2**60 tensors, a string of
2**60 bytes, dims whose product overflows 64 bits) and each case checks that steelyard refuses
it with one line naming the problem, or reads it cleanly, within the harness's limits (20 s,
1 GiB, a child with a 4 GiB address cap). Files are written byte by byte following the layout
in docs FORMATS.md "GGUF" (checked against the ``gguf`` package 0.19.0): little-endian magic,
u32 version, u64 tensor count, u64 metadata count, typed key/value pairs, tensor infos
(name, u32 n_dims, u64 dims innermost first, u32 ggml type, u64 offset), padding to 32, data.
Valid files are cross-checked with ``gguf.GGUFReader``, so the writer here is the format's.
"""

from __future__ import annotations

import struct
from pathlib import Path

import numpy as np
import pytest

from tests.hostile.harness import Outcome, assert_bounded, assert_refused, run

gguf = pytest.importorskip("gguf")

U32, STRING, ARRAY, U8 = 4, 8, 9, 0


def _str(text: str | bytes, length: int | None = None) -> bytes:
    raw = text.encode() if isinstance(text, str) else text
    return struct.pack("<Q", len(raw) if length is None else length) + raw


def _kv_u32(key: str, value: int) -> bytes:
    return _str(key) + struct.pack("<II", U32, value)


def _kv_str(key: str, value: str) -> bytes:
    return _str(key) + struct.pack("<I", STRING) + _str(value)


def _info(name: str, dims: tuple[int, ...], type_id: int, offset: int, n_dims: int | None = None) -> bytes:
    count = len(dims) if n_dims is None else n_dims
    return (
        _str(name)
        + struct.pack("<I", count)
        + b"".join(struct.pack("<Q", d) for d in dims)
        + struct.pack("<IQ", type_id, offset)
    )


def _file(
    infos: list[bytes],
    pairs: list[bytes],
    data: bytes = b"",
    version: int = 3,
    tensor_count: int | None = None,
    pair_count: int | None = None,
    align: int = 32,
) -> bytes:
    head = (
        b"GGUF"
        + struct.pack("<IQQ", version,
                      len(infos) if tensor_count is None else tensor_count,
                      len(pairs) if pair_count is None else pair_count)
        + b"".join(pairs)
        + b"".join(infos)
    )  # fmt: skip
    head += b"\0" * (-len(head) % align)
    return head + data


def _valid(tmp_path: Path) -> bytes:
    """A well-formed one-tensor model (F32 [4, 8] attn_q), as the base of each attack."""
    data = np.arange(32, dtype="<f4").tobytes()
    raw = _file([_info("blk.0.attn_q.weight", (8, 4), 0, 0)],
                [_kv_str("general.architecture", "llama"), _kv_u32("llama.block_count", 1)], data)  # fmt: skip
    check = tmp_path / "check.gguf"
    check.write_bytes(raw)
    reader = gguf.GGUFReader(check)  # the package's reader agrees the base file is valid
    assert reader.tensors[0].name == "blk.0.attn_q.weight"
    assert np.array_equal(reader.tensors[0].data.reshape(-1), np.arange(32, dtype=np.float32))
    check.unlink()
    return raw


def _audit(tmp_path: Path, raw: bytes, name: str = "model.gguf") -> Outcome:
    path = tmp_path / name
    path.write_bytes(raw)
    return run(["audit", name], tmp_path)


def test_valid_base_file_is_audited(tmp_path: Path) -> None:
    outcome = _audit(tmp_path, _valid(tmp_path))
    assert_bounded(outcome)
    assert outcome.code in (0, 1), outcome.stderr


@pytest.mark.parametrize("count", [2**60, 2**64 - 1, 10**6])
def test_huge_tensor_count(tmp_path: Path, count: int) -> None:
    raw = _file([_info("w", (32,), 0, 0)], [], b"\0" * 128, tensor_count=count)
    assert_refused(_audit(tmp_path, raw), f"claims {count:,} tensors")


@pytest.mark.parametrize("count", [2**60, 2**33, 50_000])
def test_huge_metadata_count(tmp_path: Path, count: int) -> None:
    raw = _file([], [_kv_u32("a", 1)], pair_count=count)
    assert_refused(_audit(tmp_path, raw), "metadata pairs")


@pytest.mark.parametrize("length", [2**60, 2**40, 10**8 + 1, 5000])
def test_huge_string_value(tmp_path: Path, length: int) -> None:
    pair = _str("general.name") + struct.pack("<I", STRING) + _str("short", length)
    raw = _file([], [pair], b"x" * 64)
    assert_refused(_audit(tmp_path, raw), "general.name")


@pytest.mark.parametrize("length", [2**60, 2**20])
def test_huge_key_and_tensor_name(tmp_path: Path, length: int) -> None:
    assert_refused(_audit(tmp_path, _file([], [_str("k", length) + b"\0" * 64])), "metadata key")
    raw = _file([_str("w", length) + b"\0" * 64], [])
    assert_refused(_audit(tmp_path, raw, "b.gguf"), "tensor name")


@pytest.mark.parametrize("item", [U8, U32, STRING, ARRAY, 12])
@pytest.mark.parametrize("count", [2**60, 2**28 + 1, 10**5])
def test_huge_array(tmp_path: Path, item: int, count: int) -> None:
    pair = _str("tokenizer.ggml.tokens") + struct.pack("<IIQ", ARRAY, item, count) + b"\0" * 256
    raw = _file([], [pair])
    assert_refused(_audit(tmp_path, raw), "tokenizer.ggml.tokens", "elements")


def test_deeply_nested_arrays(tmp_path: Path) -> None:
    nested = struct.pack("<IQ", ARRAY, 1) * 40 + struct.pack("<IQ", U8, 0)
    pair = _str("deep") + struct.pack("<I", ARRAY) + nested
    assert_refused(_audit(tmp_path, _file([], [pair])), "nests arrays")


def test_many_small_strings_are_walked_in_bounded_time(tmp_path: Path) -> None:
    # Valid but hostile: a vocabulary of 400k empty strings (3.2 MB) is walked, not kept.
    count = 400_000
    pair = _str("tokenizer.ggml.tokens") + struct.pack("<IIQ", ARRAY, STRING, count)
    pair += struct.pack("<Q", 0) * count
    data = np.zeros(32, "<f4").tobytes()
    raw = _file([_info("blk.0.attn_q.weight", (8, 4), 0, 0)], [pair], data)
    outcome = _audit(tmp_path, raw)
    assert_bounded(outcome)
    assert outcome.code in (0, 1), outcome.stderr


@pytest.mark.parametrize("offset", [32, 2**40, 2**64 - 32])
def test_offset_past_the_end(tmp_path: Path, offset: int) -> None:
    raw = _file([_info("blk.0.attn_q.weight", (8, 4), 0, offset)], [], b"\0" * 128)
    assert_refused(_audit(tmp_path, raw), "outside")


def test_truncated_data(tmp_path: Path) -> None:
    raw = _valid(tmp_path)
    assert_refused(_audit(tmp_path, raw[:-8]), "outside")
    assert_refused(_audit(tmp_path, raw[:60], "b.gguf"), "truncated")


@pytest.mark.parametrize("type_id", [4, 5, 31, 99, 2**32 - 1])
def test_unknown_type(tmp_path: Path, type_id: int) -> None:
    raw = _file([_info("blk.0.attn_q.weight", (32,), type_id, 0)], [], b"\0" * 512)
    assert_refused(_audit(tmp_path, raw), f"unknown ggml type {type_id}")


@pytest.mark.parametrize(
    "dims",
    [(2**32, 2**32, 2**32, 2**32), (2**63, 2**63), (2**64 - 1, 2), (2**20, 2**20, 2**10)],
)
def test_dims_whose_product_overflows(tmp_path: Path, dims: tuple[int, ...]) -> None:
    raw = _file([_info("blk.0.attn_q.weight", dims, 0, 0)], [], b"\0" * 512)
    assert_refused(_audit(tmp_path, raw), "element budget")


@pytest.mark.parametrize("n_dims", [0, 5, 2**31])
def test_dimension_count(tmp_path: Path, n_dims: int) -> None:
    raw = _file([_info("blk.0.attn_q.weight", (8, 4), 0, 0, n_dims=n_dims)], [], b"\0" * 512)
    assert_refused(_audit(tmp_path, raw), "dimensions")


def test_rows_that_are_not_whole_blocks(tmp_path: Path) -> None:
    raw = _file([_info("blk.0.attn_q.weight", (33, 2), 8, 0)], [], b"\0" * 512)  # Q8_0: 32
    assert_refused(_audit(tmp_path, raw), "not whole q8_0 blocks")


@pytest.mark.parametrize("alignment", [0, 3, 48, 2**31])
def test_alignment_not_a_power_of_two(tmp_path: Path, alignment: int) -> None:
    raw = _file([], [_kv_u32("general.alignment", alignment)])
    assert_refused(_audit(tmp_path, raw), "general.alignment")


def test_misaligned_and_overlapping_tensors(tmp_path: Path) -> None:
    data = b"\0" * 256
    raw = _file([_info("blk.0.attn_q.weight", (8,), 0, 16)], [], data)
    assert_refused(_audit(tmp_path, raw), "not a multiple of 32")
    overlapping = [_info("blk.0.attn_q.weight", (32,), 0, 0), _info("blk.0.attn_k.weight", (32,), 0, 64)]
    assert_refused(_audit(tmp_path, _file(overlapping, [], data), "b.gguf"), "overlaps")


def test_duplicate_names(tmp_path: Path) -> None:
    twice = [_info("w", (8,), 0, 0), _info("w", (8,), 0, 32)]
    assert_refused(_audit(tmp_path, _file(twice, [], b"\0" * 64)), "appears twice")
    pairs = [_kv_u32("a", 1), _kv_u32("a", 2)]
    assert_refused(_audit(tmp_path, _file([], pairs), "b.gguf"), "appears twice")


@pytest.mark.parametrize(
    ("version", "fragment"),
    [(1, "version 1"), (0x03000000, "big-endian"), (7, "version 7"), (2**32 - 1, "version")],
)
def test_versions_not_read(tmp_path: Path, version: int, fragment: str) -> None:
    raw = _file([], [_kv_u32("a", 1)], b"\0" * 64, version=version)
    assert_refused(_audit(tmp_path, raw), fragment)


def test_unknown_metadata_value_type(tmp_path: Path) -> None:
    pair = _str("odd") + struct.pack("<I", 13) + b"\0" * 32
    assert_refused(_audit(tmp_path, _file([], [pair])), "unknown value type 13")


def test_huge_expert_stack_claim_is_refused(tmp_path: Path) -> None:
    # [experts, out, in] = [2**40, 2**20, 32] in Q4_0: claims 2**65 elements.
    raw = _file([_info("blk.0.ffn_up_exps.weight", (32, 2**20, 2**40), 2, 0)], [], b"\0" * 64)
    assert_refused(_audit(tmp_path, raw), "element budget")
