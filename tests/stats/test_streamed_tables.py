"""Token tables too large to cache are read by passes of row blocks, never assembled: the
rules that need every weight of them (``untrained-token``, ``essential-weight``,
``quantization-error``) must report what they report on the assembled table.

The same invented llama-shaped checkpoint (written with the ``safetensors`` package: a
vocabulary of 3,000 tokens with copied, zero and mean rows, a head with planted outliers)
is audited twice, with the default statistics and with a stream limit small enough that both
tables are streamed in many blocks; the references are the assembled run's findings and
measurements, ``numpy.unique`` over the rows' bytes for duplicates, and the rows themselves
for the streamed gathers."""

from __future__ import annotations

import json
from pathlib import Path

import ml_dtypes
import numpy as np
import pytest
from safetensors.numpy import save_file

from steelyard import streaming
from steelyard.api import load
from steelyard.checkpoint_audit import run_rules
from steelyard.graph import Layer
from steelyard.policy import Policy
from steelyard.rules import essential_weight, untrained_token
from steelyard.rules.base import RuleMeasurements
from steelyard.stats import LayerStats
from steelyard.stats.passes import WeightPasses

_VOCAB, _WIDTH = 3000, 64


def _checkpoint(folder: Path, rng: np.random.Generator) -> Path:
    def draw(*shape: int, scale: float = 0.02) -> np.ndarray:
        return (rng.standard_t(5, size=shape) * scale).astype(np.float32)

    embed = draw(_VOCAB, _WIDTH) + 0.01 * rng.standard_normal(_WIDTH).astype(np.float32)
    embed *= np.exp(rng.normal(0, 0.3, (_VOCAB, 1))).astype(np.float32)
    embed[2990:] = embed[7]  # copies of one token, far from it
    embed[100:140] = 0.0
    embed[555] = embed.mean(axis=0)
    head = draw(_VOCAB, _WIDTH)
    head[[11, 1200, 2500], [3, 40, 63]] = [2.5, -3.0, 2.0]  # outliers essential-weight keeps
    tensors = {
        "model.embed_tokens.weight": embed.astype(ml_dtypes.bfloat16),
        "lm_head.weight": head.astype(ml_dtypes.bfloat16),
        "model.norm.weight": np.ones(_WIDTH, ml_dtypes.bfloat16),
    }
    block = "model.layers.0."
    for name, out, inp in (
        ("self_attn.q_proj", 64, 64), ("self_attn.k_proj", 64, 64), ("self_attn.v_proj", 64, 64),
        ("self_attn.o_proj", 64, 64), ("mlp.gate_proj", 128, 64), ("mlp.up_proj", 128, 64),
        ("mlp.down_proj", 64, 128),
    ):
        tensors[block + name + ".weight"] = draw(out, inp, scale=0.1).astype(ml_dtypes.bfloat16)
    save_file(tensors, str(folder / "model.safetensors"))
    config = {
        "model_type": "llama", "hidden_size": _WIDTH, "num_hidden_layers": 1,
        "num_attention_heads": 4, "num_key_value_heads": 4, "intermediate_size": 128,
        "vocab_size": _VOCAB, "tie_word_embeddings": False,
    }
    (folder / "config.json").write_text(json.dumps(config))
    return folder / "model.safetensors"


def _run(path: Path, stream_bytes: int | None) -> tuple[list[tuple[str, str, str]], dict, LayerStats]:
    checkpoint = load(path)
    stats = LayerStats(checkpoint) if stream_bytes is None else LayerStats(checkpoint, stream_bytes=stream_bytes)
    measurements = RuleMeasurements()
    findings, _, _ = run_rules(checkpoint, Policy(), None, stats=stats, measurements=measurements)
    described = [(f.rule, f.layer or "", json.dumps(f.evidence, sort_keys=True, default=str)) for f in findings]
    return described, {name: measurements.of(name) for name in ("model.embed_tokens", "lm_head")}, stats


def test_streamed_tables_give_the_assembled_tables_findings(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, rng: np.random.Generator
) -> None:
    monkeypatch.setattr(streaming, "CHUNK_BYTES", 2**14)  # blocks of 64 rows
    path = _checkpoint(tmp_path, rng)
    assembled, assembled_measured, _ = _run(path, None)
    assembled_whole = []
    original = WeightPasses.matrix

    def spy(self: WeightPasses, layer: Layer) -> np.ndarray:
        assembled_whole.append(layer.name)
        return original(self, layer)

    monkeypatch.setattr(WeightPasses, "matrix", spy)
    streamed, streamed_measured, stats = _run(path, 4 * _WIDTH * 100)  # tables over the limit
    # no rule assembled a table: every one read it by passes
    assert not {"model.embed_tokens", "lm_head"} & set(assembled_whole)
    table = stats.checkpoint.layer("model.embed_tokens")
    assert table is not None and stats.streamed(table) is not None
    rules = {rule for rule, _, _ in assembled}
    assert {"untrained-token", "essential-weight"} <= rules
    # Same findings, same evidence, except the float32 summation order of the token table's
    # mean (untrained-token's medians and ratios may move in the last digits).
    assert [(r, layer) for r, layer, _ in streamed] == [(r, layer) for r, layer, _ in assembled]
    for (rule, layer, got), (_, _, expected) in zip(streamed, assembled, strict=True):
        if rule != "untrained-token":
            assert got == expected, (rule, layer)
    tokens = [json.loads(e) for r, _, e in streamed if r == "untrained-token"]
    reference = [json.loads(e) for r, _, e in assembled if r == "untrained-token"]
    assert [t["counts"] for t in tokens] == [t["counts"] for t in reference]
    assert [[x["id"] for x in t["tokens"]] for t in tokens] == [[x["id"] for x in t["tokens"]] for t in reference]
    assert streamed_measured == assembled_measured


