"""The transformer structure (heads, key/value heads, experts) against the models' own semantics.

Ground truth: ``fixtures/transformers_heads/*/expected_heads.json``, measured by the fixture
writer on the ``transformers`` model objects themselves (perturbing each run of rows and seeing
which heads' attention probabilities or which output-projection input blocks move), and
``expected_experts.json`` from the MoE modules' own parameters. The GGUF copies were written with
the ``gguf`` package's writer and are read back through steelyard's loader.
"""

from __future__ import annotations

import json
from itertools import pairwise
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from safetensors.numpy import save_file

from steelyard import tiled_copy
from steelyard.loaders import load
from steelyard.transformer.model import AttentionBlock

HEADS = Path(__file__).resolve().parents[2] / "fixtures" / "transformers_heads"
MODELS = ("moe_decoder", "gpt2", "bert")


def _expected(model: str) -> dict[str, Any]:
    return json.loads((HEADS / model / "expected_heads.json").read_text())  # type: ignore[no-any-return]


def _spans(block: AttentionBlock) -> list[dict[str, Any]]:
    return [
        {"head": h.index, "q": [h.q.start, h.q.stop], "k": [h.k.start, h.k.stop],
         "v": [h.v.start, h.v.stop], "o": [h.o.start, h.o.stop]}
        for h in block.heads
    ]


@pytest.mark.parametrize("model", MODELS)
@pytest.mark.parametrize("variant", ["clean", "planted"])
def test_heads_match_the_model_objects(model: str, variant: str) -> None:
    checkpoint = load(HEADS / model / variant)
    structure = checkpoint.transformer
    assert structure is not None and structure.source == "config.json"
    expected = _expected(model)
    assert [b.name for b in structure.attention] == list(expected)
    for block in structure.attention:
        truth = expected[block.name]
        assert len(block.heads) == truth["heads"]
        assert block.kv_heads == truth["kv_heads"]
        assert block.head_dim == truth["head_dim"]
        assert _spans(block) == truth["map"]


def test_family_and_fused_layout() -> None:
    # Families from the model type (common practice, no source); GPT-2's c_attn is q|k|v
    # (transformers GPT2Attention splits it with .split(split_size, dim=2)).
    assert load(HEADS / "gpt2" / "clean").transformer.family == "decoder"  # type: ignore[union-attr]
    assert load(HEADS / "bert" / "clean").transformer.family == "encoder"  # type: ignore[union-attr]
    gpt2 = load(HEADS / "gpt2" / "clean").transformer
    assert gpt2 is not None and all(b.fused == "q|k|v" for b in gpt2.attention)
    assert gpt2.tied_embeddings is True  # GPT-2 ties lm_head to wte (config tie_word_embeddings)
    moe = load(HEADS / "moe_decoder" / "clean").transformer
    assert moe is not None and moe.tied_embeddings is False
    assert "model.norm.weight" in moe.norm_gains


def test_gguf_heads_and_experts_from_metadata() -> None:
    # The GGUF copy holds the same weights under llama.cpp names; its query/key rows were
    # reordered within each head for the rotary layout (convert_hf_to_gguf LlamaModel.permute),
    # which leaves head membership unchanged.
    structure = load(HEADS / "moe_decoder" / "planted.gguf").transformer
    assert structure is not None and structure.source == "GGUF metadata"
    expected = _expected("moe_decoder")
    for block, truth in zip(structure.attention, expected.values(), strict=True):
        assert block.kv_heads == truth["kv_heads"] and block.head_dim == truth["head_dim"]
        assert _spans(block) == truth["map"]
    experts = json.loads((HEADS / "moe_decoder" / "expected_experts.json").read_text())
    assert [len(b.experts) for b in structure.experts] == [e["experts"] for e in experts.values()]
    assert [b.router for b in structure.experts] == ["blk.0.ffn_gate_inp", "blk.1.ffn_gate_inp"]
    assert {p.role for p in structure.experts[0].experts[0].parts} == {"gate", "up", "down"}


