"""GGUF files may store head counts as per-block arrays (models whose blocks differ in their
number of heads); each block is then split with its own counts. Written by the ``gguf``
package's writer (``add_head_count`` takes a sequence), keys as in ``gguf.constants.Keys``."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

import steelyard
from steelyard.policy import Policy

gguf = pytest.importorskip("gguf")

WIDTH, HEAD_DIM = 64, 16
HEADS, KV = [4, 2, 3], [2, 1, 3]


def _write(path: Path) -> Path:
    rng = np.random.default_rng(5)
    writer = gguf.GGUFWriter(path, "llama")
    writer.add_block_count(len(HEADS))
    writer.add_embedding_length(WIDTH)
    writer.add_feed_forward_length(96)
    writer.add_head_count(HEADS)
    writer.add_head_count_kv(KV)
    writer.add_key_length(HEAD_DIM)
    writer.add_value_length(HEAD_DIM)

    def put(name: str, rows: int, cols: int) -> None:
        writer.add_tensor(name, (rng.standard_normal((rows, cols)) / np.sqrt(cols)).astype(np.float32))

    put("token_embd.weight", 50, WIDTH)
    for n, (heads, kv) in enumerate(zip(HEADS, KV, strict=True)):
        writer.add_tensor(f"blk.{n}.attn_norm.weight", np.ones(WIDTH, np.float32))
        put(f"blk.{n}.attn_q.weight", heads * HEAD_DIM, WIDTH)
        put(f"blk.{n}.attn_k.weight", kv * HEAD_DIM, WIDTH)
        put(f"blk.{n}.attn_v.weight", kv * HEAD_DIM, WIDTH)
        put(f"blk.{n}.attn_output.weight", WIDTH, heads * HEAD_DIM)
        writer.add_tensor(f"blk.{n}.ffn_norm.weight", np.ones(WIDTH, np.float32))
        put(f"blk.{n}.ffn_gate.weight", 96, WIDTH)
        put(f"blk.{n}.ffn_up.weight", 96, WIDTH)
        put(f"blk.{n}.ffn_down.weight", WIDTH, 96)
    writer.add_tensor("output_norm.weight", np.ones(WIDTH, np.float32))
    put("output.weight", 50, WIDTH)
    writer.write_header_to_file()
    writer.write_kv_data_to_file()
    writer.write_tensors_to_file()
    writer.close()
    return path


def test_each_block_gets_its_own_head_counts(tmp_path: Path) -> None:
    checkpoint = steelyard.load(_write(tmp_path / "varied.gguf"))
    structure = checkpoint.transformer
    assert structure is not None and structure.source == "GGUF metadata"
    blocks = {b.name: b for b in structure.attention}
    assert sorted(blocks) == ["blk.0.attn", "blk.1.attn", "blk.2.attn"]
    for n, (heads, kv) in enumerate(zip(HEADS, KV, strict=True)):
        block = blocks[f"blk.{n}.attn"]
        assert (len(block.heads), block.kv_heads, block.head_dim) == (heads, kv, HEAD_DIM)
        # query head h reads key/value head h // (H/G) (grouped-query attention)
        assert [h.kv_index for h in block.heads] == [h // (heads // kv) for h in range(heads)]
    assert not any("heads not recognised" in note for note in structure.notes)
    report = steelyard.audit(tmp_path / "varied.gguf", policy=Policy())
    assert not any("head" in note and "not" in note for a in report.audits for note in a.notes)
