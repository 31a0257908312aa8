"""``quantization-error`` on the trained tiny transformers (fixtures/gen_transformer_tokens.py)
and on GGUF-quantized weights.

Sources: round-to-nearest with symmetric absmax scales as defined on the rule's page (per
output channel at 8 bits: Dettmers et al. 2022, "LLM.int8()"; 4 bits in groups of 128: the RTN
baseline of Frantar et al. 2023 "GPTQ" and Lin et al. 2024 "AWQ"); the ``gguf`` package's
``quants.quantize``/``dequantize`` for Q8_0 and Q4_0 (the reference implementation of the
ggml block formats).
"""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pytest

from steelyard.checkpoint_audit import run_rules
from steelyard.findings import Finding, Severity
from steelyard.loaders import load
from steelyard.policy import Policy
from steelyard.rules.base import RuleNotes
from steelyard.rules.quantization_error import RULE, rtn_errors, stored_grid

FIXTURES = Path(__file__).resolve().parents[2] / "fixtures"
TOKENS = FIXTURES / "transformers_tokens"
HOSTILE = "model.layers.1.mlp.down_proj"


WITH_TABLE = Policy(rules={RULE.name: {"table": True}})


def _run(path: Path, notes: RuleNotes | None = None, policy: Policy = WITH_TABLE) -> list[Finding]:
    findings, _, _ = run_rules(load(path), policy, None, rules={RULE.name: RULE}, notes=notes)
    return findings


def _table(findings: list[Finding]) -> dict[str, dict[str, object]]:
    (table,) = [f for f in findings if f.layer is None]
    assert table.severity is Severity.INFO and table.score == 0.0
    return {row["layer"]: row for row in table.evidence["table"]}


def _reference(w: np.ndarray, levels: float, group: int) -> np.ndarray:
    """Ŵ by the page's definition, written out in float64 group by group."""
    out = np.empty_like(w)
    for j in range(w.shape[0]):
        for start in range(0, w.shape[1], group):
            part = w[j, start : start + group]
            scale = np.abs(part).max() / levels
            out[j, start : start + group] = 0.0 if scale == 0 else np.rint(part / scale) * scale
    return out


@pytest.mark.parametrize("name", ["clean", "planted", "clean_tied"])
def test_table_equals_a_direct_numpy_computation(name: str) -> None:
    checkpoint = load(TOKENS / name / "model.safetensors")
    table = _table(_run(TOKENS / name / "model.safetensors"))
    assert set(table) == {layer.name for layer in checkpoint.layers}
    for layer in checkpoint.layers:
        w = layer.matrix().astype(np.float64)
        row = table[layer.name]
        assert row["shape"] == [layer.units, layer.fan_in]
        for bits, levels, group in (("int8", 127.0, w.shape[1]), ("int4", 7.0, 128)):
            err = w - _reference(w, levels, group)
            rel = np.linalg.norm(err) / np.linalg.norm(w)
            per_row = np.linalg.norm(err, axis=1) / np.linalg.norm(w, axis=1)
            assert row[f"{bits}_error"] == pytest.approx(rel, rel=1e-4)
            assert row[f"{bits}_worst_channel_error"] == pytest.approx(per_row.max(), rel=1e-4)
            assert row[f"{bits}_worst_channel"] == int(np.argmax(per_row))
        columns = (w**2).sum(axis=0)
        err4 = w - _reference(w, 7.0, 128)
        counted = columns > 1e-4 * np.median(columns)  # RMS above 1 % of the median column's
        balanced = np.sqrt(((err4**2).sum(axis=0)[counted] / columns[counted]).sum() / counted.sum())
        assert row["int4_balanced_error"] == pytest.approx(balanced, rel=1e-4)


def test_gaussian_weights_lose_about_a_tenth_at_4_bits() -> None:
    # Absmax of 128 normals ≈ 2.6σ, step 2.6σ/7, uniform rounding error step/√12 ≈ 0.107σ
    # (quantization noise model, Widrow & Kollár 2008, "Quantization Noise"): the rule's
    # "median near 0.1" premise.
    w = np.random.default_rng(0).standard_normal((256, 512)).astype(np.float32)
    int8, int4, balanced = rtn_errors(w, 128)
    assert 0.09 < int4.relative < 0.12
    assert balanced == pytest.approx(int4.relative, rel=0.05)
    assert int8.relative < 0.01


