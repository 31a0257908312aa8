"""Weights at the edges of their float format are audited quietly: no numpy warning reaches
the terminal, and the audit completes with a report.

The values are the IEEE 754 binary32 and binary16 extremes (largest finite value, smallest
subnormal, ±Inf, NaN; IEEE Std 754-2019, table 3.5) and bfloat16's (its largest finite value
3.3895e38, as ``ml_dtypes.finfo`` gives it), written with the ``safetensors`` package, the
``onnx`` package (a convolution folded with batch normalisation) and the ``gguf`` package;
every case runs the whole audit (all rules, one job, so a warning is raised in this thread),
and a comparison, with warnings turned into errors.
"""

from __future__ import annotations

import json
import warnings
from collections.abc import Callable
from pathlib import Path
from typing import Any

import ml_dtypes
import numpy as np
import pytest
from click.testing import CliRunner
from safetensors.numpy import save_file

from steelyard.api import audit_one, compare
from steelyard.cli import app
from steelyard.findings import Severity
from steelyard.policy import Policy

F32 = np.finfo(np.float32)

#: name → how to turn a layer's N(0, 0.05²) weights into the extreme case
CASES: dict[str, Callable[[np.ndarray, np.random.Generator], np.ndarray]] = {
    "float32-max": lambda w, rng: np.full_like(w, F32.max),
    "alternating-max": lambda w, rng: np.where(rng.random(w.shape) < 0.5, F32.max, -F32.max),
    "scaled-1e37": lambda w, rng: w * np.float32(1e37),
    "one-max-outlier": lambda w, rng: _with(w, (min(3, len(w) - 1), min(5, w.shape[1] - 1)), F32.max),
    "subnormal": lambda w, rng: w * np.float32(1e-44),
    "smallest-subnormal": lambda w, rng: np.full_like(w, F32.smallest_subnormal),
    "infinities": lambda w, rng: np.where(rng.random(w.shape) < 0.5, np.inf, -np.inf),
    "nan-rows": lambda w, rng: _rows(w, np.nan),
    "zeros": lambda w, rng: np.zeros_like(w),
    "constant-rows": lambda w, rng: np.repeat(w[:, :1], w.shape[1], axis=1),
}


def _with(w: np.ndarray, at: tuple[int, int], value: float) -> np.ndarray:
    out = w.copy()
    out[at] = value
    return out


def _rows(w: np.ndarray, value: float) -> np.ndarray:
    out = w.copy()
    out[::3] = value
    return out


@pytest.mark.parametrize("dtype", ["float32", "bfloat16", "float16"])
@pytest.mark.parametrize("case", sorted(CASES))
def test_extreme_weights_are_audited_without_warnings(tmp_path: Path, case: str, dtype: str) -> None:
    rng = np.random.default_rng(len(case))
    stored = {"float32": np.float32, "bfloat16": ml_dtypes.bfloat16, "float16": np.float16}[dtype]
    tensors = {}
    for index, (units, fan_in) in enumerate(((64, 64), (96, 300), (300, 96), (8, 1000))):
        weights = (rng.standard_normal((units, fan_in)) * 0.05).astype(np.float32)
        if index != 2:  # one healthy layer beside the extreme ones
            weights = CASES[case](weights, rng).astype(np.float32)
        with np.errstate(over="ignore"):  # float16 cannot hold float32's extremes: they become Inf
            tensors[f"model.layers.{index}.mlp.up_proj.weight"] = weights.astype(stored)
    path = tmp_path / "model.safetensors"
    save_file(tensors, str(path))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        audit = audit_one(path, Policy(), jobs=1)
    assert len(audit.layers) == 4


