"""Attention heads of an ONNX export: the planted BERT fixture exported by torch's ONNX
exporter (``fixtures/gen_transformer_onnx.py``), with its config.json beside it. The heads
are recognised through the weights' module names and judged like the safetensors original:
the planted idle and twin heads (``planted.json``) are found in both."""

from __future__ import annotations

import json
from pathlib import Path

import steelyard
from steelyard.policy import Policy

BERT = Path(__file__).resolve().parents[2] / "fixtures" / "transformers_heads" / "bert"


def _heads(path: Path) -> set[tuple[str, str, tuple[int, ...]]]:
    report = steelyard.audit(path, policy=Policy())
    found = set()
    for f in report.findings:
        if f.rule == "head-circuits":
            heads = tuple(int(h) for h in f.part.removeprefix("heads ").removeprefix("head ").split(","))
            found.add((str(f.evidence["block"]), "twin" if len(heads) > 1 else "one", heads))
    return found


def test_onnx_export_has_the_originals_heads() -> None:
    checkpoint = steelyard.load(BERT / "planted_onnx" / "model.onnx")
    assert checkpoint.transformer is not None
    blocks = {b.name: b for b in checkpoint.transformer.attention}
    assert sorted(blocks) == ["bert.encoder.layer.0.attention.self", "bert.encoder.layer.1.attention.self"]
    layer_names = {layer.name for layer in checkpoint.layers}
    for block in blocks.values():
        assert len(block.heads) == 4
        assert all(h.q.layer in layer_names and h.o.layer in layer_names for h in block.heads)


def test_planted_heads_are_found_in_the_onnx_export_as_in_the_original() -> None:
    planted = json.loads((BERT / "planted.json").read_text())
    onnx_heads = _heads(BERT / "planted_onnx" / "model.onnx")
    assert onnx_heads == _heads(BERT / "planted" / "model.safetensors")
    for idle in planted["idle_heads"]:
        assert (idle["block"], "one", (idle["head"],)) in onnx_heads
    for twins in planted["twin_heads"]:
        assert (twins["block"], "twin", tuple(twins["heads"])) in onnx_heads
