"""ONNX loader against onnx.numpy_helper, onnx.reference, torch's saved weights and the op specs.

Fixtures come from ``fixtures/gen_onnx_real.py`` (torch.onnx.export and onnx.helper). Expected
tensor values are computed here from the ``onnx`` package; torch weights were saved beside
each export as ``<model>.torch.npz``. Hostile files are built in ``tmp_path``.
"""

from __future__ import annotations

import math
import os
import pickle
import shutil
import zipfile
from collections.abc import Iterator
from datetime import timedelta
from pathlib import Path
from typing import Any

import h5py
import numpy as np
import onnx
import pytest
import safetensors.numpy as st_numpy
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from onnx import TensorProto, helper, numpy_helper
from onnx.reference import ReferenceEvaluator

from steelyard.coverage import coverage_of
from steelyard.errors import LoadError
from steelyard.graph import (
    Activation,
    Checkpoint,
    Format,
    Layer,
    LayerKind,
    Link,
    NormKind,
    TensorRole,
)
from steelyard.loaders import load
from steelyard.loaders.onnx.loader import OnnxLoader
from steelyard.loaders.onnx.wire import strip_raw_data
from tests.conftest import FIXTURES

ONNX_DIR = FIXTURES / "real" / "onnx"
MODELS = sorted(p.name for p in ONNX_DIR.glob("*.onnx"))


# --- references ------------------------------------------------------------------------------


def _dense(sparse: onnx.SparseTensorProto) -> np.ndarray:
    """Densify with numpy_helper arrays; indices are linearised (or [NNZ, rank]) per onnx.proto."""
    values = numpy_helper.to_array(sparse.values)  # reference: onnx.numpy_helper.to_array
    indices = numpy_helper.to_array(sparse.indices)
    dense = np.zeros(math.prod(sparse.dims), dtype=values.dtype)
    flat = (
        indices if indices.ndim == 1 else np.ravel_multi_index(tuple(indices.T), tuple(sparse.dims))
    )
    dense[flat] = values
    return dense.reshape(tuple(sparse.dims))


def _constant(node: onnx.NodeProto) -> np.ndarray:
    """A Constant node evaluated by the ONNX reference runtime (sparse ones densified above)."""
    attr = node.attribute[0]
    if attr.name == "sparse_value":
        return _dense(attr.sparse_tensor)
    graph = helper.make_graph(
        [node], "c", [], [helper.make_empty_tensor_value_info(node.output[0])]
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 21)])
    (value,) = ReferenceEvaluator(model).run(None, {})  # reference: onnx.reference
    return np.asarray(value)


def _walk(graph: onnx.GraphProto) -> Iterator[tuple[str, np.ndarray]]:
    for init in graph.initializer:
        yield init.name, numpy_helper.to_array(init)  # reference: onnx.numpy_helper.to_array
    for sparse in graph.sparse_initializer:
        yield sparse.values.name, _dense(sparse)
    for node in graph.node:
        if node.op_type == "Constant":
            yield node.output[0], _constant(node)
        for attr in node.attribute:
            if attr.type == onnx.AttributeProto.GRAPH:
                yield from _walk(attr.g)


def reference_tensors(path: Path) -> dict[str, np.ndarray]:
    """Every stored tensor of a fixture (names are unique there), external data included."""
    model = onnx.load(str(path))  # loads external data relative to the model
    found: dict[str, np.ndarray] = {}
    for name, array in _walk(model.graph):
        assert name not in found
        found[name] = array
    return found


def torch_state(name: str) -> dict[str, np.ndarray]:
    with np.load(ONNX_DIR / f"{name}.torch.npz") as data:
        return {k: data[k] for k in data.files}


def layers_of(checkpoint: Checkpoint, kind: LayerKind | None = None) -> list[Layer]:
    return [layer for layer in checkpoint.layers if kind is None or layer.kind is kind]


def with_outputs(path: Path, names: list[str]) -> onnx.ModelProto:
    """The model with intermediate values added as graph outputs, for the reference runtime."""
    model = onnx.load(str(path))
    model.graph.output.extend(helper.make_empty_tensor_value_info(n) for n in names)
    return model