def _transformer(case: str, rng: np.random.Generator) -> dict[str, np.ndarray]:
    """A one-block decoder (token tables, four attention heads, gated MLP, norms) with every
    matrix but the down projection turned into ``case``."""
    vocab, width, inner = 300, 64, 96
    shapes = {
        "model.embed_tokens.weight": (vocab, width),
        "model.layers.0.self_attn.q_proj.weight": (width, width),
        "model.layers.0.self_attn.k_proj.weight": (width, width),
        "model.layers.0.self_attn.v_proj.weight": (width, width),
        "model.layers.0.self_attn.o_proj.weight": (width, width),
        "model.layers.0.mlp.gate_proj.weight": (inner, width),
        "model.layers.0.mlp.up_proj.weight": (inner, width),
        "model.layers.0.mlp.down_proj.weight": (width, inner),
        "lm_head.weight": (vocab, width),
    }
    out = {}
    for name, shape in shapes.items():
        weights = (rng.standard_normal(shape) * 0.05).astype(np.float32)
        out[name] = weights if "down_proj" in name else CASES[case](weights, rng).astype(np.float32)
    for norm in ("model.layers.0.input_layernorm.weight", "model.layers.0.post_attention_layernorm.weight",
                 "model.norm.weight"):
        out[norm] = CASES[case](np.ones((1, width), np.float32), rng).astype(np.float32)[0]
    return out


@pytest.mark.parametrize("case", sorted(CASES))
def test_extreme_transformer_weights_are_audited_without_warnings(tmp_path: Path, case: str) -> None:
    """The transformer rules too (token tables, attention heads, norms), in bfloat16."""
    rng = np.random.default_rng(len(case) + 1)
    tensors = {k: v.astype(ml_dtypes.bfloat16) for k, v in _transformer(case, rng).items()}
    save_file(tensors, str(tmp_path / "model.safetensors"))
    (tmp_path / "config.json").write_text(
        '{"model_type": "llama", "hidden_size": 64, "num_attention_heads": 4, '
        '"num_key_value_heads": 4, "intermediate_size": 96, "vocab_size": 300}',
        encoding="utf-8",
    )
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        audit = audit_one(tmp_path / "model.safetensors", Policy(), jobs=1)
    assert len(audit.layers) >= 8
    # The JSON report stays strict JSON (RFC 8259 has no Infinity or NaN), on two jobs too.
    result = CliRunner().invoke(
        app, ["audit", str(tmp_path / "model.safetensors"), "--format", "json", "--jobs", "2",
              "--fail-on", "never"],
    )
    assert result.exit_code == 0, result.output

    def refuse(constant: str) -> None:
        raise AssertionError(f"non-standard JSON constant {constant}")

    json.loads(result.stdout, parse_constant=refuse)


def _save_onnx(
    path: Path, nodes: list[Any], arrays: dict[str, np.ndarray], x_shape: list[int], elem: int
) -> None:
    """An opset-17 model of ``nodes`` from input ``x`` (``x_shape``) to output ``y`` ([1, 10]),
    both of element type ``elem``, with ``arrays`` as initializers; written with ``onnx``."""
    from onnx import helper, numpy_helper, save

    graph = helper.make_graph(
        nodes, "extreme", [helper.make_tensor_value_info("x", elem, x_shape)],
        [helper.make_tensor_value_info("y", elem, [1, 10])],
        [numpy_helper.from_array(v, k) for k, v in arrays.items()],
    )
    save(helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)]), str(path))


