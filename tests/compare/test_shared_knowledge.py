"""``steelyard compare`` judges both sides with the same knowledge, and reports each problem
once.

Files are written with the reference writers (the ``safetensors`` package, ``onnx.helper``
checked by ``onnx.checker``); the demo fixtures are one model written through safetensors,
numpy, Keras, torch and the ONNX exporter (``fixtures/demo/make_demo.py``). Which units are
dead is decided by hand from the planted weights: a ReLU unit whose weights and bias are all
≤ 0 never fires on the non-negative outputs of a ReLU layer (max(0, ·) ≥ 0, so its
pre-activation is ≤ 0 for every input; the definition of the rectifier), and a unit no
consumer reads (its column is zero in every consumer) changes no output (common practice, no
source).
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from click.testing import CliRunner

from steelyard import api
from steelyard.cli import app
from steelyard.policy import Policy
from tests.conftest import write_safetensors

runner = CliRunner()
DEMO = Path(__file__).resolve().parents[2] / "fixtures" / "demo"


# ---- helpers ------------------------------------------------------------------------------
def _gated(document: dict[str, Any]) -> list[dict[str, Any]]:
    """Findings the gate looks at: the comparison's and the audit's new ones."""
    return [f for f in document["findings"] if not f["present_in_old"]]


def _base(layer: str | None) -> str | None:
    """The ONNX loader names a layer after its weight initializer (``body.weight``), the
    safetensors loader after the module (``body``)."""
    return layer.removesuffix(".weight") if layer else layer


def _save_onnx(path: Path, nodes: list[Any], inits: list[Any], x: list[Any], y: list[Any]) -> Path:
    import onnx
    from onnx import TensorProto, helper

    graph = helper.make_graph(
        nodes,
        "model",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, x)],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, y)],
        inits,
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 13)])
    onnx.checker.check_model(model)  # reference: onnx.checker
    onnx.save(model, path)
    return path


def _mlp(rng: np.random.Generator) -> dict[str, np.ndarray]:
    """stem 8→16, body 16→12, head 12→4: names no naming convention links, so a file without
    a graph knows neither the activations nor which layer feeds which.

    Planted: body unit 5 has weights and bias ≤ 0 (never fires after the ReLU of stem), and
    head ignores body unit 9 (its column is zero). Both are dead only to a reader that knows
    the ReLUs and the links.
    """
    tensors: dict[str, np.ndarray] = {}
    for name, (fan_out, fan_in) in {"stem": (16, 8), "body": (12, 16), "head": (4, 12)}.items():
        tensors[f"{name}.weight"] = (rng.normal(size=(fan_out, fan_in)) / np.sqrt(fan_in)).astype(
            np.float32
        )
        tensors[f"{name}.bias"] = (0.05 + 0.01 * rng.normal(size=fan_out)).astype(np.float32)
    tensors["body.weight"][5] = -np.abs(tensors["body.weight"][5]) - 0.01
    tensors["body.bias"][5] = -0.1
    tensors["head.weight"][:, 9] = 0.0
    return tensors


def _mlp_onnx(path: Path, tensors: dict[str, np.ndarray]) -> Path:
    """Gemm → Relu → Gemm → Relu → Gemm, initializers under the state-dict names."""
    from onnx import helper, numpy_helper

    inits = [numpy_helper.from_array(v, k) for k, v in tensors.items()]
    nodes = [
        helper.make_node("Gemm", ["x", "stem.weight", "stem.bias"], ["a"], transB=1),
        helper.make_node("Relu", ["a"], ["ra"]),
        helper.make_node("Gemm", ["ra", "body.weight", "body.bias"], ["b"], transB=1),
        helper.make_node("Relu", ["b"], ["rb"]),
        helper.make_node("Gemm", ["rb", "head.weight", "head.bias"], ["y"], transB=1),
    ]
    return _save_onnx(path, nodes, inits, [None, 8], [None, 4])


def _conv(rng: np.random.Generator) -> dict[str, np.ndarray]:
    """A depthwise 3×3 convolution (4 channels, groups 4) with a batch normalisation under
    names no convention recognises (``affine.*``), then a 1×1 convolution to 6 channels.
    Planted: γ of channel 2 is 0, which silences that channel whatever its weights."""
    gamma = (1.0 + 0.1 * rng.normal(size=4)).astype(np.float32)
    gamma[2] = 0.0
    return {
        "dw.weight": (rng.normal(size=(4, 1, 3, 3)) / 3.0).astype(np.float32),
        "dw.bias": (0.01 * rng.normal(size=4)).astype(np.float32),
        "affine.weight": gamma,
        "affine.bias": (0.1 + 0.01 * rng.normal(size=4)).astype(np.float32),
        "affine.running_mean": (0.01 * rng.normal(size=4)).astype(np.float32),
        "affine.running_var": (1.0 + 0.1 * rng.random(4)).astype(np.float32),
        "pw.weight": (rng.normal(size=(6, 4, 1, 1)) / 2.0).astype(np.float32),
        "pw.bias": (0.01 * rng.normal(size=6)).astype(np.float32),
    }


#: ONNX initializer names for the normalisation when an exporter renamed it.
_RENAMED = {
    "affine.weight": "bn_gamma",
    "affine.bias": "bn_beta",
    "affine.running_mean": "bn_mean",
    "affine.running_var": "bn_var",
}


def _conv_onnx(path: Path, tensors: dict[str, np.ndarray], rename: bool = False) -> Path:
    from onnx import helper, numpy_helper

    names = {k: (_RENAMED.get(k, k) if rename else k) for k in tensors}
    inits = [numpy_helper.from_array(v, names[k]) for k, v in tensors.items()]
    nodes = [
        helper.make_node(
            "Conv", ["x", "dw.weight", "dw.bias"], ["c"], group=4, kernel_shape=[3, 3], pads=[1] * 4
        ),
        helper.make_node(
            "BatchNormalization",
            [
                "c",
                *(names[f"affine.{p}"] for p in ("weight", "bias", "running_mean", "running_var")),
            ],
            ["n"],
        ),
        helper.make_node("Relu", ["n"], ["r"]),
        helper.make_node("Conv", ["r", "pw.weight", "pw.bias"], ["y"], kernel_shape=[1, 1]),
    ]
    return _save_onnx(path, nodes, inits, [1, 4, 6, 6], [1, 6, 6, 6])


# ---- the same knowledge on both sides -----------------------------------------------------
_DEMO_PAIRS = [
    ("safetensors", "onnx"),
    ("safetensors", "torch-export.onnx"),
    ("npz", "onnx"),
    ("pt", "torch-export.onnx"),
    ("weights.h5", "keras"),
    ("npz", "h5"),
]


@pytest.mark.parametrize("forward", [True, False], ids=["names-to-graph", "graph-to-names"])
@pytest.mark.parametrize(("poor", "rich"), _DEMO_PAIRS)
def test_one_demo_model_in_two_formats_has_nothing_new(poor: str, rich: str, forward: bool) -> None:
    # The damaged demo model has units that are dead only to a reader that knows the ReLUs
    # (fc2 unit 19, never active) or the links (fc3's units fc4 ignores), and a MaxNorm breach
    # only a Keras config declares; every copy holds the same weights.
    files = [DEMO / f"pumpwear-nightly-bad.{poor}", DEMO / f"pumpwear-nightly-bad.{rich}"]
    if not all(f.exists() for f in files):
        pytest.skip("a demo export is not among the committed fixtures")
    old, new = files if forward else files[::-1]
    report = api.compare(old, new, Policy(fail_on="warning"))
    document = report.to_dict()
    assert {e["status"] for e in document["layers"]} == {"same"}
    assert not [f for f in document["findings"] if f["origin"] == "compare"]
    gated = {f["rule"] for f in _gated(document)}
    one_sided_grads = any("only NEW stores optimizer state" in n for n in document["notes"])
    # gradient support is one file's optimizer state, not structure: it cannot be shared
    assert gated <= ({"unsupported-weight"} if one_sided_grads else set())
    assert report.passed is (not gated)
    taker, giver = ("OLD", "NEW") if forward else ("NEW", "OLD")
    assert any(
        n.startswith(f"layer structure of {taker} taken from {giver}") for n in document["notes"]
    ), document["notes"]
    assert {e.get("structure_from") for e in document["layers"]} == {giver}
    # the layer blocks still say what each file describes; only the judging is shared
    for diff in report.comparison.layers:
        assert diff.old_layer is not None and diff.new_layer is not None
        poor_block, rich_block = (
            (diff.old_layer, diff.new_layer) if forward else (diff.new_layer, diff.old_layer)
        )
        assert poor_block["activation"] == "unknown" != rich_block["activation"]


@pytest.mark.parametrize("forward", [True, False], ids=["names-to-graph", "graph-to-names"])
def test_identical_mlp_as_safetensors_and_onnx_has_no_change_finding(
    tmp_path: Path, rng: np.random.Generator, forward: bool
) -> None:
    tensors = _mlp(rng)
    files = [
        write_safetensors(tmp_path / "m.safetensors", tensors),
        _mlp_onnx(tmp_path / "m.onnx", tensors),
    ]
    old, new = files if forward else files[::-1]
    document = api.compare(old, new, Policy(fail_on="info")).to_dict()
    assert {e["status"] for e in document["layers"]} == {"same"}
    assert _gated(document) == []
    # both sides see the planted dead units of body: never active 5, unused 9
    present = [f for f in document["findings"] if f["rule"] == "dead-unit"]
    assert [(_base(f["layer"]), f["units"]) for f in present] == [("body", [5, 9])]
    assert document["gate"]["passed"] is True
    side = "OLD" if forward else "NEW"
    note = next(n for n in document["notes"] if n.startswith("layer structure"))
    assert note.startswith(f"layer structure of {side} taken from") and "(onnx graph)" in note
    assert "activation" in note and "links" in note


def test_a_planted_change_is_still_found_across_formats(
    tmp_path: Path, rng: np.random.Generator
) -> None:
    tensors = _mlp(rng)
    old = write_safetensors(tmp_path / "old.safetensors", tensors)
    changed = {k: v.copy() for k, v in tensors.items()}
    # unit 7 of body now never fires either: its positive weights and bias turned negative
    changed["body.weight"][7] = -np.abs(changed["body.weight"][7])
    changed["body.bias"][7] = -0.1
    new = _mlp_onnx(tmp_path / "new.onnx", changed)
    result = runner.invoke(
        app, ["compare", str(old), str(new), "-f", "json", "--fail-on", "warning"]
    )
    document = json.loads(result.stdout)
    body = next(e for e in document["layers"] if _base(e["name"]) == "body")
    assert body["status"] == "changed" and body["units_died"] == [7]
    gated = _gated(document)
    # one problem, one finding: units-died, with the audit's dead-unit folded in
    assert [(f["rule"], f["units"]) for f in gated] == [("units-died", [7])]
    assert [a["rule"] for a in gated[0]["evidence"]["audit_findings"]] == ["dead-unit"]
    assert result.exit_code == 1 and document["gate"]["passed"] is False


@pytest.mark.parametrize("rename", [False, True], ids=["same-names", "renamed-norm"])
@pytest.mark.parametrize("forward", [True, False], ids=["names-to-graph", "graph-to-names"])
def test_groups_and_a_normalisation_known_only_to_the_graph_are_shared(
    tmp_path: Path, rng: np.random.Generator, forward: bool, rename: bool
) -> None:
    # renamed: the ONNX file holds the normalisation under other names, found by its values
    tensors = _conv(rng)
    files = [
        write_safetensors(tmp_path / "c.safetensors", tensors),
        _conv_onnx(tmp_path / "c.onnx", tensors, rename),
    ]
    old, new = files if forward else files[::-1]
    document = api.compare(old, new, Policy(fail_on="info")).to_dict()
    layers = {_base(e["name"]): e for e in document["layers"]}
    # a depthwise convolution is not "reshaped" just because one file cannot state its groups
    assert layers["dw"]["status"] == "same" and layers["pw"]["status"] == "same"
    assert _gated(document) == []
    # the silenced channel (γ = 0) is dead on both sides, so it is not new
    dead = [
        f for f in document["findings"] if f["rule"] == "dead-unit" and _base(f["layer"]) == "dw"
    ]
    assert dead and all(f["present_in_old"] for f in dead) and 2 in dead[0]["units"]
    note = next(n for n in document["notes"] if n.startswith("layer structure"))
    assert "groups" in note and "normalisation" in note
    # the comparison covers the normalisation's tensors on both sides now
    assert document["coverage"]["compared_share_new"] == 1.0
    assert document["coverage"]["compared_share_old"] == 1.0


def test_a_normalisation_that_cannot_be_told_apart_is_named_in_a_note(
    tmp_path: Path, rng: np.random.Generator
) -> None:
    # the renamed shift and running mean are both all zero: which is which cannot be told by
    # values, so the normalisation is not shared and the report says so
    tensors = _conv(rng)
    tensors["affine.bias"] = np.zeros(4, np.float32)
    tensors["affine.running_mean"] = np.zeros(4, np.float32)
    old = write_safetensors(tmp_path / "c.safetensors", tensors)
    new = _conv_onnx(tmp_path / "c.onnx", tensors, rename=True)
    document = api.compare(old, new).to_dict()
    assert any(
        "could not take its normalisation" in n and "'dw'" in n for n in document["notes"]
    ), document["notes"]
