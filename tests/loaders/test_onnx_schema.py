"""The ONNX schema is read without importing the ``onnx`` package (steelyard.loaders.onnx.schema).

Reference: the ``onnx`` package from PyPI writes every file here (``onnx.helper``,
``onnx.numpy_helper``) and its own ``onnx.ModelProto`` parses them; the audit in a fresh
process (schema alone) must give the report the audit gives with the package imported.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import ml_dtypes
import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper

from steelyard.loaders import load


def _two_layer_model(path: Path, dtype: type = np.float32, seed: int = 4) -> dict[str, np.ndarray]:
    """An invented 24 -> 48 -> 6 network written by ``onnx.helper`` (Gemm, Relu, Gemm)."""
    rng = np.random.default_rng(seed)
    tensors = {
        "fc1.weight": (0.2 * rng.standard_normal((48, 24))).astype(dtype),
        "fc1.bias": (0.01 * rng.standard_normal(48)).astype(dtype),
        "fc2.weight": (0.2 * rng.standard_normal((6, 48))).astype(dtype),
        "fc2.bias": np.zeros(6, dtype),
    }
    elem = TensorProto.BFLOAT16 if dtype is ml_dtypes.bfloat16 else TensorProto.FLOAT
    nodes = [
        helper.make_node("Gemm", ["x", "fc1.weight", "fc1.bias"], ["h"], transB=1),
        helper.make_node("Relu", ["h"], ["r"]),
        helper.make_node("Gemm", ["r", "fc2.weight", "fc2.bias"], ["y"], transB=1),
    ]
    graph = helper.make_graph(
        nodes,
        "invented",
        [helper.make_tensor_value_info("x", elem, [1, 24])],
        [helper.make_tensor_value_info("y", elem, [1, 6])],
        [numpy_helper.from_array(value, name) for name, value in tensors.items()],
    )
    onnx.save(helper.make_model(graph), str(path))
    return tensors


_FRESH_AUDIT = """
import json, sys
from steelyard.api import audit
from steelyard.render.json_report import render_json as to_json
report = audit(sys.argv[1])
print(json.dumps({"report": json.loads(to_json(report)),
                  "modules": [m for m in ("onnx", "ml_dtypes") if m in sys.modules]}))
"""


def _fresh(*args: str, env: dict[str, str] | None = None, code: str = _FRESH_AUDIT) -> str:
    done = subprocess.run(
        [sys.executable, "-c", code, *args], capture_output=True, text=True, env=env
    )
    assert done.returncode == 0, done.stderr
    return done.stdout


def _without_time(report: dict[str, object]) -> dict[str, object]:
    return {key: value for key, value in report.items() if key != "created"}


def test_a_float_onnx_file_is_read_without_the_onnx_package_or_ml_dtypes(tmp_path: Path) -> None:
    # onnx 1.23 imports ml_dtypes itself (onnx/_mapping.py): 0.9-1.1 s of a small audit here.
    from steelyard.api import audit
    from steelyard.render.json_report import render_json as to_json

    path = tmp_path / "model.onnx"
    _two_layer_model(path)
    fresh = json.loads(_fresh(str(path)))
    assert fresh["modules"] == []
    here = json.loads(to_json(audit(path)))  # this process has the onnx package imported
    assert _without_time(fresh["report"]) == _without_time(here)
    assert [layer["name"] for layer in here["layers"]] == ["fc1.weight", "fc2.weight"]


def test_a_bf16_onnx_file_still_decodes_through_ml_dtypes(tmp_path: Path) -> None:
    path = tmp_path / "model.onnx"
    written = _two_layer_model(path, ml_dtypes.bfloat16)
    fresh = json.loads(_fresh(str(path)))
    assert fresh["modules"] == ["ml_dtypes"]
    checkpoint = load(path)
    # reference: the values numpy_helper wrote, widened by ml_dtypes' cast
    for name, value in written.items():
        read = np.asarray(checkpoint.tensors[name].read(), dtype=np.float32)
        np.testing.assert_array_equal(read, value.astype(np.float32))


_SAME_CLASS = """
import sys
from steelyard.loaders.onnx.schema import model_proto_class
cls = model_proto_class()
assert "onnx" not in sys.modules
data = open(sys.argv[1], "rb").read()
ours = cls()
ours.ParseFromString(data)
import onnx
assert onnx.ModelProto is cls, (onnx.ModelProto, cls)
assert onnx.load(sys.argv[1]) == ours
onnx.checker.check_model(ours)
print("same")
"""


@pytest.mark.parametrize("backend", ["default", "python"])
def test_the_schema_gives_the_onnx_package_s_own_message_class(
    tmp_path: Path, backend: str
) -> None:
    # A later ``import onnx`` (a user's code) must not clash with the schema loaded first, on
    # protobuf's compiled (upb) backend or its pure-Python one.
    path = tmp_path / "model.onnx"
    _two_layer_model(path)
    env = dict(os.environ)
    if backend == "python":
        env["PROTOCOL_BUFFERS_PYTHON_IMPLEMENTATION"] = "python"
    assert _fresh(str(path), env=env, code=_SAME_CLASS).strip() == "same"


def test_with_onnx_imported_the_package_class_is_used() -> None:
    from steelyard.loaders.onnx import schema

    assert "onnx" in sys.modules
    assert schema.model_proto_class() is onnx.ModelProto