def test_streamed_measurements_match_the_whole_matrix(rng: np.random.Generator) -> None:
    """The two measurements read by passes of row blocks against the in-memory ones."""
    matrix = (rng.standard_t(4, size=(5000, 48)) * 0.05).astype(np.float32)
    matrix[4000:4010] = matrix[17]
    matrix[[5, 2222], [1, 40]] = [4.0, -5.0]
    squares = np.einsum("ij,ij->i", matrix, matrix, dtype=np.float64)

    def blocks():  # type: ignore[no-untyped-def]
        for a in range(0, matrix.shape[0], 333):
            yield a, min(a + 333, matrix.shape[0]), matrix[a : a + 333].copy()

    whole = essential_weight.measure(matrix, 6.0, squares)
    streamed = essential_weight.measure_blocks(blocks, matrix.shape, 6.0, squares)
    assert whole.units.size > 2
    np.testing.assert_array_equal(streamed.units, whole.units)
    np.testing.assert_array_equal(streamed.inputs, whole.inputs)
    np.testing.assert_array_equal(streamed.values, whole.values)
    np.testing.assert_allclose(streamed.row_rms, whole.row_rms, rtol=1e-12)
    np.testing.assert_allclose(streamed.column_rms, whole.column_rms, rtol=1e-12)

    tokens_whole = untrained_token.measure(matrix, 1, squares)
    tokens = untrained_token.measure_blocks(blocks, matrix.shape, 1, squares)
    np.testing.assert_array_equal(tokens.norms, tokens_whole.norms)
    rows = np.ascontiguousarray(matrix).view(np.dtype((np.void, 48 * 4))).reshape(-1)
    _, inverse, counts = np.unique(rows, return_inverse=True, return_counts=True)
    np.testing.assert_array_equal(tokens.duplicates, counts[inverse] > 1)
    scale = float(np.median(tokens_whole.residuals))
    np.testing.assert_allclose(tokens.residuals, tokens_whole.residuals, rtol=1e-4, atol=3e-3 * scale)


@pytest.mark.parametrize("dtype", ["f32", "bf16"])
def test_strided_rows_of_a_streamed_table_are_its_rows(
    tmp_path: Path, rng: np.random.Generator, dtype: str
) -> None:
    # The spectrum's subsample of a streamed table: rows far apart are read one by one, near
    # ones by a pass; either way exactly the stored rows (the safetensors package's read).
    table = rng.standard_normal((3000, 256)).astype(np.float32)
    stored = table.astype(ml_dtypes.bfloat16) if dtype == "bf16" else table
    path = tmp_path / "table.safetensors"
    save_file({"lm_head.weight": stored}, str(path))
    reference = np.asarray(stored, np.float32)
    checkpoint = load(path)
    stats = LayerStats(checkpoint, stream_bytes=4 * 256 * 100)
    layer = checkpoint.layer("lm_head")
    assert layer is not None and stats.streamed(layer) is not None
    for start, step in ((0, 2), (1, 8), (3, 40), (7, 64), (0, 2999), (5, 5000)):
        got = stats.rows(layer, start, step)
        assert got.dtype == np.float32 and got.flags.c_contiguous
        np.testing.assert_array_equal(got.view(np.uint32), reference[start::step].view(np.uint32))


def test_picked_rows_are_the_rows(tmp_path: Path, rng: np.random.Generator) -> None:
    path = _checkpoint(tmp_path, rng)
    checkpoint = load(path)
    stats = LayerStats(checkpoint, stream_bytes=4 * _WIDTH * 100)
    table = checkpoint.layer("lm_head")
    assert table is not None and stats.streamed(table) is not None
    index = np.array([0, 5, 63, 64, 1999, 2999])
    reference = np.asarray(checkpoint.tensors["lm_head.weight"].read(), np.float32)
    np.testing.assert_array_equal(stats.picked(table, index), reference[index])
    small = checkpoint.layer("model.layers.0.self_attn.q_proj")  # 16 KiB, under the limit
    assert small is not None and stats.streamed(small) is None  # cached: read it whole