def run(model: onnx.ModelProto, feeds: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    evaluator = ReferenceEvaluator(model)  # reference: onnx.reference.ReferenceEvaluator
    outputs = evaluator.run(None, feeds)
    return {o.name: np.asarray(v) for o, v in zip(model.graph.output, outputs, strict=True)}


def _save(tmp: Path, graph: onnx.GraphProto, name: str = "m.onnx", opset: int = 17) -> Path:
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", opset)])
    path = tmp / name
    path.write_bytes(model.SerializeToString())
    return path


def _vi(name: str, shape: list[int] | None = None) -> onnx.ValueInfoProto:
    return helper.make_tensor_value_info(name, TensorProto.FLOAT, shape)


# --- tensors ---------------------------------------------------------------------------------


@pytest.mark.parametrize("name", MODELS)
def test_every_tensor_matches_numpy_helper(name: str) -> None:
    path = ONNX_DIR / name
    checkpoint = load(path)
    assert checkpoint.format is Format.ONNX
    reference = reference_tensors(path)
    assert set(checkpoint.tensors) == set(reference)
    for key, expected in reference.items():
        tensor = checkpoint.tensors[key]
        got = np.asarray(tensor.read())
        assert tensor.shape == expected.shape, key
        assert got.dtype == expected.dtype, key
        np.testing.assert_array_equal(got, expected, err_msg=key)


def test_dtype_names_and_roles() -> None:
    checkpoint = load(ONNX_DIR / "dtypes.onnx")
    names = {k: t.dtype for k, t in checkpoint.tensors.items()}
    assert names["w_f16_raw"] == names["w_f16_int32"] == "f16"
    assert names["w_bf16_raw"] == names["w_bf16_int32"] == "bf16"
    assert names["w_fp8_raw"] == names["w_fp8_int32"] == "f8_e4m3"
    assert names["w_f64_raw"] == names["f64_typed"] == "f64"
    assert names["q_int4_raw"] == "i4" and names["q_uint4_int32"] == "u4"
    roles = {k: t.role for k, t in checkpoint.tensors.items()}
    # Floating tensors are parameters; integer shapes, flags and unused ints are bookkeeping.
    for key in ("w_f16_raw", "w_bf16_int32", "w_fp8_int32", "f32_typed", "big_f32"):
        assert roles[key] is TensorRole.PARAMETER
    for key in ("shape_i64", "flag_bool", "q_int4_raw"):
        assert roles[key] is TensorRole.BOOKKEEPING
    floats = [t for t in checkpoint.tensors.values() if t.role is TensorRole.PARAMETER]
    assert checkpoint.parameters == sum(t.size for t in floats)
    # fp16/bf16 bit patterns in int32_data decode to the same values as raw_data would:
    # reference: ml_dtypes casts of numpy_helper's arrays.
    reference = reference_tensors(ONNX_DIR / "dtypes.onnx")
    np.testing.assert_array_equal(
        checkpoint.tensors["w_bf16_int32"].read_float32(),
        reference["w_bf16_int32"].astype(np.float32),
    )


def test_weights_stay_on_disk_until_read(tmp_path: Path) -> None:
    source = ONNX_DIR / "dtypes.onnx"
    path = tmp_path / "m.onnx"
    shutil.copy(source, path)
    data = path.read_bytes()
    # The wire pass swaps big raw payloads for 20-byte offset markers before parsing.
    stripped = onnx.ModelProto.FromString(strip_raw_data(data))
    (big,) = [t for t in stripped.graph.initializer if t.name == "big_f32"]
    assert len(big.raw_data) == 20 and stripped.ByteSize() < len(data) - 16 * 8 * 4 + 20
    checkpoint = OnnxLoader().load(path)
    reference = reference_tensors(source)["big_f32"]
    # Overwrite the tensor's bytes after loading: a lazy reader sees the new bytes.
    offset = data.index(reference.tobytes())
    replaced = (reference * 2).astype(np.float32)
    with open(path, "r+b") as handle:
        handle.seek(offset)
        handle.write(replaced.tobytes())
    np.testing.assert_array_equal(checkpoint.tensors["big_f32"].read(), replaced)


def test_external_data_is_read_lazily_from_the_folder(tmp_path: Path) -> None:
    for name in ("external.onnx", "external.onnx.data"):
        shutil.copy(ONNX_DIR / name, tmp_path / name)
    checkpoint = load(tmp_path / "external.onnx")
    assert checkpoint.files == (
        str(tmp_path / "external.onnx"),
        str((tmp_path / "external.onnx.data").resolve()),
    )
    assert checkpoint.file_size == sum(
        os.path.getsize(tmp_path / n) for n in ("external.onnx", "external.onnx.data")
    )
    (tmp_path / "external.onnx.data").unlink()
    with pytest.raises(LoadError):
        checkpoint.tensors["ext_w1"].read()


# --- torch orientation ------------------------------------------------------------------------


def _check(layer: Layer, weight: np.ndarray, bias: np.ndarray | None) -> None:
    np.testing.assert_array_equal(layer.weight_view(), weight, err_msg=layer.name)
    assert layer.weight_view().shape == (layer.units, layer.in_per_group, *layer.kernel)
    if bias is None:
        assert layer.bias_view is None
    else:
        np.testing.assert_array_equal(layer.bias_vector(), bias, err_msg=layer.name)


def test_linear_layers_match_torch_weights() -> None:
    # reference: torch.nn.Linear.weight is [out_features, in_features], saved at export time.
    for model, modules in (("mlp", ("fc1", "fc2", "fc3")), ("mlp_seq", ("up", "mid", "down"))):
        state = torch_state(model)
        dense = layers_of(load(ONNX_DIR / f"{model}.onnx"), LayerKind.DENSE)
        assert len(dense) == len(modules)
        for layer, module in zip(dense, modules, strict=True):
            _check(layer, state[f"{module}.weight"], state[f"{module}.bias"])


def test_conv_layers_match_torch_weights_and_bn_folding() -> None:
    state = torch_state("cnn_bn")
    checkpoint = load(ONNX_DIR / "cnn_bn.onnx")
    convs = layers_of(checkpoint, LayerKind.CONV)
    for layer, module in zip(convs, ("c1", "c2", "c3a", "c3b", "c4"), strict=True):
        _check(layer, state[f"{module}.weight"], state[f"{module}.bias"])  # reference: torch
    (fc,) = layers_of(checkpoint, LayerKind.DENSE)
    _check(fc, state["fc.weight"], state["fc.bias"])
    norm = convs[0].norm
    assert norm is not None and norm.kind is NormKind.BATCH
    for field, key in (
        ("scale", "weight"),
        ("shift", "bias"),
        ("mean", "running_mean"),
        ("var", "running_var"),
    ):
        stored = checkpoint.tensors[getattr(norm, field)].read()
        np.testing.assert_array_equal(stored, state[f"bn1.{key}"])
    assert norm.eps == pytest.approx(1e-5)  # torch BatchNorm2d default eps
    # Folded export: the conv carries BN, compared with torch.nn.utils.fusion.fuse_conv_bn_eval.
    folded_state = torch_state("cnn_folded")
    folded = layers_of(load(ONNX_DIR / "cnn_folded.onnx"), LayerKind.CONV)[0]
    assert folded.norm is None
    np.testing.assert_allclose(
        folded.weight_view(), folded_state["fused.weight"], rtol=1e-5, atol=1e-6
    )
    np.testing.assert_allclose(
        folded.bias_vector(), folded_state["fused.bias"], rtol=1e-5, atol=1e-6
    )


def _canonical_transposed(weight: np.ndarray, groups: int) -> np.ndarray:
    """[C, M/g, k...] → [M, C/g, k...]: row j·M/g + m is W[group j's inputs, m] (docstring rule)."""
    cin, per_group = weight.shape[:2]
    rows = []
    for j in range(groups):
        for m in range(per_group):
            rows.append(weight[j * cin // groups : (j + 1) * cin // groups, m])
    return np.stack(rows)


def _conv_transpose_2d(
    x: np.ndarray, canonical: np.ndarray, bias: np.ndarray, groups: int, stride: int
) -> np.ndarray:
    """Transposed convolution as a scatter: each input pixel adds its kernel-sized patch."""
    _, height, width = x.shape
    units, fan, kh, kw = canonical.shape
    out = np.zeros((units, (height - 1) * stride + kh, (width - 1) * stride + kw), np.float64)
    per_group = units // groups
    for o in range(units):
        inputs = x[(o // per_group) * fan : (o // per_group + 1) * fan]
        for i in range(height):
            for j in range(width):
                patch = np.tensordot(inputs[:, i, j], canonical[o], axes=(0, 0))
                out[o, i * stride : i * stride + kh, j * stride : j * stride + kw] += patch
    return out + bias[:, None, None]


def test_conv_transpose_canonical_rows_are_output_channels(rng: np.random.Generator) -> None:
    state = torch_state("deconv")
    checkpoint = load(ONNX_DIR / "deconv.onnx")
    up1, up2 = layers_of(checkpoint, LayerKind.CONV_TRANSPOSE)
    # torch.nn.ConvTranspose2d.weight is [in, out/groups, kh, kw] like ONNX (reference: torch).
    _check(up1, _canonical_transposed(state["up1.weight"], 2), state["up1.bias"])
    _check(up2, _canonical_transposed(state["up2.weight"], 1), state["up2.bias"])
    assert (up1.units, up1.in_per_group, up1.groups) == (6, 2, 2)
    # Behaviour: with the canonical view, a plain scatter reproduces torch's grouped
    # ConvTranspose2d output saved at export (reference: torch). onnx.reference is not used
    # for the grouped layer: its ConvTranspose slices W by output channels on axis 0.
    mine = _conv_transpose_2d(state["probe.x"][0], up1.weight_view(), up1.bias_vector(), 2, 2)
    np.testing.assert_allclose(mine, state["probe.up1"][0], rtol=1e-4, atol=1e-5)
    # The ungrouped one against the ONNX reference runtime as well (that node alone).
    model = onnx.load(str(ONNX_DIR / "deconv.onnx"))
    node = model.graph.node[2]
    assert node.op_type == "ConvTranspose"
    used = [i for i in model.graph.initializer if i.name in node.input]
    graph = helper.make_graph(
        [node], "up2", [_vi(node.input[0])], [_vi(node.output[0])], initializer=used
    )
    z = rng.normal(size=(1, 6, 7, 7)).astype(np.float32)
    outputs = run(
        helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)]), {node.input[0]: z}
    )
    mine = _conv_transpose_2d(z[0], up2.weight_view(), up2.bias_vector(), 1, 1)
    np.testing.assert_allclose(outputs[node.output[0]][0], mine, rtol=1e-4, atol=1e-5)


def test_recurrent_gates_match_torch_rows() -> None:
    state = torch_state("rnn")
    checkpoint = load(ONNX_DIR / "rnn.onnx")
    (embedding,) = layers_of(checkpoint, LayerKind.EMBEDDING)
    _check(embedding, state["emb.weight"], None)
    recurrent = {
        layer.name.split("/")[-1]: layer for layer in layers_of(checkpoint, LayerKind.RECURRENT)
    }
    # torch.nn.LSTM stacks gates (i, f, g, o) and GRU (r, z, n) (torch docs); ONNX stores
    # LSTM (i, o, f, c) and GRU (z, r, h) (ONNX operator spec). Row block of each ONNX gate:
    torch_rows = {"LSTM": {"i": 0, "o": 3, "f": 1, "c": 2}, "GRU": {"z": 1, "r": 0, "h": 2}}
    for op, module, hidden, suffixes in (
        ("LSTM", "lstm", 5, ("",)),
        ("GRU", "gru", 3, ("", "_reverse")),
    ):
        for suffix in suffixes:
            for gate, block in torch_rows[op].items():
                rows = slice(block * hidden, (block + 1) * hidden)
                prefix = f"{op}." + ("reverse." if suffix else "")
                w, r = recurrent[f"{prefix}W.{gate}"], recurrent[f"{prefix}R.{gate}"]
                _check(
                    w,
                    state[f"{module}.weight_ih_l0{suffix}"][rows],
                    state[f"{module}.bias_ih_l0{suffix}"][rows],
                )
                _check(
                    r,
                    state[f"{module}.weight_hh_l0{suffix}"][rows],
                    state[f"{module}.bias_hh_l0{suffix}"][rows],
                )
                assert w.gate == r.gate == gate
                expected = Activation.TANH if gate in ("c", "h") else Activation.SIGMOID
                assert w.activation is r.activation is expected
    (head,) = layers_of(checkpoint, LayerKind.DENSE)
    _check(head, state["head.weight"], state["head.bias"])


# --- graph: kinds, links, activations ---------------------------------------------------------


def _summary(checkpoint: Checkpoint) -> list[tuple[str, str, tuple[str, ...], bool]]:
    return [
        (layer.name, layer.activation.value, layer.inputs_from, layer.is_output)
        for layer in checkpoint.layers
    ]


def test_mlp_links_and_activations() -> None:
    checkpoint = load(ONNX_DIR / "mlp.onnx")
    a, b, c = checkpoint.layers
    assert [x.activation for x in (a, b, c)] == [
        Activation.RELU,
        Activation.TANH,
        Activation.IDENTITY,
    ]
    assert (a.inputs_from, b.inputs_from, c.inputs_from) == ((), (a.name,), (b.name,))
    assert all(x.linked_by is Link.GRAPH for x in (a, b, c))
    assert [x.is_output for x in (a, b, c)] == [False, False, True]
    seq = load(ONNX_DIR / "mlp_seq.onnx")
    up, mid, down = seq.layers
    assert [x.activation for x in seq.layers] == [
        Activation.GELU,
        Activation.SILU,
        Activation.SOFTMAX,
    ]
    assert mid.norm is not None and mid.norm.kind is NormKind.LAYER
    np.testing.assert_array_equal(
        seq.tensors[mid.norm.scale].read(), torch_state("mlp_seq")["norm.weight"]
    )
    assert (mid.inputs_from, down.inputs_from) == ((up.name,), (mid.name,))


def test_cnn_residual_concat_and_pool_links() -> None:
    for model in ("cnn_bn", "cnn_folded"):
        checkpoint = load(ONNX_DIR / f"{model}.onnx")
        c1, c2, c3a, c3b, c4, fc = checkpoint.layers
        assert c1.activation is Activation.RELU
        assert c2.activation is Activation.RELU  # ReLU6 exported as Clip(0, 6)
        assert c2.groups == 8 and c2.in_per_group == 1
        assert c2.inputs_from == (c1.name,)
        # x1 + x2 (residual Add) then MaxPool: both producers, in input order.
        assert c3a.inputs_from == c3b.inputs_from == (c1.name, c2.name)
        assert (c3a.activation, c3b.activation) == (Activation.LEAKY_RELU, Activation.IDENTITY)
        # torch.cat([c3a, c3b], dim=1): the grouped conv reads both, in concat order.
        assert c4.inputs_from == (c3a.name, c3b.name) and c4.groups == 2
        assert c4.activation is Activation.SIGMOID
        # adaptive_avg_pool2d + flatten keep channel identity.
        assert fc.inputs_from == (c4.name,) and fc.activation is Activation.IDENTITY
        assert [layer.is_output for layer in checkpoint.layers] == [False] * 5 + [True]
        assert all(layer.linked_by is Link.GRAPH for layer in checkpoint.layers)


def test_recurrent_links_and_heads() -> None:
    checkpoint = load(ONNX_DIR / "rnn.onnx")
    by_name = {layer.name.split("/")[-1]: layer for layer in checkpoint.layers}
    lstm_o = by_name["LSTM.W.o"].name
    gru_h, gru_rev_h = by_name["GRU.W.h"].name, by_name["GRU.reverse.W.h"].name
    # An embedding's rows are not its consumers' inputs, so the LSTM lists no producer.
    assert by_name["LSTM.W.i"].inputs_from == ()
    assert by_name["LSTM.R.f"].inputs_from == (lstm_o,)
    assert by_name["GRU.W.z"].inputs_from == (lstm_o,)
    assert by_name["GRU.reverse.R.r"].inputs_from == (gru_rev_h,)
    assert by_name["MatMul"].inputs_from == (gru_h, gru_rev_h)  # through Transpose + Reshape
    assert [layer.name for layer in checkpoint.layers if layer.is_output] == [
        by_name["MatMul"].name
    ]
    assert len(layers_of(checkpoint, LayerKind.RECURRENT)) == 2 * 4 + 2 * 2 * 3


def test_subgraph_weights_and_links() -> None:
    checkpoint = load(ONNX_DIR / "subgraph.onnx")
    layers = {layer.name: layer for layer in checkpoint.layers}
    assert set(layers) == {"then_conv", "else_conv", "final_conv", "loop_mm"}
    assert (
        layers["then_conv"].weight == "W_then" and layers["then_conv"].activation is Activation.RELU
    )
    # The else branch uses an outer initializer and a Constant of its own as bias.
    assert (layers["else_conv"].weight, layers["else_conv"].bias) == ("W_outer", "else_b")
    assert layers["else_conv"].activation is Activation.IDENTITY  # straight into final_conv
    assert set(layers["final_conv"].inputs_from) == {"then_conv", "else_conv"}
    assert layers["final_conv"].is_output
    assert layers["loop_mm"].activation is Activation.TANH


def test_dense_forms_against_the_reference_runtime(rng: np.random.Generator) -> None:
    path = ONNX_DIR / "dense_forms.onnx"
    checkpoint = load(path)
    # layer → (its input value, its output before the activation) in the fixture's graph.
    values = {
        "gemm_t0": ("x", "g0"),
        "gemm_t1": ("a0", "g1"),
        "mm_transposed": ("a1", "m2b"),
        "mm_squeezed": ("a2", "m3b"),
        "mm_reshaped": ("a3", "m4b"),
        "mm_bn": ("a4", "m5"),
        "gemm_head": ("a5", "g6"),
    }
    names = sorted({v for pair in values.values() for v in pair} - {"x"})
    x = rng.normal(size=(2, 4)).astype(np.float32)
    outputs = run(with_outputs(path, names), {"x": x})
    outputs["x"] = x
    assert [layer.name for layer in checkpoint.layers] == list(values)
    for layer in checkpoint.layers:
        source, target = values[layer.name]
        y = outputs[source] @ layer.matrix().T + (
            0 if layer.bias_view is None else layer.bias_vector()
        )
        np.testing.assert_allclose(outputs[target], y, rtol=1e-5, atol=1e-5, err_msg=layer.name)
    acts = {layer.name: layer.activation for layer in checkpoint.layers}
    assert acts == {
        "gemm_t0": Activation.RELU,
        "gemm_t1": Activation.LEAKY_RELU,
        "mm_transposed": Activation.HARD_SIGMOID,
        "mm_squeezed": Activation.SILU,
        "mm_reshaped": Activation.GELU,
        "mm_bn": Activation.TANH,
        "gemm_head": Activation.SOFTMAX,
    }
    bn = checkpoint.layer("mm_bn")
    assert bn is not None and bn.norm is not None and bn.norm.kind is NormKind.BATCH
    assert (bn.norm.scale, bn.norm.mean, bn.norm.eps) == (
        "bn_scale",
        "bn_mean",
        pytest.approx(1e-3),
    )


def test_gemm_alpha_beta_and_transposes_follow_the_spec(rng: np.random.Generator) -> None:
    # Gemm computes alpha·A'·B' + beta·C (ONNX operator spec): canonical W = alpha·B'ᵀ.
    checkpoint = load(ONNX_DIR / "dense_forms.onnx")
    reference = reference_tensors(ONNX_DIR / "dense_forms.onnx")
    first = checkpoint.layer("gemm_t0")
    assert first is not None
    np.testing.assert_allclose(first.weight_view(), 0.5 * reference["W0"].T)
    np.testing.assert_allclose(first.bias_vector(), 2.0 * reference["C0"])
    second = checkpoint.layer("gemm_t1")
    assert second is not None
    np.testing.assert_array_equal(second.weight_view(), reference["W1"])
    # the first Gemm's input is the graph input: check it through the reference runtime too
    x = rng.normal(size=(2, 4)).astype(np.float32)
    outputs = run(with_outputs(ONNX_DIR / "dense_forms.onnx", ["g0"]), {"x": x})
    np.testing.assert_allclose(
        outputs["g0"], x @ first.matrix().T + first.bias_vector(), rtol=1e-5, atol=1e-5
    )


def test_constant_node_weights(rng: np.random.Generator) -> None:
    path = ONNX_DIR / "constants.onnx"
    checkpoint = load(path)
    mm1, mm2, gemm3 = checkpoint.layers
    assert (mm1.weight, mm1.bias, mm2.weight, gemm3.weight) == ("W1", "b1", "W2", "W3flat")
    assert (mm1.activation, mm2.activation, gemm3.activation) == (
        Activation.RELU,
        Activation.SIGMOID,
        Activation.IDENTITY,
    )
    x = rng.normal(size=(1, 4)).astype(np.float32)
    model = with_outputs(path, ["h1b", "a1", "h2", "a2"])
    for node in model.graph.node:  # the reference runtime cannot emit a sparse Constant
        if node.attribute and node.attribute[0].name == "sparse_value":
            dense = numpy_helper.from_array(_dense(node.attribute[0].sparse_tensor), "dense")
            node.CopyFrom(helper.make_node("Constant", [], list(node.output), value=dense))
    outputs = run(model, {"x": x})
    np.testing.assert_allclose(outputs["h1b"], x @ mm1.matrix().T + mm1.bias_vector(), rtol=1e-5)
    np.testing.assert_allclose(outputs["h2"], outputs["a1"] @ mm2.matrix().T, rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(outputs["y"], outputs["a2"] @ gemm3.matrix().T, rtol=1e-5, atol=1e-6)
    assert checkpoint.tensors["W3shape"].role is TensorRole.BOOKKEEPING
    assert checkpoint.tensors["W2"].role is TensorRole.PARAMETER


# --- quantized --------------------------------------------------------------------------------


def _dq(q: np.ndarray, scale: np.ndarray, zero: np.ndarray | int, axis: int | None) -> np.ndarray:
    """reference formula: ONNX DequantizeLinear / QLinear* specs, y = (x - zero_point) * scale."""
    q = q.astype(np.float32)
    scale = np.asarray(scale, np.float32)
    zero = np.asarray(zero).astype(np.float32)
    if axis is not None and scale.ndim == 1:
        shape = [1] * q.ndim
        shape[axis] = -1
        scale, zero = scale.reshape(shape), zero.reshape(shape)
    return (q - zero) * scale


def test_quantized_views_follow_the_operator_formula() -> None:
    checkpoint = load(ONNX_DIR / "quant.onnx")
    ref = reference_tensors(ONNX_DIR / "quant.onnx")
    view = {layer.name: layer for layer in checkpoint.layers}
    expected = {
        "conv_dq": _dq(ref["conv_wq"], ref["conv_ws"], ref["conv_wz"], 0),  # axis=0 per channel
        "fc_dq": _dq(ref["fc_wq"], ref["fc_ws"], ref["fc_wz"], None).T,  # per tensor
        "col_dq": _dq(ref["col_wq"], ref["col_ws"], 0, 1).T,  # default axis 1: per column
        "qlinear_conv": _dq(ref["qc_w"], ref["qc_ws"], ref["qc_wz"], 0),
        "qlinear_matmul": _dq(ref["qm_b"], ref["qm_bs"], ref["qm_bz"], None).T,
        "conv_integer": _dq(ref["ci_w"], ref["ci_ws"], ref["ci_wz"], None),
        "matmul_integer": _dq(ref["mi_b"], ref["mi_bs"], ref["mi_bz"], 1).T,
    }
    for name, weight in expected.items():
        np.testing.assert_allclose(view[name].weight_view(), weight, rtol=1e-6, err_msg=name)
    # QLinearConv spec: the int32 bias is quantized with scale x_scale·w_scale and zero point 0.
    np.testing.assert_allclose(
        view["qlinear_conv"].bias_vector(), ref["qc_b"] * ref["x_s"] * ref["qc_ws"], rtol=1e-6
    )
    assert view["conv_integer"].bias == "ci_b"
    roles = {k: t.role for k, t in checkpoint.tensors.items()}
    quantized = {"conv_wq", "fc_wq", "col_wq", "qc_w", "qc_b", "qm_b", "ci_w", "mi_b"}
    assert {k for k, r in roles.items() if r is TensorRole.QUANTIZED} == quantized
    assert {k for k, r in roles.items() if r is TensorRole.PARAMETER} == {"fc_b", "ci_b"}
    assert checkpoint.parameters == sum(ref[k].size for k in quantized | {"fc_b", "ci_b"})


def test_quantized_views_reproduce_the_reference_runtime(rng: np.random.Generator) -> None:
    path = ONNX_DIR / "quant.onnx"
    checkpoint = load(path)
    view = {layer.name: layer for layer in checkpoint.layers}
    feeds = {
        "x": rng.normal(size=(1, 2, 5, 5)).astype(np.float32),
        "v": rng.normal(size=(1, 4)).astype(np.float32),
        "u": rng.normal(size=(1, 1, 4, 4)).astype(np.float32),
        "w": rng.normal(size=(2, 3)).astype(np.float32),
    }
    out = run(
        with_outputs(path, ["conv_w", "fc_w", "col_w", "vq", "wq", "w_s", "w_z", "cf", "fb", "fr"]),
        feeds,
    )
    # DequantizeLinear as the runtime computes it (reference: onnx.reference).
    np.testing.assert_array_equal(view["conv_dq"].weight_view(), out["conv_w"])
    np.testing.assert_array_equal(view["fc_dq"].weight_view(), out["fc_w"].T)
    np.testing.assert_array_equal(view["col_dq"].weight_view(), out["col_w"].T)
    np.testing.assert_allclose(
        out["fb"],
        out["cf"] @ view["fc_dq"].matrix().T + view["fc_dq"].bias_vector(),
        rtol=1e-5,
        atol=1e-5,
    )
    # QLinearMatMul requantizes its output, so it matches to half an output step.
    ref = reference_tensors(path)
    a = (out["vq"].astype(np.float32) - ref["x_z"].astype(np.float32)) * ref["x_s"]
    np.testing.assert_allclose(
        out["y_qm"], a @ view["qlinear_matmul"].matrix().T, atol=float(ref["qm_ys"]) / 2 + 1e-6
    )
    # MatMulInteger · (input scale · weight scale) equals the dequantized product.
    w = (out["wq"].astype(np.float32) - out["w_z"].astype(np.float32)) * out["w_s"]
    np.testing.assert_allclose(
        out["y_mi"], w @ view["matmul_integer"].matrix().T, rtol=1e-5, atol=1e-6
    )


def test_blocked_int4_dequantization() -> None:
    path = ONNX_DIR / "quant_blocked.onnx"
    checkpoint = load(path)
    (layer,) = checkpoint.layers
    out = run(with_outputs(path, ["blk_w"]), {"x": np.ones((1, 6), np.float32)})
    np.testing.assert_allclose(
        layer.weight_view(), out["blk_w"].T, rtol=1e-6
    )  # reference: onnx.reference
    ref = reference_tensors(path)
    # ONNX DequantizeLinear with block_size: scale index along the axis = position // block_size.
    blocks = np.arange(6) // 2
    manual = (ref["blk_q"].astype(np.float32) - ref["blk_z"].astype(np.float32)[blocks]) * ref[
        "blk_s"
    ][blocks]
    np.testing.assert_allclose(layer.weight_view(), manual.T, rtol=1e-6)
    assert checkpoint.tensors["blk_q"].role is TensorRole.QUANTIZED
    assert (
        checkpoint.tensors["blk_s"].role
        is checkpoint.tensors["blk_z"].role
        is TensorRole.BOOKKEEPING
    )


# --- loop-carried weights -----------------------------------------------------------------------


def _unit_rows(layer: Layer, inputs: np.ndarray, outputs: np.ndarray) -> None:
    """Canonical row u · input = output unit u (plus the bias), as the runtime computed it."""
    bias = layer.bias_vector()
    expected = inputs @ layer.matrix().T + (0.0 if bias is None else bias)
    np.testing.assert_allclose(outputs, expected, rtol=1e-5, atol=1e-5, err_msg=layer.name)


_ONE = np.array(1, np.int64)


def _step(scan: np.ndarray, *shape: int) -> np.ndarray:
    """The one iteration of a scan output: stacked [1, ...] by the ONNX spec, while the
    reference runtime concatenates along axis 0; for one trip both hold the same values."""
    assert scan.size == math.prod(shape)
    return scan.reshape(shape)


def test_loop_carried_weights_become_layers_in_canonical_orientation() -> None:
    # Each fixture hands main-graph initializers to a Loop body as state the body passes back
    # unchanged. The reference runtime (onnx.reference.ReferenceEvaluator) runs one iteration
    # on basis vectors e_i: the output for e_i is column i of the canonical matrix.
    eye = np.eye(4, dtype=np.float32)

    direct = load(ONNX_DIR / "loop_direct.onnx")
    (layer,) = direct.layers
    assert (layer.name, layer.weight, layer.bias) == ("rec_mm", "rec_W", "rec_b")
    out = run(onnx.load(str(ONNX_DIR / "loop_direct.onnx")), {"trips": _ONE, "h0": eye})
    _unit_rows(layer, eye, _step(out["hs"], 4, 4))

    path = ONNX_DIR / "loop_transpose.onnx"
    transposed = {layer.name: layer for layer in load(path).layers}
    assert {n: (la.weight, la.units, la.in_per_group) for n, la in transposed.items()} == {
        "proj": ("proj_P", 3, 4),  # stored [out, in], transposed in the body
        "left": ("left_V", 2, 3),  # a constant left operand: rows are units as stored
    }
    out = run(onnx.load(str(path)), {"trips": _ONE, "x": eye})
    _unit_rows(transposed["proj"], eye, _step(out["ys"], 4, 3))
    np.testing.assert_array_equal(
        transposed["proj"].weight_view(), reference_tensors(path)["proj_P"]
    )
    # z = V·yᵀ: unit u of `left` is row u of z.
    _unit_rows(transposed["left"], _step(out["ys"], 4, 3), _step(out["zs"], 2, 4).T)
    assert transposed["left"].inputs_from == ("proj",)

    path = ONNX_DIR / "loop_gemm.onnx"
    gemms = {layer.name: layer for layer in load(path).layers}
    assert gemms["gemm_t"].bias == "gemm_c1"  # Gemm's C, carried like the weight
    out = run(onnx.load(str(path)), {"trips": _ONE, "x": eye})
    _unit_rows(gemms["gemm_t"], eye, _step(out["g1s"], 4, 3))
    _unit_rows(gemms["gemm_n"], eye, _step(out["g2s"], 4, 2))  # alpha = 0.5 is part of the view


def test_weights_carried_through_nested_loops_scan_and_if() -> None:
    eye = np.eye(4, dtype=np.float32)
    path = ONNX_DIR / "loop_nested.onnx"
    (layer,) = load(path).layers
    assert (layer.name, layer.weight) == ("inner_mm", "nest_W")
    out = run(onnx.load(str(path)), {"trips": _ONE, "inner_trips": _ONE, "x": eye})
    _unit_rows(layer, eye, _step(out["yos"], 4, 3))

    # ONNX Scan: state variables come first and the body returns their next values first.
    path = ONNX_DIR / "scan_state.onnx"
    scanned = {layer.name: layer for layer in load(path).layers}
    assert {n: la.weight for n, la in scanned.items()} == {
        "scan_mm": "scan_S",
        "scan_mm_t": "scan_Q",
    }
    out = run(onnx.load(str(path)), {"xs": eye[None]})
    _unit_rows(scanned["scan_mm"], eye, _step(out["s1s"], 4, 3))
    _unit_rows(scanned["scan_mm_t"], eye, _step(out["s2s"], 4, 2))

    # If branches see the body's carried weights through the enclosing scope.
    path = ONNX_DIR / "loop_if.onnx"
    branches = {layer.name: layer for layer in load(path).layers}
    assert {n: la.weight for n, la in branches.items()} == {
        "then_mm": "branch_A",
        "else_mm": "branch_C",
    }
    for flag, name in ((True, "then_mm"), (False, "else_mm")):
        out = run(onnx.load(str(path)), {"trips": _ONE, "flag": np.array(flag), "x": eye})
        _unit_rows(branches[name], eye, _step(out["picks"], 4, 3))


def test_changing_loop_state_is_not_taken_for_a_weight() -> None:
    path = ONNX_DIR / "loop_state.onnx"
    checkpoint = load(path)
    layers = {layer.name: layer for layer in checkpoint.layers}
    # h starts at a constant but changes every step: MatMul(h, Wh) is a layer reading h, and
    # neither the initial state nor the accumulator becomes a weight.
    assert {n: la.weight for n, la in layers.items()} == {"state_rec": "Wh", "state_in": "Wx"}
    assert all(la.bias is None for la in layers.values())
    x = np.array([[0.5, -1.0, 0.25, 2.0]], np.float32)
    out = run(onnx.load(str(path)), {"trips": np.array(2, np.int64), "x": x})
    # Two steps of h ← tanh(h·Wh + x·Wx) from h = 0, through the layers' canonical views.
    wh, wx = layers["state_rec"].matrix(), layers["state_in"].matrix()
    h1 = np.tanh(x @ wx.T)
    h2 = np.tanh(h1 @ wh.T + x @ wx.T)
    np.testing.assert_allclose(out["h_last"], h2, rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(out["acc_last"], h1 + h2, rtol=1e-5, atol=1e-6)
    assert int(out["count_last"]) == 4  # the carried integer step stays bookkeeping
    roles = {k: t.role for k, t in checkpoint.tensors.items()}
    assert roles["state_step"] is roles["state_count0"] is TensorRole.BOOKKEEPING


@pytest.mark.parametrize(
    "name",
    ["loop_direct", "loop_transpose", "loop_gemm", "loop_nested", "scan_state", "loop_if"],
)
def test_loop_carried_weights_are_covered(name: str) -> None:
    checkpoint = load(ONNX_DIR / f"{name}.onnx")
    coverage = coverage_of(checkpoint)
    assert coverage.parameters == sum(
        a.size for a in reference_tensors(ONNX_DIR / f"{name}.onnx").values() if a.dtype.kind == "f"
    )
    assert coverage.uncovered == ()


def test_loop_state_fed_from_its_own_output_terminates(tmp_path: Path) -> None:
    # A hostile Loop whose carried input is its own output (a cycle) and a pass-through chain
    # longer than any walk: the loader must finish and take neither for a constant.
    chain = [
        helper.make_node("Identity", [f"w{i}"], [f"w{i + 1}"], name=f"id{i}") for i in range(400)
    ]
    body = helper.make_graph(
        [
            helper.make_node("Identity", ["c"], ["c_out"]),
            helper.make_node("Identity", ["W_in"], ["w0"]),
            *chain,
            helper.make_node("MatMul", ["x", "W_in"], ["y"], name="mm"),
        ],
        "body",
        [
            helper.make_tensor_value_info("i", TensorProto.INT64, []),
            helper.make_tensor_value_info("c", TensorProto.BOOL, []),
            _vi("W_in", [2, 2]),
            _vi("V_in", [2, 2]),
        ],
        [
            helper.make_tensor_value_info("c_out", TensorProto.BOOL, []),
            _vi("w400", [2, 2]),
            _vi("V_in", [2, 2]),
            _vi("y", [1, 2]),
        ],
    )
    graph = helper.make_graph(
        [helper.make_node("Loop", ["n", "", "W", "V_last"], ["W_last", "V_last", "ys"], body=body)],
        "g",
        [_vi("x", [1, 2]), helper.make_tensor_value_info("n", TensorProto.INT64, [])],
        [_vi("ys")],
        initializer=[numpy_helper.from_array(np.ones((2, 2), np.float32), "W")],
    )
    checkpoint = load(_save(tmp_path, graph))
    assert checkpoint.layers == ()  # W changes (the chain is too long to prove otherwise)


# --- quantized scalars ------------------------------------------------------------------------

#: (value positions, scale / zero-point positions) per op, from the operator specs:
#: ONNX docs/Operators.md (DequantizeLinear x, x_scale, x_zero_point; QuantizeLinear x, y_scale,
#: y_zero_point; QLinearMatMul a, a_scale, a_zero_point, b, b_scale, b_zero_point, y_scale,
#: y_zero_point; QLinearConv x, x_scale, x_zero_point, w, w_scale, w_zero_point, y_scale,
#: y_zero_point, B; MatMulInteger A, B, a_zero_point, b_zero_point; ConvInteger x, w,
#: x_zero_point, w_zero_point) and onnxruntime
#: docs/ContribOperators.md (com.microsoft QLinearMul / QLinearAdd A, A_scale, A_zero_point, B,
#: B_scale, B_zero_point, C_scale, C_zero_point; QGemm A, a_scale, a_zero_point, B, b_scale,
#: b_zero_point, C, y_scale, y_zero_point). Every input of any other op is a value.
_QUANT_SPEC = {
    "DequantizeLinear": ((0,), (1, 2)),
    "QuantizeLinear": ((0,), (1, 2)),
    "QLinearMatMul": ((0, 3), (1, 2, 4, 5, 6, 7)),
    "QLinearConv": ((0, 3, 8), (1, 2, 4, 5, 6, 7)),
    "MatMulInteger": ((0, 1), (2, 3)),
    "ConvInteger": ((0, 1), (2, 3)),
    "QLinearMul": ((0, 3), (1, 2, 4, 5, 6, 7)),
    "QLinearAdd": ((0, 3), (1, 2, 4, 5, 6, 7)),
    "QGemm": ((0, 3, 6), (1, 2, 4, 5, 7, 8)),
}


def _weights_by_spec(model: onnx.ModelProto) -> set[str]:
    """Initializers some op computes with (a value input), per the specs above."""
    stored = {init.name for init in model.graph.initializer}
    # MatMulInteger has no scale input: exporters multiply its int32 result by
    # input scale × weight scale, the input scale being DynamicQuantizeLinear's second output
    # (common practice of onnxruntime's dynamic quantization, no source).
    input_scales = {n.output[1] for n in model.graph.node if n.op_type == "DynamicQuantizeLinear"}
    weights: set[str] = set()
    for node in model.graph.node:
        values, _scales = _QUANT_SPEC.get(node.op_type, (range(len(node.input)), ()))
        if node.op_type == "Mul" and input_scales & set(node.input):
            values = ()
        weights |= {node.input[p] for p in values if p < len(node.input)} & stored
    return weights


@pytest.mark.parametrize("name", ["quant_scalars.onnx", "quant_contrib.onnx", "quant.onnx"])
def test_counted_tensors_follow_the_operator_specs(name: str) -> None:
    path = ONNX_DIR / name
    checkpoint = load(path)
    model = onnx.load(str(path))
    expected = _weights_by_spec(model)
    counted = {t.name for t in checkpoint.counted}
    assert counted == expected
    reference = reference_tensors(path)
    assert checkpoint.parameters == sum(reference[k].size for k in expected)
    for key in set(reference) - expected:
        assert checkpoint.tensors[key].role is TensorRole.BOOKKEEPING, key


def test_scalar_weights_of_quantized_models_are_counted() -> None:
    scalars = load(ONNX_DIR / "quant_scalars.onnx")
    roles = {k: t.role for k, t in scalars.tensors.items()}
    assert scalars.tensors["gain_q"].shape == ()  # a 0-d quantized weight feeding a Mul
    assert roles["gain_q"] is TensorRole.QUANTIZED
    # alpha multiplies the activations and is also a DequantizeLinear scale: it is a weight.
    assert roles["alpha"] is TensorRole.PARAMETER
    assert roles["beta"] is TensorRole.PARAMETER  # a float weight quantized at run time
    for key in ("gain_s", "gain_z", "lw_s", "lw_z", "qm_bs", "qm_bz", "mi_bz", "mi_bs"):
        assert roles[key] is TensorRole.BOOKKEEPING, key
    contrib = load(ONNX_DIR / "quant_contrib.onnx")
    roles = {k: t.role for k, t in contrib.tensors.items()}
    assert contrib.tensors["m_b"].shape == ()
    assert {k for k, r in roles.items() if r is TensorRole.QUANTIZED} == {
        "m_b",
        "a_b",
        "g_b",
        "g_c",
    }
    assert contrib.parameters == 1 + 4 + 12 + 3


def test_per_tensor_dequantize_of_a_vector_ignores_the_default_axis(tmp_path: Path) -> None:
    # ONNX DequantizeLinear: a per-tensor (scalar) scale ignores `axis`, whose default (1) lies
    # outside a 1-D input.
    q = numpy_helper.from_array(np.array([-3, 7, 100], np.int8), "c_q")
    s = numpy_helper.from_array(np.array(0.25, np.float32), "c_s")
    w = numpy_helper.from_array(np.arange(6, dtype=np.float32).reshape(3, 2), "W")
    graph = helper.make_graph(
        [
            helper.make_node("DequantizeLinear", ["c_q", "c_s"], ["c"], name="dq_c"),
            helper.make_node("Gemm", ["x", "W", "c"], ["y"], name="fc", transB=1),
        ],
        "g",
        [_vi("x", [1, 2])],
        [_vi("y", [1, 3])],
        initializer=[q, s, w],
    )
    path = _save(tmp_path, graph, opset=21)
    (layer,) = load(path).layers
    out = run(with_outputs(path, ["c"]), {"x": np.zeros((1, 2), np.float32)})
    np.testing.assert_array_equal(layer.bias_vector(), out["c"])  # reference: onnx.reference


# --- names and scopes -------------------------------------------------------------------------


def test_shadowed_subgraph_names_and_layer_names(tmp_path: Path, rng: np.random.Generator) -> None:
    inner, outer = (
        rng.normal(size=(2, 2)).astype(np.float32),
        rng.normal(size=(2, 2)).astype(np.float32),
    )
    branch = helper.make_graph(
        [helper.make_node("MatMul", ["x", "W"], ["b_out"], name="dup")],
        "then",
        [],
        [_vi("b_out")],
        initializer=[numpy_helper.from_array(inner, "W")],
    )
    other = helper.make_graph(
        [helper.make_node("Identity", ["x"], ["e_out"])], "else", [], [_vi("e_out")]
    )
    graph = helper.make_graph(
        [
            helper.make_node("If", ["c"], ["y0"], then_branch=branch, else_branch=other),
            helper.make_node("MatMul", ["y0", "W"], ["y1"], name="dup"),
            helper.make_node("MatMul", ["y1", "W"], ["y"], name=""),
        ],
        "g",
        [_vi("x", [1, 2]), helper.make_tensor_value_info("c", TensorProto.BOOL, [])],
        [_vi("y")],
        initializer=[numpy_helper.from_array(outer, "W")],
    )
    checkpoint = load(_save(tmp_path, graph))
    assert set(checkpoint.tensors) == {"W", "If#0.then_branch/W"}
    np.testing.assert_array_equal(checkpoint.tensors["If#0.then_branch/W"].read(), inner)
    # Duplicate and empty node names give way to the weight tensor name (made unique).
    names = [layer.name for layer in checkpoint.layers]
    assert names == ["If#0.then_branch/W", "W", "W#2"]
    np.testing.assert_array_equal(checkpoint.layers[0].weight_view(), inner.T)
    np.testing.assert_array_equal(checkpoint.layers[1].weight_view(), outer.T)
    assert checkpoint.layers[2].inputs_from == ("W",)


# --- patterns built here: activations, norms, links, look-through ------------------------------


class _Graph:
    """A small builder: each ``dense``/``conv`` adds a node with a fresh weight initializer."""

    def __init__(self, rng: np.random.Generator) -> None:
        self.rng, self.nodes, self.inits, self.count = rng, [], [], 0

    def const(self, value: np.ndarray | float, name: str | None = None) -> str:
        self.count += 1
        name = name or f"c{self.count}"
        self.inits.append(
            numpy_helper.from_array(
                np.asarray(value, np.float32 if isinstance(value, float) else None), name
            )
        )
        return name

    def op(self, op: str, inputs: list[str], name: str | None = None, **attrs: Any) -> str:
        self.count += 1
        out = f"v{self.count}"
        self.nodes.append(
            helper.make_node(op, inputs, [out], name=name or f"{op}_{self.count}", **attrs)
        )
        return out

    def dense(self, x: str, name: str, fan: int = 4, units: int = 4) -> str:
        weight = self.const(self.rng.normal(size=(fan, units)).astype(np.float32), f"{name}.w")
        return self.op("MatMul", [x, weight], name)

    def conv(self, x: str, name: str, channels: int = 2) -> str:
        kernel = self.const(
            self.rng.normal(size=(channels, channels, 1, 1)).astype(np.float32), f"{name}.w"
        )
        return self.op("Conv", [x, kernel], name)

    def save(
        self, tmp: Path, inputs: list[onnx.ValueInfoProto], outputs: list[str], opset: int = 21
    ) -> Path:
        graph = helper.make_graph(
            self.nodes, "patterns", inputs, [_vi(o) for o in outputs], initializer=self.inits
        )
        return _save(tmp, graph, opset=opset)


def test_activation_patterns(tmp_path: Path, rng: np.random.Generator) -> None:
    g = _Graph(rng)
    a = g.op("Elu", [g.dense("x", "elu")])
    b = g.op("Gelu", [g.dense(a, "gelu_op")])
    h = g.dense(b, "gelu_tanh")  # x·½(1 + tanh(√(2/π)(x + 0.044715x³)))
    cube = g.op("Mul", [g.op("Pow", [h, g.const(3.0)]), g.const(0.044715)])
    inner = g.op("Mul", [g.op("Add", [h, cube]), g.const(0.7978845)])
    c = g.op(
        "Mul", [g.op("Mul", [h, g.op("Add", [g.op("Tanh", [inner]), g.const(1.0)])]), g.const(0.5)]
    )
    q = g.dense(c, "gelu_quick")
    d = g.op("Mul", [q, g.op("Sigmoid", [g.op("Mul", [q, g.const(1.702)])])])
    e = g.dense(d, "clip_neg")
    e = g.op("Clip", [e, g.const(-1.0), g.const(1.0)])
    f = g.dense(e, "residual")
    f = g.op("Relu", [g.op("Add", [f, e])])
    fan = g.dense(f, "fan_out")
    left, right = g.dense(fan, "left"), g.dense(fan, "right")
    path = g.save(tmp_path, [_vi("x", [1, 4])], [left, right])
    checkpoint = load(path)
    acts = {layer.name: layer.activation for layer in checkpoint.layers}
    assert acts == {
        "elu": Activation.UNKNOWN,  # no Activation member for ELU
        "gelu_op": Activation.GELU,
        "gelu_tanh": Activation.GELU,
        "gelu_quick": Activation.GELU,
        "clip_neg": Activation.UNKNOWN,  # Clip(-1, 1) is not a ReLU
        "residual": Activation.UNKNOWN,  # the ReLU acts on a sum with another producer's units
        "fan_out": Activation.IDENTITY,  # straight into two layers
        "left": Activation.IDENTITY,
        "right": Activation.IDENTITY,
    }
    links = {layer.name: layer.inputs_from for layer in checkpoint.layers}
    # residual Add of two producers: both listed, in input order (clip_neg through its Clip).
    assert links["fan_out"] == ("residual", "clip_neg")
    assert links["left"] == links["right"] == ("fan_out",)
    assert [layer.name for layer in checkpoint.layers if layer.is_output] == ["left", "right"]


def test_norm_kinds_and_channel_keeping_ops(tmp_path: Path, rng: np.random.Generator) -> None:
    g = _Graph(rng)
    scale, shift = (
        g.const(rng.normal(size=2).astype(np.float32), n) for n in ("in.scale", "in.shift")
    )
    a = g.op(
        "Relu",
        [g.op("InstanceNormalization", [g.conv("x", "conv_in"), scale, shift], epsilon=1e-3)],
    )
    a = g.op("Pad", [g.op("Dropout", [a]), g.const(np.zeros(8, np.int64), "pads")])
    gscale, gshift = (
        g.const(rng.normal(size=2).astype(np.float32), n) for n in ("gn.scale", "gn.shift")
    )
    b = g.op("GroupNormalization", [g.conv(a, "conv_gn"), gscale, gshift], num_groups=1)
    b = g.op("Sigmoid", [g.op("Identity", [b])])
    c = g.op("Flatten", [g.op("GlobalAveragePool", [g.conv(b, "conv_last")])])
    y = g.dense(c, "head", fan=2, units=3)
    checkpoint = load(g.save(tmp_path, [_vi("x", [1, 2, 4, 4])], [y]))
    first, second, last, head = checkpoint.layers
    assert first.norm is not None and first.norm.kind is NormKind.INSTANCE
    assert (first.norm.scale, first.norm.shift, first.norm.eps) == (
        "in.scale",
        "in.shift",
        pytest.approx(1e-3),
    )
    assert first.activation is Activation.RELU
    assert second.norm is not None and second.norm.kind is NormKind.GROUP
    assert second.activation is Activation.SIGMOID
    assert second.inputs_from == ("conv_in",)  # through ReLU, Dropout and Pad
    assert head.inputs_from == ("conv_last",)  # through GlobalAveragePool and Flatten
    assert last.activation is Activation.IDENTITY


def test_runtime_reshape_leaves_the_link_unknown(tmp_path: Path, rng: np.random.Generator) -> None:
    g = _Graph(rng)
    h = g.dense("x", "first")
    shape = g.op("Shape", [h])
    y = g.dense(g.op("Reshape", [h, shape]), "second")
    checkpoint = load(g.save(tmp_path, [_vi("x", [1, 4])], [y]))
    first, second = checkpoint.layers
    assert second.linked_by is Link.NONE and second.inputs_from == ()
    assert first.linked_by is Link.GRAPH
    assert not first.is_output  # the graph shows it feeds a layer, even without a known link


def test_lstm_weights_rebuilt_by_slice_and_concat(tmp_path: Path, rng: np.random.Generator) -> None:
    hidden, fan = 3, 2
    # Stored in torch gate order (i, f, g, o); the graph reorders to ONNX (i, o, f, c).
    torch_w = rng.normal(size=(4 * hidden, fan)).astype(np.float32)
    torch_r = rng.normal(size=(1, 4 * hidden, hidden)).astype(np.float32)
    g = _Graph(rng)
    w = g.const(torch_w, "lstm.weight_ih")
    pieces = []
    for block in (0, 3, 1, 2):
        pieces.append(
            g.op(
                "Slice",
                [
                    w,
                    g.const(np.array([block * hidden]), f"s{block}"),
                    g.const(np.array([(block + 1) * hidden]), f"e{block}"),
                    g.const(np.array([0]), f"a{block}"),
                ],
            )
        )
    w_onnx = g.op("Unsqueeze", [g.op("Concat", pieces, axis=0), g.const(np.array([0]), "axis0")])
    r = g.const(torch_r, "lstm.weight_hh")
    out = f"v{g.count + 1}"
    g.nodes.append(
        helper.make_node("LSTM", ["x", w_onnx, r], [out], name="lstm", hidden_size=hidden)
    )
    checkpoint = load(g.save(tmp_path, [_vi("x", [5, 1, fan])], [out]))
    views = {layer.name: layer for layer in checkpoint.layers}
    for gate, block in {"i": 0, "o": 3, "f": 1, "c": 2}.items():
        rows = slice(block * hidden, (block + 1) * hidden)
        np.testing.assert_array_equal(views[f"lstm.W.{gate}"].weight_view(), torch_w[rows])
        assert views[f"lstm.W.{gate}"].weight == "lstm.weight_ih"
        # R was stored in ONNX order already: row block position = ONNX gate index
        onnx_rows = slice("iofc".index(gate) * hidden, ("iofc".index(gate) + 1) * hidden)
        np.testing.assert_array_equal(views[f"lstm.R.{gate}"].weight_view(), torch_r[0, onnx_rows])
    # No layer feeds the LSTM, so nothing is a head (mark_outputs' rule: fed, feeding nothing).
    assert not any(layer.is_output for layer in checkpoint.layers)


def test_initializers_listed_as_inputs(tmp_path: Path, rng: np.random.Generator) -> None:
    # IR < 4 writers list every initializer among the graph inputs too.
    weight = rng.normal(size=(2, 3)).astype(np.float32)
    graph = helper.make_graph(
        [helper.make_node("MatMul", ["x", "W"], ["y"], name="mm")],
        "g",
        [_vi("x", [1, 2]), _vi("W", [2, 3])],
        [_vi("y")],
        initializer=[numpy_helper.from_array(weight, "W")],
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 9)])
    model.ir_version = 3
    path = tmp_path / "ir3.onnx"
    path.write_bytes(model.SerializeToString())
    (layer,) = load(path).layers
    np.testing.assert_array_equal(layer.weight_view(), weight.T)
    assert layer.inputs_from == () and layer.linked_by is Link.GRAPH


# --- sniffing ----------------------------------------------------------------------------------


def _others(tmp: Path) -> list[Path]:
    st_numpy.save_file({"w": np.ones((2, 2), np.float32)}, tmp / "a.safetensors")
    np.savez(tmp / "b.npz", w=np.ones(3))
    with h5py.File(tmp / "c.h5", "w") as handle:
        handle["w"] = np.ones(3)
    with zipfile.ZipFile(tmp / "d.zip", "w") as archive:
        archive.writestr("archive/data.pkl", pickle.dumps({"a": 1}))
    (tmp / "e.pkl").write_bytes(pickle.dumps({"a": 1}, protocol=2))
    (tmp / "f.json").write_text('{"weight_map": {}}')
    (tmp / "g.txt").write_text("hello world\n")
    return sorted(tmp.iterdir())


def test_sniff_claims_onnx_only(tmp_path: Path) -> None:
    loader = OnnxLoader()
    for name in MODELS:
        path = ONNX_DIR / name
        assert loader.sniff(path, path.read_bytes()[:4096]), name
    for path in _others(tmp_path):
        assert not loader.sniff(path, path.read_bytes()[:4096]), path.name


# --- hostile input ------------------------------------------------------------------------------


def _tiny_graph(init: TensorProto, nodes: list[onnx.NodeProto] | None = None) -> onnx.GraphProto:
    return helper.make_graph(
        nodes or [helper.make_node("MatMul", ["x", init.name], ["y"])],
        "g",
        [_vi("x", [1, 2])],
        [_vi("y")],
        initializer=[init],
    )


def _external(tmp: Path, entries: dict[str, str], size: int = 64) -> Path:
    (tmp / "weights.bin").write_bytes(bytes(size))
    tensor = TensorProto(
        name="W", data_type=TensorProto.FLOAT, dims=[2, 2], data_location=TensorProto.EXTERNAL
    )
    for key, value in entries.items():
        tensor.external_data.add(key=key, value=value)
    return _save(tmp, _tiny_graph(tensor))


def test_external_data_outside_the_folder_is_refused(tmp_path: Path) -> None:
    model_dir = tmp_path / "model"
    model_dir.mkdir()
    outside = tmp_path / "secret.bin"
    outside.write_bytes(bytes(64))
    (model_dir / "link.bin").symlink_to(outside)
    for location in (
        "../secret.bin",
        str(outside),
        "link.bin",
        "sub/../../secret.bin",
        "missing.bin",
    ):
        path = _external(model_dir, {"location": location})
        with pytest.raises(LoadError) as caught:
            load(path)
        assert str(path) in str(caught.value)
    good = load(_external(model_dir, {"location": "weights.bin", "offset": "16", "length": "16"}))
    np.testing.assert_array_equal(good.tensors["W"].read(), np.zeros((2, 2), np.float32))


@pytest.mark.parametrize(
    "entries",
    [
        {"location": "weights.bin", "offset": "60"},  # offset + 16 bytes past the 64-byte file
        {"location": "weights.bin", "length": "12"},  # length disagrees with float32 [2, 2]
        {"location": "weights.bin", "offset": "-4"},
        {"location": "weights.bin", "offset": "1e3"},
        {"offset": "0"},  # no location
    ],
)
def test_external_data_ranges_are_checked(tmp_path: Path, entries: dict[str, str]) -> None:
    with pytest.raises(LoadError):
        load(_external(tmp_path, entries))


def _malformed_models(tmp: Path) -> Iterator[Path]:
    def save(graph: onnx.GraphProto, name: str) -> Path:
        return _save(tmp, graph, name)

    short = numpy_helper.from_array(np.ones((2, 2), np.float32), "W")
    short.raw_data = short.raw_data[:-4]
    yield save(_tiny_graph(short), "short_raw.onnx")
    typed = TensorProto(name="W", data_type=TensorProto.FLOAT, dims=[2, 2], float_data=[1.0, 2.0])
    yield save(_tiny_graph(typed), "short_typed.onnx")
    unknown = TensorProto(name="W", data_type=99, dims=[1], raw_data=b"\0" * 4)
    yield save(_tiny_graph(unknown), "unknown_type.onnx")
    negative = TensorProto(name="W", data_type=TensorProto.FLOAT, dims=[-1, 2], raw_data=b"")
    yield save(_tiny_graph(negative), "negative_dim.onnx")
    huge = TensorProto(
        name="W", data_type=TensorProto.FLOAT, dims=[2**40, 2**40], raw_data=b"\0" * 32
    )
    yield save(_tiny_graph(huge), "huge_dims.onnx")
    two = helper.make_node("Constant", [], ["W"], value_float=1.0, value_int=2)
    yield save(helper.make_graph([two], "g", [], [_vi("W")]), "two_values.onnx")
    wrong = helper.make_node("Conv", ["x", "K"], ["y"], group=2)
    wrong.attribute[0].type = onnx.AttributeProto.FLOAT
    yield save(
        _tiny_graph(numpy_helper.from_array(np.ones((2, 1, 1, 1), np.float32), "K"), [wrong]),
        "wrong_attr_type.onnx",
    )
    deep = tmp / "deep.onnx"
    deep.write_bytes(_deep_model(40))
    yield deep


def _field(number: int, payload: bytes) -> bytes:
    """One length-delimited protobuf field (the package refuses to build such deep messages)."""
    length, size = b"", len(payload)
    while True:
        length += bytes([(size & 0x7F) | (0x80 if size > 0x7F else 0)])
        size >>= 7
        if not size:
            return bytes([number << 3 | 2]) + length + payload


def _deep_model(levels: int) -> bytes:
    """If nodes nested ``levels`` deep: GraphProto.node(1) → NodeProto.attribute(5) → g(6)."""
    graph = b""
    for _ in range(levels):
        attribute = _field(1, b"then_branch") + b"\xa0\x01\x05" + _field(6, graph)  # type=GRAPH
        graph = _field(1, _field(4, b"If") + _field(5, attribute))
    return bytes([1 << 3, 8]) + _field(7, graph) + _field(8, bytes([2 << 3, 17]))


def test_malformed_models_raise_load_error(tmp_path: Path) -> None:
    for path in _malformed_models(tmp_path):
        with pytest.raises(LoadError) as caught:
            load(path)
        assert str(path) in str(caught.value), path.name


def test_bad_bytes_raise_load_error(tmp_path: Path, rng: np.random.Generator) -> None:
    cases = {
        "random.onnx": rng.integers(0, 256, size=4096, dtype=np.uint8).tobytes(),
        "decode.onnx": b"\x08\x07\x3a\xff\xff\xff\xff\x0f",  # graph length past the end
        "wire.onnx": b"\x08\x07\x3a\x02\x0f\x00",  # wire type 7 inside the graph
        "nograph.onnx": b"\x08\x07\x12\x03abc",
        "empty.onnx": b"",
    }
    for name, data in cases.items():
        path = tmp_path / name
        path.write_bytes(data)
        with pytest.raises(LoadError):
            load(path)
        with pytest.raises(LoadError):
            OnnxLoader().load(path)


def test_names_that_are_not_utf8(tmp_path: Path) -> None:
    # The protobuf runtime returns bytes for such string fields; names must still be str.
    weight = numpy_helper.from_array(np.ones((2, 2), np.float32), "Wq")
    data = _save(tmp_path, _tiny_graph(weight)).read_bytes().replace(b"Wq", b"\xff\xfe")
    path = tmp_path / "bytes.onnx"
    path.write_bytes(data)
    checkpoint = load(path)
    assert list(checkpoint.tensors) == ["\\xff\\xfe"]
    (layer,) = checkpoint.layers
    assert layer.weight == "\\xff\\xfe" and isinstance(layer.name, str)
    np.testing.assert_array_equal(layer.weight_view(), np.ones((2, 2), np.float32))


def test_sparse_index_out_of_range_fails_on_read(tmp_path: Path) -> None:
    values = numpy_helper.from_array(np.ones(2, np.float32), "S")
    indices = numpy_helper.from_array(np.array([1, 9], np.int64), "S_idx")
    graph = helper.make_graph(
        [],
        "g",
        [],
        [_vi("S")],
        sparse_initializer=[helper.make_sparse_tensor(values, indices, [2, 2])],
    )
    checkpoint = load(_save(tmp_path, graph))
    with pytest.raises(LoadError):
        checkpoint.tensors["S"].read()


def test_cyclic_graph_terminates(tmp_path: Path) -> None:
    weight = numpy_helper.from_array(np.ones((2, 2), np.float32), "W")
    nodes = [
        helper.make_node("MatMul", ["loop", "W"], ["a"], name="mm"),
        helper.make_node("Relu", ["a"], ["loop"], name="back"),
    ]
    checkpoint = load(_save(tmp_path, _tiny_graph(weight, nodes)))
    (layer,) = checkpoint.layers
    assert layer.activation is Activation.RELU


def _read_everything(checkpoint: Checkpoint) -> None:
    for tensor in checkpoint.tensors.values():
        tensor.read()
        tensor.read_float32()
    for layer in checkpoint.layers:
        layer.weight_view()
        layer.bias_vector()


def _mutate(data: bytes, kind: str, position: int, value: int, length: int) -> bytes:
    if not data:
        return data
    position %= len(data)
    if kind == "truncate":
        return data[:position]
    if kind == "flip":
        return data[:position] + bytes([data[position] ^ (1 << (value % 8))]) + data[position + 1 :]
    if kind == "byte":
        return data[:position] + bytes([value % 256]) + data[position + 1 :]
    # splice: copy a run of the file over another place
    source = (position * 7 + value) % len(data)
    return data[:position] + data[source : source + length] + data[position + length :]


_SAMPLES = {
    name: (ONNX_DIR / name).read_bytes()
    for name in (
        "mlp_seq.onnx",
        "quant.onnx",
        "constants.onnx",
        "loop_nested.onnx",
        "quant_contrib.onnx",
    )
}


@settings(
    max_examples=150,
    deadline=timedelta(seconds=3),
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)
@given(
    sample=st.sampled_from(sorted(_SAMPLES)),
    edits=st.lists(
        st.tuples(
            st.sampled_from(["truncate", "flip", "byte", "splice"]),
            st.integers(0, 10**6),
            st.integers(0, 255),
            st.integers(1, 64),
        ),
        min_size=1,
        max_size=3,
    ),
)
def test_mutated_files_load_or_raise_load_error(
    tmp_path: Path, sample: str, edits: list[tuple[str, int, int, int]]
) -> None:
    data = _SAMPLES[sample]
    for kind, position, value, length in edits:
        data = _mutate(data, kind, position, value, length)
    path = tmp_path / "mutated.onnx"
    path.write_bytes(data)
    try:
        checkpoint = load(path)
        _read_everything(checkpoint)
    except LoadError as exc:
        assert str(path) in str(exc)


# --- budgets and linear-time passes -------------------------------------------------------


def _sparse_gemm(tmp: Path, dims: list[int]) -> tuple[Path, onnx.SparseTensorProto]:
    values = numpy_helper.from_array(np.array([1.5, -2.0], dtype=np.float32), "W")
    indices = numpy_helper.from_array(np.array([0, 5], dtype=np.int64), "W_idx")
    sparse = helper.make_sparse_tensor(values, indices, dims)
    graph = helper.make_graph(
        [helper.make_node("Gemm", ["x", "W"], ["y"], name="g")],
        "g",
        [_vi("x")],
        [_vi("y")],
        sparse_initializer=[sparse],
    )
    return _save(tmp, graph), sparse


def test_sparse_tensor_is_densified_only_within_the_expansion_budget(tmp_path: Path) -> None:
    from steelyard import budget

    path, sparse = _sparse_gemm(tmp_path, [512, 1024])  # 2 MiB dense from 24 stored bytes
    with budget.using(budget.Budget(expansion_bytes=2**20)), pytest.raises(LoadError, match="expansion budget"):
        load(path)
    # Within the budget the dense values are the reference densification (numpy_helper).
    np.testing.assert_array_equal(load(path).tensors["W"].read(), _dense(sparse))


def test_sparse_tensors_are_charged_to_the_checkpoint_budget(tmp_path: Path) -> None:
    from steelyard import budget

    path, _ = _sparse_gemm(tmp_path, [512, 1024])
    with budget.using(budget.Budget(checkpoint_expansion_bytes=2**20)), pytest.raises(LoadError, match="inflated for this checkpoint"):
        load(path)


def _concat_chain(tmp: Path, levels: int) -> Path:
    init = numpy_helper.from_array(np.arange(64 * 64, dtype=np.float32).reshape(64, 64), "c0")
    nodes = [
        helper.make_node("Concat", [f"c{i}", f"c{i}"], [f"c{i + 1}"], axis=0)
        for i in range(levels)
    ]
    nodes.append(helper.make_node("Gemm", ["x", f"c{levels}"], ["y"], name="g", transB=1))
    graph = helper.make_graph(nodes, "g", [_vi("x")], [_vi("y")], initializer=[init])
    return _save(tmp, graph)


def test_folded_constant_matches_the_reference_evaluator_within_budget(tmp_path: Path) -> None:
    path = _concat_chain(tmp_path, 3)
    layer = load(path).layers[0]
    x = np.random.default_rng(0).standard_normal((2, 64)).astype(np.float32)
    # reference: onnx.reference.ReferenceEvaluator runs the Concat chain and the Gemm
    expected = run(onnx.load(str(path)), {"x": x})["y"]
    np.testing.assert_allclose(x @ layer.matrix().T, expected, rtol=1e-5)


def test_folded_constant_beyond_the_expansion_budget_is_refused(tmp_path: Path) -> None:
    from steelyard import budget

    path = _concat_chain(tmp_path, 8)  # 16 KiB stored, 4 MiB folded
    with budget.using(budget.Budget(expansion_bytes=2**20)), pytest.raises(LoadError, match="folded through Concat"):
        load(path)


def test_repeated_layer_names_get_numbered_suffixes_in_order(tmp_path: Path) -> None:
    # Four unnamed Gemm nodes read one weight, and a fifth node is literally named "W#3":
    # the suffixes skip the name already taken.
    weight = numpy_helper.from_array(np.ones((2, 2), dtype=np.float32), "W")
    other = numpy_helper.from_array(np.ones((2, 2), dtype=np.float32), "V")
    nodes = [helper.make_node("Gemm", ["x", "V"], ["v"], name="W#3")]
    nodes += [helper.make_node("Gemm", ["x", "W"], [f"y{i}"]) for i in range(4)]
    graph = helper.make_graph(nodes, "g", [_vi("x")], [_vi("y0")], initializer=[weight, other])
    names = [layer.name for layer in load(_save(tmp_path, graph)).layers]
    assert names == ["W#3", "W", "W#2", "W#4", "W#5"]


def test_unnamed_initializers_get_distinct_keys(tmp_path: Path) -> None:
    inits = [numpy_helper.from_array(np.array([float(i)], dtype=np.float32), "") for i in range(5)]
    inits.append(numpy_helper.from_array(np.ones((2, 2), dtype=np.float32), "W"))
    graph = helper.make_graph(
        [helper.make_node("Gemm", ["x", "W"], ["y"], name="g")],
        "g",
        [_vi("x")],
        [_vi("y")],
        initializer=inits,
    )
    tensors = load(_save(tmp_path, graph)).tensors
    unnamed = sorted(k for k in tensors if k.startswith("<unnamed>"))
    assert unnamed == ["<unnamed>", *(f"<unnamed>#{i}" for i in range(2, 6))]
    # Values stay with their own key (reference: onnx.numpy_helper.to_array of each).
    assert [float(tensors[k].read()[0]) for k in ["<unnamed>", "<unnamed>#2", "<unnamed>#5"]] == [
        0.0,
        1.0,
        4.0,
    ]
