"""The demo scenario fixtures (``fixtures/demo/``, built by ``fixtures/make_demo.py``).

Two kinds of checks:

* every committed file, read by its format's reference library, holds exactly the weights
  (and, where the format stores it, the Adam state) of ``pumpwear-*.reference.npz``;
* steelyard's audit of the unhealthy model reports every registered rule, each on the layer
  where the generator planted that defect, and the healthy model gets no warning or error in
  any format.

Plain ``python``: no torch, no keras.
"""

from __future__ import annotations

import importlib.util
import io
import json
import pickle
import zipfile
from collections import OrderedDict
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import h5py
import ml_dtypes
import numpy as np
import onnx
import pytest
from onnx import numpy_helper
from safetensors import safe_open
from safetensors.numpy import load_file

DEMO = Path(__file__).resolve().parent.parent / "fixtures" / "demo"
HEALTHY = "pumpwear-healthy"
BAD = "pumpwear-nightly-bad"
MODELS = (HEALTHY, BAD)
RULE_MODULES = (
    "nonfinite",
    "dead_unit",
    "fan_in_norm",
    "twin_units",
    "unsupported_weight",
    "untrained_layer",
    "constraint_breach",
)


def reference(model: str) -> dict[str, np.ndarray]:
    with np.load(DEMO / f"{model}.reference.npz", allow_pickle=False) as data:
        return {k: data[k] for k in data.files}