def test_stacked_experts_match_the_moe_modules() -> None:
    structure = load(HEADS / "moe_decoder" / "clean").transformer
    assert structure is not None
    expected = json.loads((HEADS / "moe_decoder" / "expected_experts.json").read_text())
    assert [b.name for b in structure.experts] == list(expected)
    for block in structure.experts:
        truth = expected[block.name]
        assert len(block.experts) == truth["experts"] and block.router == truth["router"]
        assert block.top_k == truth["top_k"]
        for expert in block.experts:
            # One layer per expert slice of each stack (loaders/stacked_experts.py).
            assert {p.tensor for p in expert.parts} == set(truth["stacks"])
            assert {p.layer for p in expert.parts} == {
                f"{block.name}.experts.{expert.index}.{t.rsplit('.', 1)[1]}" for t in truth["stacks"]
            }
    checkpoint = load(HEADS / "moe_decoder" / "clean")
    layer = checkpoint.layer("model.layers.1.mlp.experts.2.gate_up_proj")
    stack = checkpoint.tensors["model.layers.1.mlp.experts.gate_up_proj"]
    assert layer is not None and (layer.units, layer.fan_in) == tuple(stack.shape[1:])
    assert np.array_equal(layer.matrix(), stack.read_float32()[2])
    assert layer.orient is not None and np.array_equal(layer.orient(stack.read_float32()), stack.read_float32()[2])


def legacy_experts(source: Path, target: Path) -> Path:
    """The MoE decoder in the per-expert layout transformers' save_pretrained writes for
    Mixtral (``block_sparse_moe.experts.<e>.w1/w3/w2``; w1 is the gate, w3 the up projection,
    the first and second halves of gate_up_proj)."""
    import ml_dtypes  # noqa: F401
    from safetensors.numpy import load_file

    state = load_file(str(source / "model.safetensors"))
    out: dict[str, np.ndarray] = {}
    for name, value in state.items():
        value = np.asarray(value, dtype=np.float32)
        if ".mlp.experts." in name:
            block = name.split(".mlp.")[0] + ".block_sparse_moe.experts"
            inner = value.shape[1] // 2
            for e in range(value.shape[0]):
                if name.endswith("gate_up_proj"):
                    out[f"{block}.{e}.w1.weight"] = np.ascontiguousarray(value[e, :inner])
                    out[f"{block}.{e}.w3.weight"] = np.ascontiguousarray(value[e, inner:])
                else:
                    out[f"{block}.{e}.w2.weight"] = np.ascontiguousarray(value[e])
        else:
            out[name.replace(".mlp.gate.", ".block_sparse_moe.gate.")] = value
    target.mkdir(parents=True, exist_ok=True)
    save_file(out, str(target / "model.safetensors"))
    (target / "config.json").write_text((source / "config.json").read_text())
    return target


def test_per_expert_modules_are_recognised(tmp_path: Path) -> None:
    folder = legacy_experts(HEADS / "moe_decoder" / "planted", tmp_path / "legacy")
    structure = load(folder).transformer
    assert structure is not None
    assert [b.name for b in structure.experts] == ["model.layers.0.block_sparse_moe", "model.layers.1.block_sparse_moe"]
    block = structure.experts[0]
    assert block.router == "model.layers.0.block_sparse_moe.gate"
    assert [sorted(p.role for p in e.parts) for e in block.experts] == [["down", "gate", "up"]] * 4


def _config(folder: Path, **values: Any) -> None:
    (folder / "config.json").write_text(json.dumps(values))


def _write(folder: Path, tensors: dict[str, tuple[int, ...]], **config: Any) -> Path:
    rng = np.random.default_rng(0)
    folder.mkdir(parents=True, exist_ok=True)
    save_file({k: rng.standard_normal(s).astype(np.float32) for k, s in tensors.items()}, str(folder / "model.safetensors"))
    if config:
        _config(folder, **config)
    return folder