def test_outlier_input_channels_are_flagged_and_clean_copies_are_not() -> None:
    for name in ("planted", "planted_tied"):
        flagged = [f for f in _run(TOKENS / name / "model.safetensors") if f.layer is not None]
        assert [f.layer for f in flagged] == [HOSTILE], name
        assert flagged[0].severity is Severity.WARNING
        # Columns ×30 (function kept by up_proj rows /30) round the other weights to zero.
        assert flagged[0].evidence["int4_balanced_error"] > 0.8
    for name in ("clean", "clean_tied"):
        assert [f for f in _run(TOKENS / name / "model.safetensors") if f.layer is not None] == []


def test_inputs_the_layer_does_not_read_do_not_count_as_lost() -> None:
    # A layer with 20 of 128 input columns at zero (dead producers) loses nothing there.
    w = np.random.default_rng(2).standard_normal((64, 128)).astype(np.float32)
    full = rtn_errors(w, 128)[2]
    w[:, :20] = 1e-9
    assert rtn_errors(w, 128)[2] == pytest.approx(full, rel=0.15)


def test_by_default_a_clean_model_gets_no_finding_and_a_flagged_one_carries_the_table() -> None:
    assert _run(TOKENS / "clean" / "model.safetensors", policy=Policy()) == []
    (flagged,) = _run(TOKENS / "planted" / "model.safetensors", policy=Policy())
    assert flagged.layer == HOSTILE
    assert [row["layer"] for row in flagged.evidence["table"]] == [
        layer.name for layer in load(TOKENS / "planted" / "model.safetensors").layers
    ]


def test_rtn_at_blocks_of_32_matches_gguf_q8_0_round_trip() -> None:
    gguf = pytest.importorskip("gguf")
    from gguf.quants import dequantize, quantize

    w = load(TOKENS / "planted" / "model.safetensors").layer(HOSTILE)
    assert w is not None
    matrix = w.matrix().astype(np.float32)
    kind = gguf.GGMLQuantizationType.Q8_0
    reference = dequantize(quantize(matrix, kind), kind).reshape(matrix.shape)
    # Q8_0 (ggml): d = absmax/127 per block of 32, q = roundf(x/d) (halves away from zero),
    # d stored as float16; the page's 8-bit RTN at groups of 32 with the same scale storage
    # and tie rule must equal it exactly.
    # (in float32, as ggml computes, multiplying by 1/d)
    blocks = matrix.reshape(-1, 32)
    d = np.abs(blocks).max(axis=1, keepdims=True) / np.float32(127)
    x = blocks * np.where(d > 0, np.float32(1) / d, np.float32(0))
    q = (np.sign(x) * np.floor(np.abs(x) + np.float32(0.5))).astype(np.float64)
    ours = (q * d.astype(np.float16).astype(np.float64)).reshape(matrix.shape)
    assert np.allclose(ours, reference, rtol=1e-6, atol=1e-7)
    # And the rule's float32 arithmetic gives the same error as the package's round trip,
    # up to the float16 scale (relative 2^-11).
    blocks32 = matrix.reshape(-1, 32)
    mine = _reference(blocks32.astype(np.float64), 127.0, 32).reshape(matrix.shape)
    assert np.linalg.norm(matrix - mine) == pytest.approx(np.linalg.norm(matrix - reference), rel=1e-2)


@pytest.mark.parametrize("kind_name", ["Q8_0", "Q4_0"])
def test_gguf_block_grids_are_recognised_as_already_quantized(kind_name: str) -> None:
    gguf = pytest.importorskip("gguf")
    from gguf.quants import dequantize, quantize

    kind = gguf.GGMLQuantizationType[kind_name]
    matrix = np.random.default_rng(1).standard_normal((16, 128)).astype(np.float32)
    stored = dequantize(quantize(matrix, kind), kind).reshape(matrix.shape)
    assert stored_grid(stored) is not None and stored_grid(stored).startswith(kind_name)
    assert stored_grid(matrix) is None


@pytest.mark.parametrize("row", [0, 1000, 2047])
def test_a_grid_is_checked_in_every_row_block(row: int) -> None:
    """A matrix of many row blocks on the Q8_0 grid (gguf's own quantize/dequantize) is
    recognised; one weight moved off the grid, in the first, a middle or the last block,
    makes it not on the grid."""
    gguf = pytest.importorskip("gguf")
    from gguf.quants import dequantize, quantize

    kind = gguf.GGMLQuantizationType.Q8_0
    matrix = np.random.default_rng(2).standard_normal((2048, 512)).astype(np.float32)
    stored = dequantize(quantize(matrix, kind), kind).reshape(matrix.shape).astype(np.float32)
    assert stored_grid(stored) == "Q8_0-like (8-bit blocks of 32)"
    moved = stored.copy()
    block = moved[row, 64:96]
    # half a grid step off, inside the block's range so its absmax (and scale) stays
    step = np.abs(block).max() / 127
    block[np.argmin(np.abs(block))] += 0.5 * step
    assert stored_grid(moved) is None