def weights(ref: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    return {k: v for k, v in ref.items() if k.startswith("fc")}


def depth(ref: dict[str, np.ndarray]) -> int:
    return len(weights(ref)) // 2


def same(actual: np.ndarray, expected: np.ndarray, name: str) -> None:
    # assert_array_equal treats NaNs in the same places as equal (the bad model's NaN bias).
    assert actual.dtype == expected.dtype, name
    np.testing.assert_array_equal(actual, expected, err_msg=name)


# --------------------------------------------------------------------------------------
# The references themselves
# --------------------------------------------------------------------------------------


@pytest.mark.parametrize("model", MODELS)
def test_reference_is_a_relu_mlp_of_28_features_and_3_classes(model: str) -> None:
    ref = reference(model)
    assert ref["features"].size == 28 and ref["classes"].size == 3
    n = depth(ref)
    assert ref["fc1.weight"].shape[1] == 28 and ref[f"fc{n}.weight"].shape[0] == 3
    for i in range(1, n):  # consecutive layers chain
        assert ref[f"fc{i + 1}.weight"].shape[1] == ref[f"fc{i}.weight"].shape[0]
    for name, value in weights(ref).items():
        assert value.dtype == np.float32, name
        assert ref[f"adam_m/{name}"].shape == value.shape == ref[f"adam_v/{name}"].shape
        assert np.all(ref[f"adam_v/{name}"] >= 0), name  # a second moment is a mean of squares


def test_healthy_reference_honours_its_declared_max_norm() -> None:
    # The max-norm projection ran after every step: hidden rows are within c (Keras MaxNorm
    # divides by ε + n, so the norm lands just under c; float32 rounding adds ~1e-7).
    ref = reference(HEALTHY)
    c = float(ref["adam_hyper"][5])
    for i in range(1, depth(ref)):
        norms = np.linalg.norm(ref[f"fc{i}.weight"].astype(np.float64), axis=1)
        assert norms.max() <= c * (1 + 1e-6)
    assert all(np.isfinite(v).all() for v in ref.values() if v.dtype.kind == "f")


# --------------------------------------------------------------------------------------
# Each file against the reference, through the format's reference reader
# --------------------------------------------------------------------------------------


@pytest.mark.parametrize("model", MODELS)
def test_safetensors_equals_reference(model: str) -> None:
    ref = weights(reference(model))
    loaded = load_file(DEMO / f"{model}.safetensors")  # reference: safetensors.numpy.load_file
    assert set(loaded) == set(ref)
    for name, value in ref.items():
        same(loaded[name], value, name)
    with safe_open(DEMO / f"{model}.safetensors", framework="np") as handle:
        assert handle.metadata()["model"] == model


@pytest.mark.parametrize("model", MODELS)
def test_npz_equals_reference(model: str) -> None:
    ref = weights(reference(model))
    with np.load(DEMO / f"{model}.npz", allow_pickle=False) as data:  # reference: numpy.load
        assert set(data.files) == set(ref)
        for name, value in ref.items():
            same(data[name], value, name)


def test_gradient_sidecar_equals_reference() -> None:
    ref = reference(BAD)
    loaded = load_file(DEMO / f"{BAD}.grads.safetensors")  # reference: safetensors.numpy
    assert set(loaded) == set(weights(ref))
    for name, value in loaded.items():
        same(value, ref[f"grads_rms/{name}"], name)
        assert np.all(value >= 0), name


def test_sharded_copy_equals_reference() -> None:
    ref = weights(reference(HEALTHY))
    folder = DEMO / "sharded"
    index = json.loads((folder / "model.safetensors.index.json").read_text())
    assert set(index["weight_map"]) == set(ref)
    files = sorted(set(index["weight_map"].values()))
    assert len(files) == 2
    seen: dict[str, np.ndarray] = {}
    for file in files:
        shard = load_file(folder / file)  # reference: safetensors.numpy.load_file
        assert all(index["weight_map"][k] == file for k in shard)
        seen.update(shard)
    for name, value in ref.items():
        same(seen[name], value, name)
    # total_size counts tensor bytes only (Hugging Face hub layout; common practice, no source).
    assert index["metadata"]["total_size"] == sum(v.nbytes for v in ref.values())


def test_bf16_copy_is_the_rounded_reference() -> None:
    ref = weights(reference(HEALTHY))
    loaded = load_file(DEMO / f"{HEALTHY}.bf16.safetensors")  # needs ml_dtypes imported
    for name, value in ref.items():
        # reference: ml_dtypes.bfloat16 casting (round to nearest even), compared bit for bit.
        expected = value.astype(ml_dtypes.bfloat16)
        assert loaded[name].dtype == ml_dtypes.bfloat16, name
        np.testing.assert_array_equal(loaded[name].view(np.uint16), expected.view(np.uint16))


def _onnx_graph(path: Path) -> onnx.GraphProto:
    proto = onnx.load(path)
    onnx.checker.check_model(proto)  # reference: onnx.checker
    return proto.graph


@pytest.mark.parametrize("model", MODELS)
@pytest.mark.parametrize("suffix", [".onnx", ".torch-export.onnx"])
def test_onnx_equals_reference(model: str, suffix: str) -> None:
    ref = weights(reference(model))
    graph = _onnx_graph(DEMO / f"{model}{suffix}")
    # reference: onnx.numpy_helper.to_array
    arrays = {i.name: numpy_helper.to_array(i) for i in graph.initializer}
    assert set(arrays) == set(ref)
    for name, value in ref.items():
        same(arrays[name], value, name)
    # Gemm with transB=1 holds B as [out, in] (ONNX operator spec, Gemm), so the stored
    # fcN.weight must be the node's B input with transB set.
    gemms = [n for n in graph.node if n.op_type == "Gemm"]
    assert [n.input[1] for n in gemms] == [f"fc{i}.weight" for i in range(1, depth(ref) + 1)]
    for node in gemms:
        attrs = {a.name: onnx.helper.get_attribute_value(a) for a in node.attribute}
        assert attrs.get("transB") == 1
    ops = [n.op_type for n in graph.node]
    assert ops.count("Relu") == depth(ref) - 1 and ops[-1] == "Softmax"


def _keras_vars(handle: h5py.File | h5py.Group, n: int) -> Iterator[tuple[str, np.ndarray]]:
    """(name, array) of a Keras 3 weights file's layers: ``layers/dense{,_1,...}/vars/<i>``."""
    for i in range(1, n + 1):
        key = "dense" if i == 1 else f"dense_{i - 1}"
        yield f"fc{i}.weight", np.asarray(handle[f"layers/{key}/vars/0"])
        yield f"fc{i}.bias", np.asarray(handle[f"layers/{key}/vars/1"])


def _canonical(name: str, array: np.ndarray) -> np.ndarray:
    # Keras Dense kernels are [in, out]; the reference is PyTorch's [out, in].
    return array.T if name.endswith(".weight") else array


def _check_keras_weights_file(handle: h5py.File, ref: dict[str, np.ndarray]) -> None:
    n = depth(ref)
    for name, array in _keras_vars(handle, n):
        same(_canonical(name, array), ref[name], name)
    # Keras 3 optimizer variables: iteration, learning rate, then per trainable variable in
    # model order its Adam slots momentum and velocity (read back from keras at build time).
    stored = handle["optimizer/vars"]
    values = [np.asarray(stored[str(i)]) for i in range(len(stored))]
    assert len(values) == 2 + 2 * 2 * n
    assert int(values[0]) == int(ref["adam_step"])
    np.testing.assert_allclose(float(values[1]), ref["adam_hyper"][0], rtol=1e-6)
    order = [f"fc{i}.{leaf}" for i in range(1, n + 1) for leaf in ("weight", "bias")]
    for index, name in enumerate(order):
        same(_canonical(name, values[2 + 2 * index]), ref[f"adam_m/{name}"], name)
        same(_canonical(name, values[3 + 2 * index]), ref[f"adam_v/{name}"], name)


@pytest.mark.parametrize("model", MODELS)
def test_keras_weights_h5_equals_reference(model: str) -> None:
    with h5py.File(DEMO / f"{model}.weights.h5", "r") as handle:  # reference: h5py
        _check_keras_weights_file(handle, reference(model))


def _layer_configs(config: dict[str, Any]) -> list[dict[str, Any]]:
    return [
        layer["config"] for layer in config["config"]["layers"] if layer["class_name"] == "Dense"
    ]


def _check_dense_configs(layers: list[dict[str, Any]], ref: dict[str, np.ndarray]) -> None:
    n = depth(ref)
    l2, c = float(ref["adam_hyper"][4]), float(ref["adam_hyper"][5])
    assert [layer["name"] for layer in layers] == [f"fc{i}" for i in range(1, n + 1)]
    for i, layer in enumerate(layers, 1):
        assert layer["units"] == ref[f"fc{i}.weight"].shape[0]
        assert layer["activation"] == ("softmax" if i == n else "relu")
        assert layer["kernel_regularizer"]["class_name"] == "L2"
        assert layer["kernel_regularizer"]["config"]["l2"] == pytest.approx(l2)
        if i < n:
            assert layer["kernel_constraint"]["class_name"] == "MaxNorm"
            assert layer["kernel_constraint"]["config"] == {"max_value": c, "axis": 0}
        else:
            assert layer["kernel_constraint"] is None


@pytest.mark.parametrize("model", MODELS)
def test_keras_archive_equals_reference(model: str) -> None:
    ref = reference(model)
    with zipfile.ZipFile(DEMO / f"{model}.keras") as archive:  # reference: zipfile + h5py
        config = json.loads(archive.read("config.json"))
        member = io.BytesIO(archive.read("model.weights.h5"))
    _check_dense_configs(_layer_configs(config), ref)
    with h5py.File(member, "r") as handle:
        _check_keras_weights_file(handle, ref)


@pytest.mark.parametrize("model", MODELS)
def test_keras_legacy_h5_equals_reference(model: str) -> None:
    ref = reference(model)
    n = depth(ref)
    with h5py.File(DEMO / f"{model}.h5", "r") as handle:  # reference: h5py
        _check_dense_configs(_layer_configs(json.loads(handle.attrs["model_config"])), ref)
        group = handle["model_weights"]
        for i in range(1, n + 1):
            layer = group[f"fc{i}"]
            kernel, bias = (np.asarray(layer[w]) for w in layer.attrs["weight_names"])
            same(kernel.T, ref[f"fc{i}.weight"], f"fc{i}.weight")
            same(bias, ref[f"fc{i}.bias"], f"fc{i}.bias")
        opt = handle["optimizer_weights"]
        stored = [np.asarray(opt[w]) for w in opt.attrs["weight_names"]]
    assert int(stored[0]) == int(ref["adam_step"])
    order = [f"fc{i}.{leaf}" for i in range(1, n + 1) for leaf in ("weight", "bias")]
    for index, name in enumerate(order):
        same(_canonical(name, stored[2 + 2 * index]), ref[f"adam_m/{name}"], name)
        same(_canonical(name, stored[3 + 2 * index]), ref[f"adam_v/{name}"], name)


class _TorchZipReader(pickle.Unpickler):
    """Reads a ``torch.save`` zip without torch: only the three globals it uses are allowed.

    reference: Python's pickle and zipfile (stdlib); the layout is the one torch.save writes
    (``<folder>/data.pkl`` with persistent ids ``('storage', class, key, 'cpu', numel)`` and
    raw little-endian storages ``<folder>/data/<key>``).
    """

    def __init__(self, archive: zipfile.ZipFile, folder: str) -> None:
        super().__init__(io.BytesIO(archive.read(f"{folder}/data.pkl")))
        self.archive, self.folder = archive, folder

    def find_class(self, module: str, name: str) -> Any:
        allowed = {
            ("collections", "OrderedDict"): OrderedDict,
            ("torch._utils", "_rebuild_tensor_v2"): self._rebuild,
            ("torch", "FloatStorage"): np.float32,
        }
        if (module, name) not in allowed:
            raise pickle.UnpicklingError(f"global {module}.{name} is not allowed")
        return allowed[(module, name)]

    def persistent_load(self, pid: Any) -> np.ndarray:
        kind, dtype, key, _location, numel = pid
        assert kind == "storage"
        data = np.frombuffer(
            self.archive.read(f"{self.folder}/data/{key}"), dtype=np.dtype(dtype).newbyteorder("<")
        )
        assert data.size == numel
        return data

    @staticmethod
    def _rebuild(
        storage: np.ndarray, offset: int, size: tuple[int, ...], stride: tuple[int, ...], *_: Any
    ) -> np.ndarray:
        if not size:
            return storage[offset].copy()
        view = np.lib.stride_tricks.as_strided(
            storage[offset:], shape=size, strides=tuple(s * storage.itemsize for s in stride)
        )
        return np.array(view)


def _torch_load(path: Path) -> Any:
    with zipfile.ZipFile(path) as archive:
        (pkl,) = [n for n in archive.namelist() if n.endswith("/data.pkl")]
        return _TorchZipReader(archive, pkl.rsplit("/", 1)[0]).load()


@pytest.mark.parametrize("model", MODELS)
def test_torch_checkpoint_equals_reference(model: str) -> None:
    ref = reference(model)
    checkpoint = _torch_load(DEMO / f"{model}.pt")
    assert set(checkpoint) == {"model", "optimizer", "epoch"}
    assert isinstance(checkpoint["epoch"], int)
    assert list(checkpoint["model"]) == [
        f"fc{i}.{leaf}" for i in range(1, depth(ref) + 1) for leaf in ("weight", "bias")
    ]
    for name, value in checkpoint["model"].items():
        same(value, ref[name], name)
    optimizer = checkpoint["optimizer"]
    groups = optimizer["param_groups"]
    # torch Adam's coupled weight_decay adds wd·w to the gradient, so L2(l2) is wd = 2·l2
    # (torch.optim.Adam docs); biases sit in a group without decay.
    l2 = float(ref["adam_hyper"][4])
    assert [g["weight_decay"] for g in groups] == [pytest.approx(2 * l2), 0.0]
    for group in groups:
        assert group["betas"] == (
            pytest.approx(ref["adam_hyper"][1]),
            pytest.approx(ref["adam_hyper"][2]),
        )
        for index, name in zip(group["params"], group["param_names"], strict=True):
            slot = optimizer["state"][index]
            assert float(slot["step"]) == float(ref["adam_step"])
            same(slot["exp_avg"], ref[f"adam_m/{name}"], name)
            same(slot["exp_avg_sq"], ref[f"adam_v/{name}"], name)
    assert sorted(i for g in groups for i in g["params"]) == list(range(len(checkpoint["model"])))


# --------------------------------------------------------------------------------------
# The audit of the scenario
# --------------------------------------------------------------------------------------

MISSING = [m for m in RULE_MODULES if importlib.util.find_spec(f"steelyard.rules.{m}") is None]
needs_rules = pytest.mark.skipif(
    bool(MISSING), reason=f"rule module(s) not written yet: {', '.join(MISSING)}"
)


def _findings(path: Path, grads: Path | None = None) -> list[Any]:
    import steelyard

    report = steelyard.audit(path, grads=grads)
    return list(report.audits[0].findings)


def _planted() -> list[dict[str, Any]]:
    scenario = json.loads((DEMO / "scenario.json").read_text())
    planted: list[dict[str, Any]] = scenario["models"][BAD]["planted"]
    return planted


def _judged(findings: list[Any]) -> set[tuple[str, str]]:
    """(rule, layer) of every warning or error."""
    return {(f.rule, f.layer) for f in findings if f.severity.value in ("warning", "error")}


#: Rules about what the reader recognised rather than about the weights: the demo's layers are
#: all recognised, so they never fire on it (tests/test_gate_coverage.py plants their cases).
_ABOUT_THE_READER = {"uncovered-weights"}
# Rules about language-model structure (token rows, super weights, low-bit readiness,
# attention heads, experts): the demo MLPs have none; fixtures/transformers_tokens/ and
# fixtures/transformers_heads/ plant them (tests/rules/test_*).
_TRANSFORMER = {
    "untrained-token", "essential-weight", "quantization-error", "head-circuits", "moe-experts",
}
# Rules about fine-tuning adapters (an update B·A and its base): the demo holds full models,
# no adapter; fixtures/adapters/ (written by peft) plants them (tests/rules/test_adapter_update.py).
_ADAPTER = {"adapter-update"}


def test_planted_defects_cover_every_registered_rule() -> None:
    from steelyard.rules import registry

    assert {p["rule"] for p in _planted()} >= set(registry()) - _ABOUT_THE_READER - _TRANSFORMER - _ADAPTER


@needs_rules
@pytest.mark.parametrize("suffix", [".keras", ".h5", ".weights.h5", ".pt"])
def test_bad_model_with_its_optimizer_state_shows_every_rule(suffix: str) -> None:
    from steelyard.rules import registry

    found = _judged(_findings(DEMO / f"{BAD}{suffix}"))
    assert {rule for rule, _ in found} >= set(registry()) - _undeclared(suffix)
    for plant in _planted():
        if plant["rule"] in registry() and plant["rule"] not in _undeclared(suffix):
            assert (plant["rule"], plant["layer"]) in found, plant


def _undeclared(suffix: str) -> set[str]:
    # Only Keras files with a model config declare kernel constraints; a PyTorch state dict,
    # safetensors or ONNX file has nothing for constraint-breach to compare against. A
    # weights-only .weights.h5 carries no config at all: no constraint and no links, so
    # twin-units cannot see the consumers' lopsided weighting either.
    if suffix in (".keras", ".h5"):
        return {*_ABOUT_THE_READER, *_TRANSFORMER, *_ADAPTER}
    if suffix == ".weights.h5":
        return {"constraint-breach", "twin-units", *_ABOUT_THE_READER, *_TRANSFORMER, *_ADAPTER}
    return {"constraint-breach", *_ABOUT_THE_READER, *_TRANSFORMER, *_ADAPTER}


@needs_rules
@pytest.mark.parametrize("suffix", [".safetensors", ".npz", ".onnx"])
def test_bad_model_with_the_gradient_sidecar_shows_every_rule(suffix: str) -> None:
    from steelyard.rules import registry

    found = _judged(_findings(DEMO / f"{BAD}{suffix}", grads=DEMO / f"{BAD}.grads.safetensors"))
    expected = set(registry()) - _undeclared(suffix)
    assert {rule for rule, _ in found} >= expected
    for plant in _planted():
        if plant["rule"] in expected:
            assert (plant["rule"], plant["layer"]) in found, plant


HEALTHY_FILES = [
    f"{HEALTHY}.safetensors",
    f"{HEALTHY}.npz",
    f"{HEALTHY}.onnx",
    f"{HEALTHY}.torch-export.onnx",
    f"{HEALTHY}.keras",
    f"{HEALTHY}.h5",
    f"{HEALTHY}.weights.h5",
    f"{HEALTHY}.pt",
    f"{HEALTHY}.bf16.safetensors",
    "sharded",
]


@needs_rules
@pytest.mark.parametrize("name", HEALTHY_FILES)
def test_healthy_model_has_no_warning_or_error(name: str) -> None:
    findings = _findings(DEMO / name)
    assert _judged(findings) == set(), [(f.rule, f.layer, f.message) for f in findings]


def test_every_committed_file_is_covered() -> None:
    # A new output of the generator must get a check here.
    covered = {
        f"{m}{s}"
        for m in MODELS
        for s in (
            ".safetensors",
            ".npz",
            ".onnx",
            ".torch-export.onnx",
            ".keras",
            ".h5",
            ".weights.h5",
            ".pt",
            ".reference.npz",
        )
    }
    covered |= {f"{BAD}.grads.safetensors", f"{HEALTHY}.bf16.safetensors", "scenario.json"}
    covered |= {f"sharded/{p.name}" for p in (DEMO / "sharded").iterdir()}
    present = {str(p.relative_to(DEMO)) for p in DEMO.rglob("*") if p.is_file()}
    assert present == covered
    assert sum((DEMO / p).stat().st_size for p in present) < 1_500_000
