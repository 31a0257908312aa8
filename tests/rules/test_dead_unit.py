"""``dead-unit`` reports a channel dead across a pointwise and a depthwise convolution once.

A depthwise convolution (groups = channels, one input channel per group) computes output
channel o from input channel o // multiplier alone (PyTorch ``nn.Conv2d`` with
``groups=in_channels``; ONNX Conv with ``group`` = C and W of shape (M, 1, kH, kW), per the
ONNX operator specification). So a dead channel shows in both layers: a zero depthwise filter
makes the producer's unit *unused*; a constant producer unit makes the depthwise channel
*never active* once interval bounds are propagated. The files are written with the
``safetensors`` package (PyTorch names and layouts) and with ``onnx.helper``; the planted
channels are the expected answer.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper
from safetensors.numpy import save_file

from steelyard.checkpoint_audit import run_rules
from steelyard.findings import Finding
from steelyard.loaders import load
from steelyard.policy import Policy
from steelyard.rules.dead_unit import RULE


def _run(path: Path, policy: Policy | None = None, jobs: int = 1) -> dict[str, Finding]:
    findings, _, _ = run_rules(load(path), policy or Policy(), None, rules={RULE.name: RULE}, jobs=jobs)
    by_layer = {f.layer: f for f in findings if f.layer is not None}
    assert len(by_layer) == len(findings)  # one finding per layer
    return by_layer


def _pytorch_block(tmp_path: Path, dead_filters: list[int], dead_rows: list[int]) -> Path:
    """features.0 = 1x1 conv 8→16, features.1 = depthwise 3x3 on 16 channels, features.2 =
    1x1 conv 16→10 (a MobileNet-style block under nn.Sequential names)."""
    rng = np.random.default_rng(0)
    pointwise = rng.normal(size=(16, 8, 1, 1)).astype(np.float32)
    depthwise = rng.normal(size=(16, 1, 3, 3)).astype(np.float32)
    project = rng.normal(size=(10, 16, 1, 1)).astype(np.float32)
    depthwise[dead_filters] = 0.0
    pointwise[dead_rows] = 0.0
    path = tmp_path / "block.safetensors"
    save_file(
        {
            "features.0.weight": pointwise,
            "features.0.bias": np.zeros(16, np.float32),
            "features.1.weight": depthwise,
            "features.1.bias": np.zeros(16, np.float32),
            "features.2.weight": project,
        },
        str(path),
    )
    return path


def test_zero_depthwise_filters_are_reported_once_at_the_depthwise(tmp_path: Path) -> None:
    path = _pytorch_block(tmp_path, dead_filters=[3, 7], dead_rows=[5])
    found = _run(path)
    depthwise = found["features.1"]
    assert depthwise.units == (3, 7)
    assert depthwise.evidence["constant"] == [3, 7]
    # The pointwise units 3 and 7 are unused only because their sole readers are the dead
    # filters: the same problem, referenced instead of reported again.
    assert depthwise.evidence["also_dead_upstream"] == {"features.0": [3, 7]}
    pointwise = found["features.0"]
    assert pointwise.units == (5,)  # its own zero row stays its own finding
    assert "unused" not in pointwise.evidence
    assert set().union(*(set(f.units) for f in found.values())) == {3, 5, 7}
    # the same for any thread count
    assert _run(path, jobs=3) == found


def test_a_healthy_block_has_no_echo_findings(tmp_path: Path) -> None:
    assert _run(_pytorch_block(tmp_path, dead_filters=[], dead_rows=[])) == {}


def _onnx_block(
    tmp_path: Path, dead_rows: list[int], zero_filters: list[int], negative_filters: list[int]
) -> Path:
    """x → Conv 1x1 (8→6) → Relu → depthwise Conv 3x3 (group 6) → Relu → Conv 1x1 (6→4).
    Pointwise units ``dead_rows`` are zero rows; depthwise channels ``zero_filters`` have zero
    filters, and ``negative_filters`` non-positive filters (every depthwise bias is −0.5, and
    the Relu before makes every input non-negative, so such a channel is never active)."""
    rng = np.random.default_rng(1)
    pointwise = rng.normal(size=(6, 8, 1, 1)).astype(np.float32)
    pointwise[dead_rows] = 0.0
    depthwise = np.abs(rng.normal(size=(6, 1, 3, 3))).astype(np.float32)
    depthwise[zero_filters] = 0.0
    depthwise[negative_filters] *= -1.0
    weights = {
        "pw.w": pointwise,
        "pw.b": np.zeros(6, np.float32),
        "dw.w": depthwise,
        "dw.b": np.full(6, -0.5, np.float32),
        "proj.w": rng.normal(size=(4, 6, 1, 1)).astype(np.float32),
    }
    nodes = [
        helper.make_node("Conv", ["x", "pw.w", "pw.b"], ["a"], name="pw"),
        helper.make_node("Relu", ["a"], ["b"]),
        helper.make_node("Conv", ["b", "dw.w", "dw.b"], ["c"], name="dw", group=6, pads=[1, 1, 1, 1]),
        helper.make_node("Relu", ["c"], ["d"]),
        helper.make_node("Conv", ["d", "proj.w"], ["y"], name="proj"),
    ]
    graph = helper.make_graph(
        nodes,
        "block",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, 8, 5, 5])],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, 4, 5, 5])],
        initializer=[numpy_helper.from_array(v, k) for k, v in weights.items()],
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    onnx.checker.check_model(model, full_check=True)  # reference: onnx's checker and shapes
    path = tmp_path / "block.onnx"
    path.write_bytes(model.SerializeToString())
    return path


def _names(path: Path) -> tuple[str, str]:
    layers = load(path).layers
    dw = next(layer for layer in layers if layer.weight == "dw.w")
    pw = next(layer for layer in layers if layer.weight == "pw.w")
    # the loader sees the depthwise structure the tests rely on
    assert (dw.groups, dw.in_per_group, dw.inputs_from) == (6, 1, (pw.name,))
    return pw.name, dw.name


def test_onnx_zero_depthwise_filters_are_reported_once(tmp_path: Path) -> None:
    path = _onnx_block(tmp_path, dead_rows=[], zero_filters=[2, 5], negative_filters=[])
    pw, dw = _names(path)
    found = _run(path)
    assert found[dw].units == (2, 5)
    assert found[dw].evidence["also_dead_upstream"] == {pw: [2, 5]}
    assert pw not in found  # units 2 and 5 of the pointwise were only unused


def test_dead_pointwise_units_are_reported_once_with_the_depthwise_channels(tmp_path: Path) -> None:
    # Pointwise units 1 and 4 are zero rows; depthwise channels 1 and 4, which read only
    # them, are never active; depthwise channel 3 is never active on its own account.
    path = _onnx_block(tmp_path, dead_rows=[1, 4], zero_filters=[], negative_filters=[1, 3, 4])
    pw, dw = _names(path)
    found = _run(path)
    origin = found[pw]
    assert origin.units == (1, 4)
    assert origin.evidence["constant"] == [1, 4]
    assert origin.evidence["also_dead_downstream"] == {dw: [1, 4]}
    assert found[dw].units == (3,)
    assert found[dw].evidence["never-active"] == [3]
    assert _run(path, jobs=2) == found