def _onnx_model(case: str, path: Path) -> None:
    """Conv 3×3 (8 → 16 channels) with batch normalisation, then a dense layer; the
    convolution, the normalisation scale and the dense weights turned into ``case``."""
    from onnx import TensorProto, helper

    rng = np.random.default_rng(len(case) + 2)

    def extreme(shape: tuple[int, int]) -> np.ndarray:
        return CASES[case]((rng.standard_normal(shape) * 0.05).astype(np.float32), rng).astype(np.float32)

    zeros = np.zeros(16, np.float32)
    arrays = {
        "conv.w": extreme((16, 72)).reshape(16, 8, 3, 3), "conv.b": zeros,
        "bn.s": CASES[case](np.ones((1, 16), np.float32), rng).astype(np.float32)[0],
        "bn.b": zeros, "bn.m": zeros, "bn.v": np.ones(16, np.float32),
        "fc.w": np.ascontiguousarray(extreme((10, 576)).T), "fc.b": np.zeros(10, np.float32),
        "shape": np.array([1, 576], np.int64),
    }
    nodes = [
        helper.make_node("Conv", ["x", "conv.w", "conv.b"], ["c"], pads=[1, 1, 1, 1]),
        helper.make_node("BatchNormalization", ["c", "bn.s", "bn.b", "bn.m", "bn.v"], ["n"]),
        helper.make_node("Relu", ["n"], ["r"]),
        helper.make_node("Reshape", ["r", "shape"], ["f"]),
        helper.make_node("Gemm", ["f", "fc.w", "fc.b"], ["y"]),
    ]
    _save_onnx(path, nodes, arrays, [1, 8, 6, 6], TensorProto.FLOAT)


def _gguf_model(case: str, path: Path) -> None:
    """A one-block llama-style GGUF file of float32 tensors turned into ``case``."""
    import gguf

    rng = np.random.default_rng(len(case) + 3)
    writer = gguf.GGUFWriter(str(path), "llama")
    writer.add_block_count(1)
    for name, shape in (("token_embd.weight", (64, 32)), ("blk.0.ffn_up.weight", (48, 32)),
                        ("blk.0.ffn_down.weight", (32, 48)), ("output.weight", (64, 32))):
        weights = (rng.standard_normal(shape) * 0.05).astype(np.float32)
        writer.add_tensor(name, CASES[case](weights, rng).astype(np.float32))
    writer.write_header_to_file()
    writer.write_kv_data_to_file()
    writer.write_tensors_to_file()
    writer.close()


@pytest.mark.parametrize("case", sorted(CASES))
def test_extreme_onnx_and_gguf_weights_and_their_comparison(tmp_path: Path, case: str) -> None:
    """A folded convolution (ONNX) and token tables (GGUF) of extreme weights are audited,
    and compared with the float32-maximum and 1e37-scaled versions, without warnings."""
    for other in ("float32-max", "scaled-1e37"):
        _onnx_model(other, tmp_path / f"{other}.onnx")
        _gguf_model(other, tmp_path / f"{other}.gguf")
    _onnx_model(case, tmp_path / "case.onnx")
    _gguf_model(case, tmp_path / "case.gguf")
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert len(audit_one(tmp_path / "case.onnx", Policy(), jobs=1).layers) == 2
        assert len(audit_one(tmp_path / "case.gguf", Policy(), jobs=1).layers) >= 3
        for other in ("float32-max", "scaled-1e37"):
            for suffix in (".onnx", ".gguf"):
                report = compare(tmp_path / f"case{suffix}", tmp_path / f"{other}{suffix}")
                json.dumps(report.to_json(), allow_nan=False)


@pytest.mark.parametrize("writer", ["safetensors", "npz"])
@pytest.mark.parametrize("value", [1e300, -1e39, 3.5e38])
def test_float64_beyond_float32_range_fails_the_gate(tmp_path: Path, writer: str, value: float) -> None:
    """A float64 value beyond the float32 range (IEEE Std 754-2019, table 3.5: binary32's
    largest finite value is 3.4028235e38) is what every float32, bf16 or fp16 reader gets as
    ±Inf; the audit reads in float32, so it counts it as non-finite and the gate fails
    (fail closed), quietly, on one job and on two."""
    rng = np.random.default_rng(7)
    tensors = {f"layers.{i}.weight": rng.standard_normal((48, 40)) * 0.05 for i in range(3)}
    tensors["layers.1.weight"][5, 7] = value
    tensors["layers.1.weight"][9, 0] = value
    path = tmp_path / ("model.safetensors" if writer == "safetensors" else "model.npz")
    if writer == "safetensors":
        save_file(tensors, str(path))
    else:
        np.savez(path, **tensors)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        audit = audit_one(path, Policy(), jobs=1)
    found = [f for f in audit.findings if f.rule == "nonfinite" and "layers.1" in f.message]
    assert found, [f.message for f in audit.findings]
    assert "2 non-finite values" in found[0].message
    assert ("0 NaN, 2 +Inf, 0 −Inf" if value > 0 else "0 NaN, 0 +Inf, 2 −Inf") in found[0].message
    assert "beyond the float32 range" in found[0].message
    for jobs in ("1", "2"):
        result = CliRunner().invoke(app, ["audit", str(path), "--format", "json", "--jobs", jobs])
        assert result.exit_code == 1, result.output


