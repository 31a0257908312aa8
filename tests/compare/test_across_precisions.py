"""compare between a float checkpoint and its GGUF export, and between a base and a merged
low-rank fine-tune.

The float side is a llama-shaped safetensors file with its ``config.json``; the export is
written by the ``gguf`` package's writer and quantizers (``GGUFWriter``, ``gguf.quants``),
with GGUF tensor names as the GGUF specification lists them (``blk.N.attn_q.weight``...), and
query/key rows reordered as the reference converter does for rotary models (recalled from
llama.cpp's ``permute``: ``reshape(heads, 2, d/2, in).swapaxes(1, 2)``; from memory). The
expected errors are computed here from ``gguf.quants.dequantize`` of the bytes written.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

import steelyard
from tests.conftest import write_safetensors

gguf = pytest.importorskip("gguf")
T = gguf.GGMLQuantizationType

WIDTH, HEADS, KV, FF, VOCAB, BLOCKS = 64, 4, 2, 128, 96, 2
HF_LEAVES = {
    "attn_q": "self_attn.q_proj", "attn_k": "self_attn.k_proj", "attn_v": "self_attn.v_proj",
    "attn_output": "self_attn.o_proj", "ffn_gate": "mlp.gate_proj", "ffn_up": "mlp.up_proj",
    "ffn_down": "mlp.down_proj",
}
SHAPES = {
    "attn_q": (WIDTH, WIDTH), "attn_k": (KV * WIDTH // HEADS, WIDTH), "attn_v": (KV * WIDTH // HEADS, WIDTH),
    "attn_output": (WIDTH, WIDTH), "ffn_gate": (FF, WIDTH), "ffn_up": (FF, WIDTH), "ffn_down": (WIDTH, FF),
}
KINDS = {"attn_q": T.Q8_0, "attn_k": T.Q4_0, "attn_v": T.Q8_0, "attn_output": T.Q4_0,
         "ffn_gate": T.Q8_0, "ffn_up": T.Q4_0, "ffn_down": T.Q8_0}


def converter_permute(w: np.ndarray, heads: int) -> np.ndarray:
    rows = w.shape[0]
    return w.reshape(heads, 2, rows // heads // 2, *w.shape[1:]).swapaxes(1, 2).reshape(w.shape)


def _float_model(folder: Path, rng: np.random.Generator) -> dict[str, np.ndarray]:
    tensors: dict[str, np.ndarray] = {
        "model.embed_tokens.weight": (0.02 * rng.standard_normal((VOCAB, WIDTH))).astype(np.float32),
        "lm_head.weight": (0.02 * rng.standard_normal((VOCAB, WIDTH))).astype(np.float32),
        "model.norm.weight": np.ones(WIDTH, np.float32),
    }
    for b in range(BLOCKS):
        for leaf, (rows, cols) in SHAPES.items():
            tensors[f"model.layers.{b}.{HF_LEAVES[leaf]}.weight"] = (
                rng.standard_normal((rows, cols)) / np.sqrt(cols)
            ).astype(np.float32)
        tensors[f"model.layers.{b}.input_layernorm.weight"] = np.ones(WIDTH, np.float32)
        tensors[f"model.layers.{b}.post_attention_layernorm.weight"] = np.ones(WIDTH, np.float32)
    folder.mkdir(parents=True, exist_ok=True)
    write_safetensors(folder / "model.safetensors", tensors)
    (folder / "config.json").write_text(json.dumps({
        "model_type": "llama", "architectures": ["LlamaForCausalLM"], "hidden_size": WIDTH,
        "intermediate_size": FF, "num_attention_heads": HEADS, "num_key_value_heads": KV,
        "num_hidden_layers": BLOCKS, "vocab_size": VOCAB, "hidden_act": "silu",
        "tie_word_embeddings": False,
    }))
    return tensors


def _export(path: Path, tensors: dict[str, np.ndarray], permute: bool, flatten: int | None) -> dict[str, np.ndarray]:
    """Write the GGUF export; returns what each GGUF weight dequantizes to (GGUF names)."""
    writer = gguf.GGUFWriter(path, "llama")
    writer.add_block_count(BLOCKS)
    writer.add_context_length(128)
    writer.add_embedding_length(WIDTH)
    writer.add_feed_forward_length(FF)
    writer.add_head_count(HEADS)
    writer.add_head_count_kv(KV)
    writer.add_layer_norm_rms_eps(1e-5)
    decoded: dict[str, np.ndarray] = {}

    def put(name: str, values: np.ndarray, kind: T) -> None:
        raw = gguf.quants.quantize(values.astype(np.float32), kind)
        writer.add_tensor(name, raw, raw_dtype=kind)
        decoded[name] = gguf.quants.dequantize(raw, kind).reshape(values.shape)

    put("token_embd.weight", tensors["model.embed_tokens.weight"], T.Q8_0)
    for b in range(BLOCKS):
        writer.add_tensor(f"blk.{b}.attn_norm.weight", tensors[f"model.layers.{b}.input_layernorm.weight"])
        for leaf in SHAPES:
            values = tensors[f"model.layers.{b}.{HF_LEAVES[leaf]}.weight"].copy()
            if permute and leaf in ("attn_q", "attn_k"):
                values = converter_permute(values, HEADS if leaf == "attn_q" else KV)
            if flatten is not None and b == 1 and leaf == "ffn_up":
                values[flatten] = 0.0  # a row the export destroyed
            put(f"blk.{b}.{leaf}.weight", values, KINDS[leaf])
        writer.add_tensor(f"blk.{b}.ffn_norm.weight", tensors[f"model.layers.{b}.post_attention_layernorm.weight"])
    writer.add_tensor("output_norm.weight", tensors["model.norm.weight"])
    put("output.weight", tensors["lm_head.weight"], T.Q8_0)
    writer.write_header_to_file()
    writer.write_kv_data_to_file()
    writer.write_tensors_to_file()
    writer.close()
    return decoded


@pytest.mark.parametrize("permute", [True, False], ids=["converter-order", "stored-order"])
def test_float_against_its_gguf_export(tmp_path: Path, permute: bool) -> None:
    rng = np.random.default_rng(17)
    tensors = _float_model(tmp_path / "hf", rng)
    decoded = _export(tmp_path / "model.gguf", tensors, permute=permute, flatten=5)
    report = steelyard.compare(tmp_path / "hf", tmp_path / "model.gguf", policy=steelyard.policy.Policy())
    layers = {d.name: d for d in report.comparison.layers}
    statuses = {d.status.value for d in layers.values()}
    assert "added" not in statuses and "removed" not in statuses, statuses  # every layer paired by name
    for b in range(BLOCKS):
        for leaf in SHAPES:
            diff = layers[f"blk.{b}.{leaf}"]
            original = tensors[f"model.layers.{b}.{HF_LEAVES[leaf]}.weight"].astype(np.float64)
            exported = decoded[f"blk.{b}.{leaf}.weight"].astype(np.float64)
            if permute and leaf in ("attn_q", "attn_k"):
                order = converter_permute(np.arange(original.shape[0]), HEADS if leaf == "attn_q" else KV)
                original = original[order]
                assert "reordered by the GGUF converter" in diff.note
            else:
                assert "converter" not in diff.note
            error = exported - original
            assert diff.relative_change == pytest.approx(np.linalg.norm(error) / np.linalg.norm(original), rel=1e-5)
            assert diff.max_abs_change == pytest.approx(np.abs(error).max(), rel=1e-5)
            assert diff.stored_new == KINDS[leaf].name and diff.stored_old == "f32"
            # Q8_0 keeps ~0.4 % of the weights' norm, Q4_0 ~ 7 % (ggml block formats)
            assert diff.relative_change < (0.02 if KINDS[leaf] is T.Q8_0 else 0.15)
            assert not diff.permuted
    assert layers["blk.1.ffn_up"].rows_flattened == (5,)
    assert all(not d.rows_flattened for n, d in layers.items() if n != "blk.1.ffn_up")


def test_merged_low_rank_update_has_its_rank(tmp_path: Path) -> None:
    """A base and the same model with rank-r updates merged into some projections (as a
    merged LoRA fine-tune is): the effective rank of each update is r, exactly (SVD) on
    small layers and through the randomized range finder on a larger one."""
    rng = np.random.default_rng(23)
    base = {
        "fc1.weight": (rng.standard_normal((48, 40)) / 7).astype(np.float32),
        "fc2.weight": (rng.standard_normal((600, 48)) / 7).astype(np.float32),
        "fc3.weight": (rng.standard_normal((520, 600)) / 25).astype(np.float32),
        "fc4.weight": (rng.standard_normal((10, 520)) / 23).astype(np.float32),
    }
    ranks = {"fc1": 3, "fc3": 8}
    tuned = {k: v.copy() for k, v in base.items()}
    for name, r in ranks.items():
        w = tuned[f"{name}.weight"]
        b_factor = rng.standard_normal((w.shape[0], r)).astype(np.float32)
        a_factor = rng.standard_normal((r, w.shape[1])).astype(np.float32)
        tuned[f"{name}.weight"] = w + 0.01 * (b_factor @ a_factor) / np.sqrt(r)
    old = write_safetensors(tmp_path / "base.safetensors", base)
    new = write_safetensors(tmp_path / "tuned.safetensors", tuned)
    report = steelyard.compare(old, new, policy=steelyard.policy.Policy())
    layers = {d.name: d for d in report.comparison.layers}
    # numpy's SVD of the update is the reference for what r directions hold 99 %
    for name, r in ranks.items():
        delta = tuned[f"{name}.weight"].astype(np.float64) - base[f"{name}.weight"]
        s = np.linalg.svd(delta, compute_uv=False)
        expected = int(np.searchsorted(np.cumsum(s**2), 0.99 * np.sum(s**2) * (1 - 1e-9))) + 1
        assert expected <= r
        assert layers[name].update_rank == expected and layers[name].update_rank_above is None
    assert layers["fc2"].update_rank is None and layers["fc4"].update_rank is None  # untouched


def test_full_rank_noise_is_reported_above_the_limit(tmp_path: Path) -> None:
    rng = np.random.default_rng(29)
    base = {"fc1.weight": rng.standard_normal((700, 600)).astype(np.float32),
            "fc2.weight": rng.standard_normal((8, 700)).astype(np.float32)}
    noisy = {k: v + 0.01 * rng.standard_normal(v.shape).astype(np.float32) for k, v in base.items()}
    report = steelyard.compare(
        write_safetensors(tmp_path / "a.safetensors", base), write_safetensors(tmp_path / "b.safetensors", noisy),
        policy=steelyard.policy.Policy(),
    )
    fc1 = next(d for d in report.comparison.layers if d.name == "fc1")
    assert fc1.update_rank is None and fc1.update_rank_above == 64
