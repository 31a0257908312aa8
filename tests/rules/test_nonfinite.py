"""``nonfinite`` names the units holding NaN or ±Inf in any layer whose orientation is known.

References: ONNX files are written with ``onnx.helper`` and their weight layouts are those of
the ONNX operator specification (Conv: W is (M x C/group x kH x kW); ConvTranspose: W is
(C x M/group x kH x kW), output channel = group·(M/group) + j; Gemm: B is (K x N), or
(N x K) with transB = 1). Keras files are written with ``h5py`` in the Keras 2 layout, whose
kernels are documented by Keras: Conv2D (kh, kw, in, filters), DepthwiseConv2D
(kh, kw, in, multiplier) with output channel c·multiplier + q (TensorFlow's
``depthwise_conv2d``: ``output[b, i, j, k * channel_multiplier + q]``), Conv2DTranspose
(kh, kw, filters, in), Dense (in, units). The expected units are numpy's positions of NaN,
mapped to output channels by those published layouts.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import h5py
import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper

from steelyard.checkpoint_audit import run_rules
from steelyard.findings import Finding
from steelyard.loaders import load
from steelyard.policy import Policy
from steelyard.rules.nonfinite import RULE


def _run(path: Path) -> dict[str, Finding]:
    findings, _, _ = run_rules(load(path), Policy(), None, rules={RULE.name: RULE})
    return {f.tensor: f for f in findings}


def _plant(rng: np.random.Generator, shape: tuple[int, ...], count: int) -> np.ndarray:
    """Normal weights with ``count`` NaN/±Inf at random stored positions."""
    weight = rng.normal(size=shape).astype(np.float32)
    flat = weight.reshape(-1)
    chosen = rng.choice(flat.size, size=count, replace=False)
    flat[chosen] = rng.choice(np.array([np.nan, np.inf, -np.inf], np.float32), size=count)
    return weight


def _onnx_model(
    tmp_path: Path, nodes: list[onnx.NodeProto], weights: dict[str, np.ndarray], rank: int = 4
) -> Path:
    dims: list[str | int | None] = [f"d{i}" for i in range(rank)]
    graph = helper.make_graph(
        nodes,
        "g",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, dims)],
        [helper.make_tensor_value_info(nodes[-1].output[0], TensorProto.FLOAT, dims)],
        initializer=[numpy_helper.from_array(v, k) for k, v in weights.items()],
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    onnx.checker.check_model(model)  # reference: onnx's own validity check
    path = tmp_path / "m.onnx"
    path.write_bytes(model.SerializeToString())
    return path


def _rows(mask: np.ndarray, axis: int) -> list[int]:
    """Indices along ``axis`` holding a True (numpy's positions, reduced to one axis)."""
    return sorted({int(i) for i in np.argwhere(mask)[:, axis]})


@pytest.mark.parametrize("groups", [1, 2])
def test_onnx_conv_units_are_output_channels(tmp_path: Path, groups: int) -> None:
    rng = np.random.default_rng(groups)
    weight = _plant(rng, (8, 6 // groups, 3, 3), 5)  # ONNX Conv W: (M, C/group, kH, kW)
    path = _onnx_model(
        tmp_path,
        [helper.make_node("Conv", ["x", "w"], ["y"], group=groups)],
        {"w": weight},
    )
    found = _run(path)["w"]
    assert found.units == tuple(_rows(~np.isfinite(weight), 0))
    assert found.units  # the planted values are somewhere


@pytest.mark.parametrize("groups", [1, 2])
def test_onnx_conv_transpose_units_are_output_channels(tmp_path: Path, groups: int) -> None:
    rng = np.random.default_rng(10 + groups)
    c_in, m_per_group = 6, 4
    weight = _plant(rng, (c_in, m_per_group, 3, 3), 6)  # ConvTranspose W: (C, M/group, kH, kW)
    path = _onnx_model(
        tmp_path,
        [helper.make_node("ConvTranspose", ["x", "w"], ["y"], group=groups)],
        {"w": weight},
    )
    # Output channel of stored (c, j): group g = c // (C/group), channel g·(M/group) + j.
    per_group_in = c_in // groups
    expected = sorted(
        {int(c // per_group_in * m_per_group + j) for c, j, *_ in np.argwhere(~np.isfinite(weight))}
    )
    found = _run(path)["w"]
    assert found.units == tuple(expected)
    # the stored first axis is the input channel, so its positions are not the answer here
    assert groups == 2 or found.units != tuple(_rows(~np.isfinite(weight), 0))


@pytest.mark.parametrize("trans_b", [0, 1])
def test_onnx_gemm_units_follow_trans_b(tmp_path: Path, trans_b: int) -> None:
    rng = np.random.default_rng(20 + trans_b)
    shape = (12, 5) if trans_b else (5, 12)  # 5 inputs, 12 units
    weight = _plant(rng, shape, 4)
    path = _onnx_model(
        tmp_path,
        [helper.make_node("Gemm", ["x", "w"], ["y"], transB=trans_b)],
        {"w": weight},
        rank=2,
    )
    found = _run(path)["w"]
    assert found.units == tuple(_rows(~np.isfinite(weight), 0 if trans_b else 1))


def test_onnx_conv_bias_units(tmp_path: Path) -> None:
    rng = np.random.default_rng(30)
    weight = rng.normal(size=(4, 3, 3, 3)).astype(np.float32)
    bias = np.array([0.0, np.nan, 1.0, np.inf], np.float32)
    path = _onnx_model(
        tmp_path, [helper.make_node("Conv", ["x", "w", "b"], ["y"])], {"w": weight, "b": bias}
    )
    assert _run(path)["b"].units == (1, 3)


# ---- Keras HDF5 (Keras 2 layout, written with h5py) --------------------------------------


def _k2_layer(name: str, cls: str, config: dict[str, Any], inbound: list[str]) -> dict[str, Any]:
    nodes = [[[src, 0, 0, {}] for src in inbound]] if inbound else []
    return {"name": name, "class_name": cls, "config": {"name": name, **config},
            "inbound_nodes": nodes}  # fmt: skip


def _write_keras2(path: Path, layers: list[tuple[str, str, dict[str, Any], np.ndarray]]) -> None:
    """A Keras 2 functional model: input → each layer in turn; kernels as given, zero biases."""
    config_layers = [_k2_layer("input_1", "InputLayer", {"batch_input_shape": [None, 9, 9, 4]}, [])]
    previous = "input_1"
    for name, cls, config, _ in layers:
        config_layers.append(_k2_layer(name, cls, config, [previous]))
        previous = name
    config = {
        "class_name": "Model",
        "config": {
            "name": "model_1",
            "layers": config_layers,
            "input_layers": [["input_1", 0, 0]],
            "output_layers": [[previous, 0, 0]],
        },
    }
    with h5py.File(path, "w") as f:  # reference: h5py writes the datasets
        f.attrs["keras_version"] = b"2.4.0"
        f.attrs["backend"] = b"tensorflow"
        f.attrs["model_config"] = json.dumps(config).encode()
        root = f.create_group("model_weights")
        root.attrs["layer_names"] = [b"input_1"] + [n.encode() for n, *_ in layers]
        root.create_group("input_1").attrs["weight_names"] = []
        for name, cls, _, kernel in layers:
            group = root.create_group(name)
            kernel_name = "depthwise_kernel:0" if cls == "DepthwiseConv2D" else "kernel:0"
            group.attrs["weight_names"] = [f"{name}/{kernel_name}".encode()]
            group.create_dataset(f"{name}/{kernel_name}", data=kernel)


def test_keras_conv_kernels_report_output_channels(tmp_path: Path) -> None:
    rng = np.random.default_rng(40)
    conv = _plant(rng, (3, 3, 4, 6), 4)  # Conv2D: (kh, kw, in, filters)
    depthwise = _plant(rng, (3, 3, 6, 2), 4)  # DepthwiseConv2D: (kh, kw, in, multiplier)
    transpose = _plant(rng, (3, 3, 5, 12), 4)  # Conv2DTranspose: (kh, kw, filters, in)
    dense = _plant(rng, (5, 7), 3)  # Dense: (in, units)
    common = {"padding": "valid", "strides": [1, 1], "use_bias": False, "activation": "linear"}
    path = tmp_path / "k2.h5"
    _write_keras2(
        path,
        [
            ("conv", "Conv2D", {**common, "filters": 6, "kernel_size": [3, 3]}, conv),
            ("dw", "DepthwiseConv2D", {**common, "kernel_size": [3, 3], "depth_multiplier": 2}, depthwise),
            ("up", "Conv2DTranspose", {**common, "filters": 5, "kernel_size": [3, 3]}, transpose),
            ("fc", "Dense", {"units": 7, "activation": "linear", "use_bias": False}, dense),
        ],
    )
    found = {f.layer: f for f in _run(path).values()}
    assert found["conv"].units == tuple(_rows(~np.isfinite(conv), 3))
    expected_dw = sorted({int(c * 2 + q) for _, _, c, q in np.argwhere(~np.isfinite(depthwise))})
    assert found["dw"].units == tuple(expected_dw)
    assert found["up"].units == tuple(_rows(~np.isfinite(transpose), 2))
    assert found["fc"].units == tuple(_rows(~np.isfinite(dense), 1))