def _onnx_float64(path: Path, value: float) -> None:
    """Conv (float64 weights) → Gemm (float64, alpha 2, beta 0.5) with one weight of each set
    to ``value``; written with the ``onnx`` package."""
    from onnx import TensorProto, helper

    rng = np.random.default_rng(11)
    conv = rng.standard_normal((8, 4, 3, 3)) * 0.05
    conv[2, 1, 0, 0] = value
    dense = rng.standard_normal((8 * 16, 10)) * 0.05  # Gemm B is (K × N)
    dense[5, 3] = value
    arrays = {"conv.w": conv, "conv.b": np.zeros(8), "fc.w": dense, "fc.b": np.full(10, value),
              "shape": np.array([1, 128], np.int64)}
    nodes = [
        helper.make_node("Conv", ["x", "conv.w", "conv.b"], ["c"]),
        helper.make_node("Relu", ["c"], ["r"]),
        helper.make_node("Reshape", ["r", "shape"], ["f"]),
        helper.make_node("Gemm", ["f", "fc.w", "fc.b"], ["y"], alpha=2.0, beta=0.5),
    ]
    _save_onnx(path, nodes, arrays, [1, 4, 6, 6], TensorProto.DOUBLE)


def _keras_float64(path: Path, value: float) -> None:
    """A Keras 2 HDF5 model (Conv2D, Dense) of float64 kernels, one weight of each set to
    ``value``; written with ``h5py`` (the layout of tests/rules/test_nonfinite.py)."""
    from tests.rules.test_nonfinite import _write_keras2

    rng = np.random.default_rng(12)
    conv = rng.standard_normal((3, 3, 4, 6)) * 0.05
    conv[1, 1, 2, 3] = value
    dense = rng.standard_normal((5, 7)) * 0.05
    dense[4, 6] = value
    common = {"padding": "valid", "strides": [1, 1], "use_bias": False, "activation": "linear"}
    _write_keras2(path, [
        ("conv", "Conv2D", {**common, "filters": 6, "kernel_size": [3, 3]}, conv),
        ("fc", "Dense", {"units": 7, "activation": "linear", "use_bias": False}, dense),
    ])


@pytest.mark.parametrize("value", [1e300, -1e39])
@pytest.mark.parametrize("writer", ["onnx", "keras"])
def test_float64_beyond_float32_range_in_onnx_and_keras_fails_quietly(
    tmp_path: Path, writer: str, value: float
) -> None:
    """The same fail-closed verdict for ONNX (double initializers, a Gemm's alpha and beta
    applied) and Keras HDF5 (float64 datasets): every layer with such a weight is flagged
    non-finite, with no numpy warning on the way."""
    path = tmp_path / ("model.onnx" if writer == "onnx" else "model.h5")
    (_onnx_float64 if writer == "onnx" else _keras_float64)(path, value)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        audit = audit_one(path, Policy(), jobs=1)
    flagged = {f.tensor for f in audit.findings if f.rule == "nonfinite"}
    expected = {"conv.w", "fc.w", "fc.b"} if writer == "onnx" else {"conv/conv/kernel:0", "fc/fc/kernel:0"}
    assert expected <= flagged, [(f.rule, f.tensor, f.message) for f in audit.findings]
    assert audit.failing(Severity.ERROR)  # the default gate (error) fails
