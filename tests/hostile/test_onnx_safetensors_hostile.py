"""Hostile ONNX and safetensors files, and hostile tensor names in graph-less files.

Every file here is generated at test time and is small: it *claims* much (a dense size, a
folded constant, a unit count, a number in a name, tens of thousands of names) and the case
checks that steelyard refuses it with one line, or reads it cleanly, within the harness's
time and memory limits (20 s, 1 GiB, in a child with a 4 GiB address cap).

ONNX files are built with the ``onnx`` package's helper API (the format's reference writer);
safetensors files are written byte by byte (8-byte little-endian header length, JSON header,
data), as the format's specification describes (https://github.com/huggingface/safetensors,
"Format"), because the reference writer refuses some of the claims tested here.
"""

from __future__ import annotations

import json
import struct
from pathlib import Path

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper

from tests.hostile.harness import assert_bounded, assert_refused, run

# --- writers ------------------------------------------------------------------------------


def _save_onnx(
    path: Path,
    nodes: list[onnx.NodeProto],
    inits: list[onnx.TensorProto],
    outputs: list[str],
    sparse: list[onnx.SparseTensorProto] | None = None,
    inputs: tuple[str, ...] = ("x",),
) -> Path:
    graph = helper.make_graph(
        nodes,
        "hostile",
        [helper.make_tensor_value_info(name, TensorProto.FLOAT, None) for name in inputs],
        [helper.make_tensor_value_info(name, TensorProto.FLOAT, None) for name in outputs],
        initializer=inits,
        sparse_initializer=sparse or [],
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    path.write_bytes(model.SerializeToString())
    return path


def _save_safetensors(path: Path, entries: dict[str, tuple[str, list[int], bytes]]) -> Path:
    """Raw writer: ``name → (dtype tag, shape, data)`` with data laid out back to back."""
    header: dict[str, object] = {}
    blobs: list[bytes] = []
    offset = 0
    for name, (tag, shape, data) in entries.items():
        header[name] = {"dtype": tag, "shape": shape, "data_offsets": [offset, offset + len(data)]}
        blobs.append(data)
        offset += len(data)
    text = json.dumps(header).encode()
    path.write_bytes(struct.pack("<Q", len(text)) + text + b"".join(blobs))
    return path


def _f32(*shape: int, seed: int = 0) -> bytes:
    return np.random.default_rng(seed).standard_normal(shape).astype("<f4").tobytes()


# --- sparse tensors densified ---------------------------------------------------------------


def _sparse_model(path: Path, shapes: list[tuple[int, int]]) -> Path:
    """Gemm layers whose B is a sparse initializer of ``shape`` with one stored value."""
    sparse: list[onnx.SparseTensorProto] = []
    nodes: list[onnx.NodeProto] = []
    previous = "x"
    for i, shape in enumerate(shapes):
        values = numpy_helper.from_array(np.array([1.5], dtype=np.float32), f"w{i}")
        indices = numpy_helper.from_array(np.array([3], dtype=np.int64), f"w{i}_idx")
        sparse.append(helper.make_sparse_tensor(values, indices, list(shape)))
        nodes.append(helper.make_node("Gemm", [previous, f"w{i}"], [f"y{i}"], name=f"g{i}"))
        previous = f"y{i}"
    return _save_onnx(path, nodes, [], [previous], sparse=sparse)


@pytest.mark.parametrize(
    "shapes",
    [
        [(2**15, 2**14)],  # 2 GiB dense float32 from one stored value
        [(2**14, 3 * 2**13)],  # 1.5 GiB
        [(2**18, 2**12)],  # 4 GiB: past even the old 2 GiB densify cap, as a second shape
    ],
    ids=["2GiB", "1.5GiB", "4GiB"],
)
def test_sparse_tensor_claiming_a_huge_dense_size_is_refused(
    tmp_path: Path, shapes: list[tuple[int, int]]
) -> None:
    model = _sparse_model(tmp_path / "sparse.onnx", shapes)
    assert model.stat().st_size < 4096
    assert_refused(run(["audit", str(model)], tmp_path), "expansion budget")


def test_many_sparse_tensors_add_up_against_the_checkpoint_budget(tmp_path: Path) -> None:
    # Each is 384 MiB dense (under the per-object budget); eight of them are 3 GiB.
    model = _sparse_model(tmp_path / "sparse.onnx", [(2**13, 3 * 2**12)] * 8)
    assert_refused(run(["audit", str(model)], tmp_path), "budget")


# --- constant folding ---------------------------------------------------------------------


def _doubling(path: Path, rows: int, levels: int) -> Path:
    """Concat(c, c) ``levels`` times over a ``[rows, 64]`` initializer, read by a Gemm."""
    init = numpy_helper.from_array(
        np.random.default_rng(1).standard_normal((rows, 64)).astype(np.float32), "c0"
    )
    nodes = [
        helper.make_node("Concat", [f"c{i}", f"c{i}"], [f"c{i + 1}"], axis=0) for i in range(levels)
    ]
    nodes.append(helper.make_node("Gemm", ["x", f"c{levels}"], ["y"], name="gemm", transB=1))
    return _save_onnx(path, nodes, [init], ["y"])


@pytest.mark.parametrize(("rows", "levels"), [(1024, 14), (16, 24), (1, 34)])
def test_folded_constant_larger_than_the_budget_is_refused(
    tmp_path: Path, rows: int, levels: int
) -> None:
    model = _doubling(tmp_path / "fold.onnx", rows, levels)
    assert model.stat().st_size < 300_000
    assert_refused(run(["audit", str(model)], tmp_path), "constant")


def test_folding_that_recomputes_shared_constants_is_refused(tmp_path: Path) -> None:
    # c(i+1) = Slice(Concat(c(i), c(i))): every constant stays [1, 8], but reading the last
    # one computes c0 2**30 times (60 ops deep: within the chain the loader follows).
    init = numpy_helper.from_array(np.ones((1, 8), dtype=np.float32), "c0")
    starts = numpy_helper.from_array(np.array([0], dtype=np.int64), "s")
    ends = numpy_helper.from_array(np.array([1], dtype=np.int64), "e")
    nodes: list[onnx.NodeProto] = []
    for i in range(30):
        nodes.append(helper.make_node("Concat", [f"c{i}", f"c{i}"], [f"d{i}"], axis=0))
        nodes.append(helper.make_node("Slice", [f"d{i}", "s", "e"], [f"c{i + 1}"]))
    nodes.append(helper.make_node("Gemm", ["x", "c30"], ["y"], name="gemm", transB=1))
    model = _save_onnx(tmp_path / "diamond.onnx", nodes, [init, starts, ends], ["y"])
    assert_refused(run(["audit", str(model)], tmp_path), "constant")


def test_many_medium_folded_constants_add_up_against_the_checkpoint_budget(
    tmp_path: Path,
) -> None:
    # "wide" repeats one 16 KiB row 8192 times (128 MiB); each w(i) is three of it side by
    # side (384 MiB, under the per-object budget); twelve layers read twelve of them.
    init = numpy_helper.from_array(np.ones((1, 2**12), dtype=np.float32), "c")
    nodes: list[onnx.NodeProto] = [
        helper.make_node("Concat", ["c"] * 2**13, ["wide"], axis=0),
    ]
    for i in range(12):
        nodes.append(helper.make_node("Concat", ["wide", "wide", "wide"], [f"w{i}"], axis=1))
        nodes.append(helper.make_node("Gemm", ["x", f"w{i}"], [f"y{i}"], name=f"g{i}"))
    model = _save_onnx(tmp_path / "many.onnx", nodes, [init], [f"y{i}" for i in range(12)])
    assert model.stat().st_size < 400_000
    assert_refused(run(["audit", str(model)], tmp_path), "budget")


def test_long_chain_of_look_through_ops_reads_in_linear_time(tmp_path: Path) -> None:
    # 60k Reshape nodes between an initializer and the Gemm reading it.
    count = 60_000
    init = numpy_helper.from_array(np.ones((4, 4), dtype=np.float32), "c0")
    shape = numpy_helper.from_array(np.array([4, 4], dtype=np.int64), "shape")
    nodes = [helper.make_node("Reshape", [f"c{i}", "shape"], [f"c{i + 1}"]) for i in range(count)]
    nodes.append(helper.make_node("Gemm", ["x", f"c{count}"], ["y"], name="gemm"))
    model = _save_onnx(tmp_path / "chain.onnx", nodes, [init, shape], ["y"])
    outcome = run(["layers", str(model)], tmp_path)
    assert_bounded(outcome)
    assert outcome.code == 0, outcome.stderr[-2000:]


# --- names ----------------------------------------------------------------------------------


@pytest.mark.parametrize("name", ["", "w"], ids=["empty", "repeated"])
def test_many_unnamed_or_repeated_initializers_load_in_linear_time(
    tmp_path: Path, name: str
) -> None:
    count = 60_000
    one = numpy_helper.from_array(np.array([1.0], dtype=np.float32), name)
    inits = [one] * count
    weight = numpy_helper.from_array(np.ones((4, 4), dtype=np.float32), "W")
    nodes = [helper.make_node("Gemm", ["x", "W"], ["y"], name="g")]
    model = _save_onnx(tmp_path / "names.onnx", nodes, [weight, *inits], ["y"])
    outcome = run(["layers", "--format", "json", str(model)], tmp_path)
    assert_bounded(outcome)
    assert outcome.code == 0, outcome.stderr[-2000:]
    assert json.loads(outcome.stdout)["checkpoint"]["tensors"] == count + 1


@pytest.mark.parametrize("node_name", ["", "same"], ids=["unnamed", "repeated"])
def test_many_unnamed_nodes_sharing_a_weight_load_in_linear_time(
    tmp_path: Path, node_name: str
) -> None:
    # 50k Gemm nodes reading one weight: every layer is first named after that weight.
    count = 50_000
    weight = numpy_helper.from_array(np.ones((2, 2), dtype=np.float32), "W")
    nodes = [helper.make_node("Gemm", ["x", "W"], [f"y{i}"], name=node_name) for i in range(count)]
    model = _save_onnx(tmp_path / "nodes.onnx", nodes, [weight], ["y0"])
    outcome = run(["layers", "--format", "json", str(model)], tmp_path)
    assert_bounded(outcome)
    assert outcome.code == 0, outcome.stderr[-2000:]
    names = [layer["name"] for layer in json.loads(outcome.stdout)["layers"]]
    assert len(names) == count and len(set(names)) == count


def test_many_unnamed_recurrent_nodes_load_in_linear_time(tmp_path: Path) -> None:
    count = 5_000
    hidden = 2
    w = numpy_helper.from_array(np.ones((1, 4 * hidden, 3), dtype=np.float32), "W")
    r = numpy_helper.from_array(np.ones((1, 4 * hidden, hidden), dtype=np.float32), "R")
    nodes = [
        helper.make_node("LSTM", ["x", "W", "R"], [f"y{i}"], hidden_size=hidden)
        for i in range(count)
    ]
    model = _save_onnx(tmp_path / "lstm.onnx", nodes, [w, r], ["y0"])
    outcome = run(["layers", "--format", "json", str(model)], tmp_path)
    assert_bounded(outcome)
    assert outcome.code == 0, outcome.stderr[-2000:]
    # One layer per node, matrix and gate (LSTM i, o, f, c; ONNX operator spec).
    assert len(json.loads(outcome.stdout)["layers"]) == count * 2 * 4


# --- zero-element tensors claiming huge unit counts ------------------------------------------


@pytest.mark.parametrize(
    "shape",
    [[2**40, 0], [0, 2**40], [2**36, 0, 3, 3], [1, 2**40, 0]],
    ids=["units", "inputs", "conv-units", "conv-inputs"],
)
def test_zero_element_safetensors_weight_claiming_huge_dims_is_refused(
    tmp_path: Path, shape: list[int]
) -> None:
    model = _save_safetensors(
        tmp_path / "zero.safetensors",
        {"fc.weight": ("F32", shape, b""), "head.weight": ("F32", [2, 2], _f32(2, 2))},
    )
    assert_refused(run(["audit", str(model)], tmp_path), "budget")


@pytest.mark.parametrize("dims", [[2**40, 0], [0, 2**40]], ids=["units", "inputs"])
def test_zero_element_onnx_weight_claiming_huge_dims_is_refused(
    tmp_path: Path, dims: list[int]
) -> None:
    weight = helper.make_tensor("W", TensorProto.FLOAT, dims, [])
    nodes = [helper.make_node("Gemm", ["x", "W"], ["y"], name="g", transB=1)]
    model = _save_onnx(tmp_path / "zero.onnx", nodes, [weight], ["y"])
    assert_refused(run(["audit", str(model)], tmp_path), "budget")


# --- numbers in names ---------------------------------------------------------------------


@pytest.mark.parametrize(
    "names",
    [
        ["seq.0", "seq.99999999999999"],
        ["conv0", "conv_1", "conv99999999999999"],
        ["blocks.fc_1", "blocks.fc_" + "9" * 40],
        ["seq.1", "seq." + "7" * 5000],  # past Python's int-from-string digit limit
        ["seq.1", "seq.\u00b2", "seq.\u0663"],  # a superscript two; an Arabic-Indic three
    ],
    ids=["sequential", "conv", "forty-digits", "5000-digits", "unicode-digits"],
)
def test_huge_numbers_in_module_names_do_not_drive_a_search(
    tmp_path: Path, names: list[str]
) -> None:
    entries = {
        f"{name}.weight": ("F32", [4, 4, 3, 3], _f32(4, 4, 3, 3, seed=i))
        for i, name in enumerate(names)
    }
    model = _save_safetensors(tmp_path / "numbers.safetensors", entries)
    outcome = run(["layers", str(model)], tmp_path)
    assert_bounded(outcome)
    assert outcome.code == 0, outcome.stderr[-2000:]