def test_a_grid_is_checked_on_a_streamed_layer() -> None:
    """The same check over passes of row blocks (a table too large to cache): gguf's Q8_0
    grid recognised, one weight off it in the last block not, and rows whose width is no
    multiple of 32 on no grid."""
    gguf = pytest.importorskip("gguf")
    from gguf.quants import dequantize, quantize

    kind = gguf.GGMLQuantizationType.Q8_0
    matrix = np.random.default_rng(3).standard_normal((1500, 64)).astype(np.float32)
    stored = dequantize(quantize(matrix, kind), kind).reshape(matrix.shape).astype(np.float32)

    def passes(table: np.ndarray):  # type: ignore[no-untyped-def]
        def blocks():  # type: ignore[no-untyped-def]
            for a in range(0, table.shape[0], 400):
                yield a, min(a + 400, table.shape[0]), table[a : a + 400].copy()

        return blocks

    assert stored_grid(passes(stored)) == "Q8_0-like (8-bit blocks of 32)"
    moved = stored.copy()
    step = np.abs(moved[1499, 32:64]).max() / 127
    moved[1499, 32 + int(np.argmin(np.abs(moved[1499, 32:64])))] += 0.5 * step
    assert stored_grid(passes(moved)) is None
    assert stored_grid(passes(stored[:, :48])) is None


def test_quantized_gguf_layers_report_that_the_error_paid_cannot_be_measured(tmp_path: Path) -> None:
    pytest.importorskip("gguf")
    source = FIXTURES / "gguf" / "tiny-llama.gguf"
    shutil.copy(source, tmp_path / "tiny-llama.gguf")
    notes = RuleNotes()
    table = _table(_run(tmp_path / "tiny-llama.gguf", notes))
    # Stored types per the gguf package's reader (fixtures/gen_gguf.py wrote them).
    assert table["blk.0.attn_q"]["stored"].startswith("Q8_0")
    assert table["blk.0.attn_k"]["stored"].startswith("Q4_0")
    assert table["blk.1.ffn_down"]["stored"].startswith("Q8_0")
    assert table["blk.0.attn_q"]["error_paid"] is None
    assert "int4_error" in table["blk.0.ffn_up"]  # F16: measured as float
    assert any("error already paid not measured" in line for line in notes.lines([]))


def test_a_large_layer_is_measured_on_a_seeded_row_sample() -> None:
    from steelyard.rules.quantization_error import sampled_rows

    w = np.random.default_rng(6).standard_normal((2048, 256)).astype(np.float32)
    rows = sampled_rows(2048, 256, 2**15)
    assert rows is not None and rows.size == 128
    expected = np.sort(np.random.default_rng(0).choice(2048, size=128, replace=False))
    assert np.array_equal(rows, expected)
    sampled = rtn_errors(w, 128, rows)[1]
    on_rows = rtn_errors(w[rows], 128)[1]
    assert sampled.relative == on_rows.relative
    assert sampled.worst_channel == int(rows[on_rows.worst_channel])
    # Row-wise schemes: the sample's error estimates the whole matrix's.
    assert sampled.relative == pytest.approx(rtn_errors(w, 128)[1].relative, rel=0.04)
    assert sampled_rows(64, 128, 2**15) is None and sampled_rows(4096, 128, 0) is None


@pytest.mark.parametrize("fixture", ["awq-g32", "bnb-nf4", "ct-fp8-block"])
def test_packed_weights_get_no_prediction_but_the_error_already_paid(fixture: str) -> None:
    """Weights decoded from a packed store (fixtures written by the quantization libraries
    themselves, fixtures/gen_packed.py) are already quantized: the rule predicts nothing for
    them and says so, naming their layers."""
    import steelyard
    from steelyard.policy import Policy

    report = steelyard.audit(Path("fixtures/packed") / fixture / "model.safetensors", policy=Policy())
    audit = report.audits[0]
    packed = [h.layer["name"] for h in audit.layers if h.layer.get("stored_type")] or [
        layer["name"] for layer in report.to_dict()["layers"] if layer.get("stored_type")
    ]
    assert packed
    notes = [n for n in audit.notes if n.startswith("quantization-error: error already paid")]
    assert notes and all(name in notes[0] for name in packed)
    assert not any(f.rule == "quantization-error" and f.layer in packed for f in audit.findings)