@pytest.mark.parametrize(("heads", "kv", "dim"), [(8, 8, 16), (8, 2, 16), (6, 1, 8), (12, 4, 4)])
def test_grouped_and_multi_query_heads_in_several_shapes(tmp_path: Path, heads: int, kv: int, dim: int) -> None:
    # Query head h reads key/value head h // (H/G): transformers' repeat_kv repeats each key/value
    # head for consecutive query heads (modeling_llama.repeat_kv; cited from memory).
    width = 48
    p = "model.layers.0.self_attn."
    folder = _write(tmp_path / "m", {p + "q_proj.weight": (heads * dim, width), p + "k_proj.weight": (kv * dim, width),
                                     p + "v_proj.weight": (kv * dim, width), p + "o_proj.weight": (width, heads * dim)},
                    model_type="llama", num_attention_heads=heads, num_key_value_heads=kv, head_dim=dim, hidden_size=width)
    block = load(folder).transformer.attention[0]  # type: ignore[union-attr]
    group = heads // kv
    for h in block.heads:
        assert (h.q.start, h.k.start, h.o.start) == (h.index * dim, (h.index // group) * dim, h.index * dim)
        assert h.o.axis == "columns"


@pytest.mark.parametrize(("model_type", "extra", "layout"), [
    ("gpt_neox", {}, "per-head"),
    ("falcon", {"new_decoder_architecture": True, "num_kv_heads": 2}, "per-group"),
    ("falcon", {"multi_query": True}, "q|k|v"),
])
def test_fused_query_key_value_layouts(tmp_path: Path, model_type: str, extra: dict[str, Any], layout: str) -> None:
    # Layouts from the transformers attention classes (cited from memory): GPT-NeoX views the
    # fused rows as [H, 3·d_h] (q, k, v per head); Falcon's new architecture as
    # [G, H/G + 2, d_h] (the group's queries, then its key and value); multi-query Falcon as
    # [q (H·d_h) | k (d_h) | v (d_h)].
    heads, dim, width = 4, 8, 32
    kv = {"per-head": heads, "per-group": 2, "q|k|v": 1}[layout]
    p = "gpt_neox.layers.0.attention." if model_type == "gpt_neox" else "transformer.h.0.self_attention."
    folder = _write(tmp_path / "m", {p + "query_key_value.weight": ((heads + 2 * kv) * dim, width), p + "dense.weight": (width, width)},
                    model_type=model_type, num_attention_heads=heads, hidden_size=width, **extra)
    block = load(folder).transformer.attention[0]  # type: ignore[union-attr]
    assert block.fused == layout and block.kv_heads == kv
    rows = [(h.q.start, h.k.start, h.v.start) for h in block.heads]
    if layout == "per-head":
        assert rows == [(24 * h, 24 * h + 8, 24 * h + 16) for h in range(4)]
    elif layout == "per-group":
        assert rows == [(0, 16, 24), (8, 16, 24), (32, 48, 56), (40, 48, 56)]
    else:
        assert rows == [(0, 32, 40), (8, 32, 40), (16, 32, 40), (24, 32, 40)]


def test_no_head_count_is_a_note_not_a_guess(tmp_path: Path) -> None:
    p = "model.layers.0.self_attn."
    folder = _write(tmp_path / "m", {p + f"{x}_proj.weight": (32, 32) for x in "qkvo"})
    checkpoint = load(folder)
    assert checkpoint.transformer is not None and checkpoint.transformer.attention == ()
    assert any("no head count" in note for note in checkpoint.notes)


def test_layers_json_carries_unit_groups() -> None:
    from steelyard.inventory import LAYERS_SCHEMA, layers_document

    document = layers_document(load(HEADS / "gpt2" / "clean"))
    assert document["schema"] == LAYERS_SCHEMA == "steelyard.layers/1"
    layers = {layer["name"]: layer for layer in document["layers"]}
    fused = layers["transformer.h.0.attn.c_attn"]["unit_groups"]
    assert [(g["kind"], g["part"], g["index"], g["start"]) for g in fused if g["part"] == "v"] == [
        ("kv-head", "v", h, 64 + 8 * h) for h in range(4)
    ]
    out = layers["transformer.h.0.attn.c_proj"]["unit_groups"]
    assert {(g["axis"], g["part"]) for g in out} == {("columns", "o")}
    assert layers["transformer.h.0.mlp.c_fc"]["unit_groups"] == []


@pytest.mark.parametrize(("names", "config", "blocks"), [
    # T5: SelfAttention/EncDecAttention q, k, v, o with an inner width num_heads·d_kv unlike d_model.
    ({"encoder.block.0.layer.0.SelfAttention.": (6, 10, 40), "decoder.block.0.layer.1.EncDecAttention.": (6, 10, 40)},
     {"model_type": "t5", "num_heads": 6, "d_kv": 10, "d_model": 40}, "encoder-decoder"),
    # BART: different head counts in the encoder and decoder (encoder_/decoder_attention_heads).
    ({"model.encoder.layers.0.self_attn.": (4, 8, 32), "model.decoder.layers.0.encoder_attn.": (2, 16, 32)},
     {"model_type": "bart", "encoder_attention_heads": 4, "decoder_attention_heads": 2, "d_model": 32}, "encoder-decoder"),
    # ViT: attention.attention.query/key/value with attention.output.dense.
    ({"vit.encoder.layer.0.attention.attention.": (3, 16, 48)},
     {"model_type": "vit", "num_attention_heads": 3, "hidden_size": 48}, "vision"),
])
def test_other_families(tmp_path: Path, names: dict[str, tuple[int, int, int]], config: dict[str, Any], blocks: str) -> None:
    # Module names and count keys of the transformers T5, BART and ViT classes (cited from memory).
    tensors: dict[str, tuple[int, ...]] = {}
    for prefix, (heads, dim, width) in names.items():
        leaves = ("q", "k", "v", "o") if "Attention." in prefix else ("q_proj", "k_proj", "v_proj", "out_proj")
        if prefix.startswith("vit"):
            leaves = ("query", "key", "value", "../output.dense")
        for leaf in leaves:
            inner = heads * dim
            name = prefix + leaf if not leaf.startswith("..") else prefix.rsplit(".", 2)[0] + ".output.dense"
            tensors[name + ".weight"] = (width, inner) if leaf in ("o", "out_proj") or leaf.startswith("..") else (inner, width)
    structure = load(_write(tmp_path / "m", tensors, **config)).transformer
    assert structure is not None and structure.family == blocks
    found = {b.name: (len(b.heads), b.head_dim) for b in structure.attention}
    assert found == {prefix[:-1]: (heads, dim) for prefix, (heads, dim, _) in names.items()}


def test_stacked_experts_stored_in_out(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # GPT-OSS stores gate_up_proj as [experts, in, out] with a bias [experts, out] (its
    # modeling code multiplies x @ gate_up_proj[e]; cited from memory): the partner shapes
    # (gate_up [E, d, 2I], down [E, I, d]) tell the orientation.
    rng = np.random.default_rng(5)
    experts, width, inner = 3, 16, 8
    tensors = {
        "model.layers.0.mlp.experts.gate_up_proj": rng.standard_normal((experts, width, 2 * inner)).astype(np.float32),
        "model.layers.0.mlp.experts.gate_up_proj_bias": rng.standard_normal((experts, 2 * inner)).astype(np.float32),
        "model.layers.0.mlp.experts.down_proj": rng.standard_normal((experts, inner, width)).astype(np.float32),
        "model.layers.0.mlp.router.weight": rng.standard_normal((experts, width)).astype(np.float32),
    }
    folder = tmp_path / "m"
    folder.mkdir()
    save_file(tensors, str(folder / "model.safetensors"))
    checkpoint = load(folder)
    layer = checkpoint.layer("model.layers.0.mlp.experts.1.gate_up_proj")
    assert layer is not None and (layer.units, layer.fan_in) == (2 * inner, width)
    assert np.array_equal(layer.matrix(), tensors["model.layers.0.mlp.experts.gate_up_proj"][1].T)
    assert np.array_equal(layer.bias_vector(), tensors["model.layers.0.mlp.experts.gate_up_proj_bias"][1])  # type: ignore[arg-type]
    down = checkpoint.layer("model.layers.0.mlp.experts.2.down_proj")
    assert down is not None and (down.units, down.fan_in) == (width, inner)
    # Each expert is read by its stored rows, slab by slab, and transposed into place: with a
    # budget of two stored rows per slab the values are still the stored ones, every expert.
    monkeypatch.setattr(tiled_copy, "SLAB_BYTES", 2 * 4 * 2 * inner)
    stack = tensors["model.layers.0.mlp.experts.gate_up_proj"]
    for expert in range(experts):
        sliced = checkpoint.layer(f"model.layers.0.mlp.experts.{expert}.gate_up_proj")
        assert sliced is not None and np.array_equal(sliced.matrix(), stack[expert].T)
    block = checkpoint.transformer.experts[0]  # type: ignore[union-attr]
    assert block.router == "model.layers.0.mlp.router" and len(block.experts) == experts


@pytest.mark.parametrize("config", [
    {"model_type": "llama", "num_attention_heads": "eight"},
    {"model_type": "llama", "num_attention_heads": -4, "num_key_value_heads": 0},
    {"model_type": "llama", "num_attention_heads": 10**15, "head_dim": 10**15},
    {"model_type": "llama", "num_attention_heads": 3, "num_key_value_heads": 3},
    {"model_type": "llama", "num_attention_heads": True, "text_config": [1, 2]},
    {"model_type": ["llama"], "num_attention_heads": 64, "head_dim": 1},
    {"model_type": "gpt2", "n_head": 100},
])
def test_hostile_counts_are_notes(tmp_path: Path, config: dict[str, Any]) -> None:
    # Counts that contradict the shapes (or are not counts) recognise nothing, in bounded time,
    # and say so; the file still loads (the counts are advice, the shapes are the facts).
    p = "model.layers.0.self_attn."
    tensors = {p + f"{x}_proj.weight": (32, 32) for x in "qkvo"} | {"transformer.h.0.attn.c_attn.weight": (32, 96),
                                                                   "transformer.h.0.attn.c_proj.weight": (32, 32)}
    checkpoint = load(_write(tmp_path / "m", tensors, **config))
    structure = checkpoint.transformer
    assert structure is not None and structure.attention == ()
    assert structure.notes and all(note in checkpoint.notes for note in structure.notes)


def test_units_column_names_the_head() -> None:
    from steelyard.api import audit
    from steelyard.render.markdown import render_markdown as render

    text = render(audit(HEADS / "gpt2" / "planted"))
    assert "| head 2 |" in text and "| heads 0,3 |" in text


def test_fused_gate_up_halves(tmp_path: Path) -> None:
    # Phi-3 stores gate and up as one gate_up_proj [2I, d], gate first (transformers
    # Phi3MLP: gate, up = gate_up_proj(x).chunk(2); cited from memory); down_proj reads I.
    p = "model.layers.0.mlp."
    folder = _write(tmp_path / "m", {p + "gate_up_proj.weight": (48, 16), p + "down_proj.weight": (16, 24),
                                     "model.layers.1.mlp.gate_up_proj.weight": (48, 16),
                                     "model.layers.1.mlp.down_proj.weight": (16, 48)}, model_type="phi3")
    checkpoint = load(folder)
    assert checkpoint.transformer is not None
    assert checkpoint.transformer.fused_gate_up == (p + "gate_up_proj",)  # layer 1 reads all 48: not fused
    halves = checkpoint.unit_groups[p + "gate_up_proj"]
    assert [(g.part, g.start, g.stop) for g in halves] == [("gate", 0, 24), ("up", 24, 48)]


def test_stacked_expert_layers_are_capped(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # A header claiming many tiny stacks must not turn into unbounded layers: past the file's
    # quota the stacks stay whole (common practice for hostile inputs, no source).
    from steelyard.loaders import stacked_experts

    monkeypatch.setattr(stacked_experts, "MAX_EXPERT_LAYERS", 10)
    folder = _write(tmp_path / "m", {f"m.layers.{i}.mlp.experts.down_proj": (4, 2, 2) for i in range(5)})
    layers = [layer for layer in load(folder).layers if ".experts." in layer.name]
    assert len(layers) == 8  # two stacks of 4 fit in 10, the third would not


def test_recognised_heads_always_tile_their_projections() -> None:
    # Property: whatever the counts and shapes, recognition never raises, and a block it
    # accepts has query rows and output columns tiled exactly by its heads, and key/value
    # rows tiled by its key/value heads (names and shapes only: no file needed).
    from hypothesis import given, settings
    from hypothesis import strategies as st

    from steelyard.graph import Activation, Layer, LayerKind
    from steelyard.transformer import attention
    from steelyard.transformer.hyper import from_config

    def layer(name: str, units: int, fan_in: int) -> Layer:
        return Layer(name=name, kind=LayerKind.DENSE, weight=name + ".weight", bias=None, units=units,
                     in_per_group=fan_in, kernel=(), groups=1, activation=Activation.UNKNOWN,
                     weight_view=lambda: np.zeros((units, fan_in), np.float32))

    accepted = [0]
    wobble = st.sampled_from([0, 0, 0, 1, -1, 8])

    @settings(max_examples=300, deadline=None)
    @given(h=st.integers(1, 12), ratio=st.integers(1, 4), d=st.integers(1, 16), width=st.integers(1, 64),
           dq=wobble, dk=wobble, dv=wobble, do=wobble, fused=st.booleans(),
           give=st.sampled_from(["all", "heads", "none", "bad"]),
           model=st.sampled_from(["llama", "gpt_neox", "falcon", "gpt2", "bloom"]))
    def check(h: int, ratio: int, d: int, width: int, dq: int, dk: int, dv: int, do: int, fused: bool,
              give: str, model: str) -> None:
        heads = h * ratio
        kv = h
        config: dict[str, Any] = {"model_type": model}
        if give in ("all", "heads"):
            config["num_attention_heads"] = heads
        if give == "all":
            config |= {"num_key_value_heads": kv, "head_dim": d}
        if give == "bad":
            config |= {"num_attention_heads": -heads, "num_key_value_heads": "x", "head_dim": 0}
        q, k, v, o_in = (max(1, n) for n in (heads * d + dq, kv * d + dk, kv * d + dv, heads * d + do))
        if fused:
            layers = (layer("b.attn.query_key_value", q + k + v, width), layer("b.attn.dense", width, o_in))
        else:
            layers = (layer("b.attn.q_proj", q, width), layer("b.attn.k_proj", k, width),
                      layer("b.attn.v_proj", v, width), layer("b.attn.o_proj", width, o_in))
        notes: list[str] = []
        blocks = attention.find_blocks(layers, from_config(config), notes)
        assert blocks or notes or give == "none"
        for block in blocks:
            accepted[0] += 1
            by_layer = {lay.name: lay for lay in layers}
            o_cols = sorted((x.o.start, x.o.stop) for x in block.heads)
            assert o_cols[0][0] == 0 and o_cols[-1][1] == by_layer[block.heads[0].o.layer].fan_in
            assert all(a[1] == b[0] for a, b in pairwise(o_cols))
            rows = {(x.q.layer, x.q.start, x.q.stop) for x in block.heads}
            rows |= {(x.k.layer, x.k.start, x.k.stop) for x in block.heads}
            rows |= {(x.v.layer, x.v.start, x.v.stop) for x in block.heads}
            owners = {name for x in block.heads for name in (x.q.layer, x.k.layer, x.v.layer)}
            for name in owners:  # every row of every projection belongs to exactly one head
                runs = sorted((a, b) for owner, a, b in rows if owner == name)
                assert runs[0][0] == 0 and runs[-1][1] == by_layer[name].units
                assert all(a[1] == b[0] for a, b in pairwise(runs))
            assert len({x.kv_index for x in block.heads}) == block.kv_heads

    check()
    assert accepted[0] > 10  # the property was exercised on accepted blocks, not only on refusals


def test_shared_experts_and_switch_routers(tmp_path: Path) -> None:
    # Qwen2-MoE keeps an always-active mlp.shared_expert beside mlp.experts.<e> and the router
    # mlp.gate; Switch Transformers names experts expert_<e> with wi/wo and the router
    # router.classifier (module names of the transformers classes; cited from memory).
    tensors: dict[str, tuple[int, ...]] = {}
    for e in range(4):
        for leaf, shape in (("gate_proj", (8, 16)), ("up_proj", (8, 16)), ("down_proj", (16, 8))):
            tensors[f"model.layers.0.mlp.experts.{e}.{leaf}.weight"] = shape
    for leaf, shape in (("gate_proj", (8, 16)), ("up_proj", (8, 16)), ("down_proj", (16, 8))):
        tensors[f"model.layers.0.mlp.shared_expert.{leaf}.weight"] = shape
    tensors["model.layers.0.mlp.gate.weight"] = (4, 16)
    tensors["model.layers.0.mlp.shared_expert_gate.weight"] = (1, 16)
    for e in range(3):
        tensors[f"decoder.block.1.layer.2.mlp.experts.expert_{e}.wi.weight"] = (8, 16)
        tensors[f"decoder.block.1.layer.2.mlp.experts.expert_{e}.wo.weight"] = (16, 8)
    tensors["decoder.block.1.layer.2.mlp.router.classifier.weight"] = (3, 16)
    checkpoint = load(_write(tmp_path / "m", tensors, model_type="qwen2_moe", num_experts=4))
    blocks = {b.name: b for b in checkpoint.transformer.experts}  # type: ignore[union-attr]
    qwen, switch = blocks["model.layers.0.mlp"], blocks["decoder.block.1.layer.2.mlp"]
    assert qwen.router == "model.layers.0.mlp.gate" and len(qwen.experts) == 4
    assert len(qwen.shared) == 1 and sorted(p.role for p in qwen.shared[0].parts) == ["down", "gate", "up"]
    assert {g.kind for g in checkpoint.unit_groups["model.layers.0.mlp.shared_expert.up_proj"]} == {"shared-expert"}
    assert switch.router == "decoder.block.1.layer.2.mlp.router.classifier" and len(switch.experts) == 3
    assert [g.index for g in checkpoint.unit_groups[switch.router]] == [0, 1, 2]
