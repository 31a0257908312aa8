"""Keras loaders: legacy ``.h5``, ``.weights.h5`` and ``.keras`` archives.

Real files come from ``fixtures/gen_keras_real.py`` (Keras 3.15, torch backend). Beside each
model, ``<model>.expected.npz`` holds what Keras itself reported at save time
(``model.get_weights()``, the optimizer's variables and its own slot lookup, and where Keras
wrote each variable), so these tests need no keras. Keras 2 layouts are built here with
h5py following /work/shared/FORMATS.md ("Keras").
"""

from __future__ import annotations

import io
import json
import tempfile
import zipfile
from pathlib import Path
from typing import Any

import h5py
import ml_dtypes
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from steelyard.errors import LoadError
from steelyard.graph import Activation, Checkpoint, LayerKind, Link, NormKind, TensorRole
from steelyard.loaders import load
from steelyard.loaders.keras import archive as keras_archive
from steelyard.loaders.keras import hdf5_access as keras_hdf5
from steelyard.loaders.keras.archive import KerasArchiveLoader
from steelyard.loaders.keras.h5_loader import KerasH5Loader

FIX = Path(__file__).resolve().parents[2] / "fixtures" / "real" / "keras"
MODELS = ("mlp", "cnn", "rnn", "nested")
WEIGHTS_ONLY = ("mlp", "nested")


def expected(model: str) -> Any:
    return np.load(FIX / f"{model}.expected.npz")


def cases() -> list[tuple[str, str]]:
    out = [(m, "keras") for m in MODELS] + [(m, "h5") for m in MODELS]
    return out + [(m, "weights.h5") for m in WEIGHTS_ONLY]


def names_for(model: str, kind: str) -> list[str]:
    """Tensor names, in ``model.weights`` order, where Keras says it wrote each variable."""
    e = expected(model)
    column = "w_legacy" if kind == "h5" else "w_h5path"
    return [str(n) for n in e[column]]


@pytest.fixture(scope="module")
def loaded() -> dict[tuple[str, str], Checkpoint]:
    return {(m, k): load(FIX / f"{m}.{k}") for m, k in cases()}


def h5py_read(model: str, kind: str, name: str) -> np.ndarray:
    """The same dataset read straight with h5py (reference: h5py)."""
    path = FIX / f"{model}.{kind}"
    if kind == "keras":
        with zipfile.ZipFile(path) as archive:
            data = archive.read("model.weights.h5")
        with h5py.File(io.BytesIO(data), "r") as f:
            return np.asarray(f[name][()])
    with h5py.File(path, "r") as f:
        root = f["model_weights"] if kind == "h5" else f
        return np.asarray(root[name][()])


def h5py_datasets(model: str, kind: str) -> set[str]:
    """Every dataset below the weights root, as h5py lists them (reference: h5py)."""
    path = FIX / f"{model}.{kind}"
    found: set[str] = set()

    def visit(name: str, obj: Any) -> None:
        if isinstance(obj, h5py.Dataset):
            found.add(name)

    if kind == "keras":
        with zipfile.ZipFile(path) as archive:
            data = archive.read("model.weights.h5")
        with h5py.File(io.BytesIO(data), "r") as f:
            f.visititems(visit)
    else:
        with h5py.File(path, "r") as f:
            (f["model_weights"] if kind == "h5" else f).visititems(visit)
    return {n for n in found if not n.startswith("optimizer")}


# --------------------------------------------------------------------------------------------
# Tensors


@pytest.mark.parametrize(("model", "kind"), cases())
def test_every_tensor_equals_h5py_and_keras(
    loaded: dict[tuple[str, str], Checkpoint], model: str, kind: str
) -> None:
    ck = loaded[(model, kind)]
    e = expected(model)
    # reference: h5py lists the same datasets and reads the same bytes
    assert set(ck.tensors) == h5py_datasets(model, kind)
    for name, tensor in ck.tensors.items():
        array = tensor.read()
        reference = h5py_read(model, kind, name)
        assert array.shape == tensor.shape == reference.shape
        np.testing.assert_array_equal(array, reference)
    # reference: keras model.get_weights() at save time, placed where Keras said it wrote them
    names = names_for(model, kind)
    for index, name in enumerate(names):
        np.testing.assert_array_equal(ck.tensors[name].read(), e[f"w/{index}"])
    # reference: keras model.count_params() (BN moving statistics included)
    assert ck.parameters == int(e["count_params"])
    assert not any(n.startswith("optimizer") for n in ck.tensors)


@pytest.mark.parametrize(("model", "kind"), [c for c in cases() if c[1] != "weights.h5"])
def test_tensor_order_follows_keras_not_alphabet(
    loaded: dict[tuple[str, str], Checkpoint], model: str, kind: str
) -> None:
    # reference: Keras' weight_names order (legacy) / variable order (.keras) =
    # model.weights order; h5py would list BatchNormalization's beta before gamma.
    assert list(loaded[(model, kind)].tensors) == names_for(model, kind)


def test_float_tensors_are_parameters_and_bn_statistics_count(
    loaded: dict[tuple[str, str], Checkpoint],
) -> None:
    ck = loaded[("cnn", "keras")]
    e = expected("cnn")
    for index, name in enumerate(names_for("cnn", "keras")):
        assert ck.tensors[name].role is TensorRole.PARAMETER
        assert ck.tensors[name].dtype == "f32"
        if str(e["w_path"][index]).endswith("moving_mean"):
            assert not bool(e["w_trainable"][index])  # keras: non-trainable, still a parameter


def test_reads_are_lazy_and_need_no_hdf5(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    path = tmp_path / "mlp.weights.h5"
    path.write_bytes((FIX / "mlp.weights.h5").read_bytes())
    ck = load(path)
    # Change the stored values after loading (h5py rewrites contiguous data in place): a lazy
    # reader sees the new bytes (reference: h5py write).
    with h5py.File(path, "r+") as f:
        f["layers/dense/vars/0"][...] = 7.0

    # Contiguous datasets are byte ranges: reading them never calls into HDF5 here.
    def no_hdf5(*_: Any, **__: Any) -> Any:
        raise AssertionError("tensor reads must not open the file with h5py")

    monkeypatch.setattr(h5py, "File", no_hdf5)
    np.testing.assert_array_equal(ck.tensors["layers/dense/vars/0"].read(), np.full((8, 16), 7.0))
    layer = ck.layer("hidden")
    assert layer is not None
    np.testing.assert_array_equal(layer.weight_view(), np.full((16, 8), 7.0))


def test_chunked_and_compact_datasets(tmp_path: Path) -> None:
    # Keras writes contiguous datasets; other layouts still read correctly (reference: h5py).
    path = tmp_path / "layouts.weights.h5"
    chunked = np.arange(24, dtype=np.float32).reshape(4, 6)
    compact = np.arange(5, dtype=">f8")
    with h5py.File(path, "w") as f:
        f.create_dataset("layers/dense/vars/0", data=chunked, chunks=(2, 3), compression="gzip")
        dcpl = h5py.h5p.create(h5py.h5p.DATASET_CREATE)
        dcpl.set_layout(h5py.h5d.COMPACT)
        space = h5py.h5s.create_simple(compact.shape)
        kind = h5py.h5t.py_create(compact.dtype)
        group = f.create_group("layers/other/vars")
        h5py.Dataset(h5py.h5d.create(group.id, b"0", kind, space, dcpl=dcpl))[...] = compact
    ck = load(path)
    np.testing.assert_array_equal(ck.tensors["layers/dense/vars/0"].read(), chunked)
    other = ck.tensors["layers/other/vars/0"].read()
    np.testing.assert_array_equal(other, compact)
    assert other.dtype == np.dtype("=f8")  # native byte order, as Tensor.reader promises


def test_hdf5_hang_becomes_load_error(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # A zero-sized object in a global heap collection makes the HDF5 library loop forever
    # when it reads a variable-length attribute (layer_names). Build one from a real file:
    # find the collection (reference: HDF5 File Format Specification, "Global Heap": the
    # "GCOL" signature, version, 3 reserved bytes, 8-byte collection size, then objects)
    # and zero the size of its first object.
    data = bytearray((FIX / "mlp.h5").read_bytes())
    start = data.find(b"GCOL", 4096)
    assert start > 0
    first_object = start + 16  # signature, version, 3 reserved, 8-byte collection size
    data[first_object : first_object + 16] = b"\x00" * 16  # index 0 (free space), size 0
    path = tmp_path / "loop.h5"
    path.write_bytes(bytes(data))
    monkeypatch.setattr(keras_hdf5, "LOAD_TIMEOUT", 3.0)
    _expect_load_error(path, "stuck")


# --------------------------------------------------------------------------------------------
# Canonical orientation (documented Keras layouts, FORMATS.md "Orientation")


def _raw(ck: Checkpoint, model: str, kind: str, name: str) -> np.ndarray:
    return h5py_read(model, kind, name).astype(np.float32)


@pytest.mark.parametrize("kind", ["keras", "h5"])
def test_canonical_orientation_per_layer_class(
    loaded: dict[tuple[str, str], Checkpoint], kind: str
) -> None:
    ck = loaded[("cnn", kind)]
    # Dense [in, out] → [out, in]; and W·x equals Keras' x·K (reference: numpy matmul).
    left = ck.layer("left")
    assert left is not None
    k = _raw(ck, "cnn", kind, left.weight)
    np.testing.assert_array_equal(left.weight_view(), np.einsum("io->oi", k))
    x = np.linspace(-1, 1, k.shape[0]).astype(np.float32)
    np.testing.assert_allclose(left.matrix() @ x, x @ k, rtol=1e-6)
    # Conv2D [kh, kw, in, out] → [out, in, kh, kw]
    c1 = ck.layer("c1")
    assert c1 is not None and c1.kind is LayerKind.CONV
    k = _raw(ck, "cnn", kind, c1.weight)
    np.testing.assert_array_equal(c1.weight_view(), np.einsum("hwio->oihw", k))
    assert (c1.units, c1.in_per_group, c1.kernel, c1.groups) == (6, 3, (3, 3), 1)
    # Conv1D [k, in, out] → [out, in, k]
    c1d = ck.layer("c1d")
    assert c1d is not None
    k = _raw(ck, "cnn", kind, c1d.weight)
    np.testing.assert_array_equal(c1d.weight_view(), np.einsum("kio->oik", k))
    # Conv2DTranspose [kh, kw, out, in] → rows are output channels
    up = ck.layer("up")
    assert up is not None and up.kind is LayerKind.CONV_TRANSPOSE
    k = _raw(ck, "cnn", kind, up.weight)
    assert (up.units, up.in_per_group) == (k.shape[2], k.shape[3]) == (4, 5)
    np.testing.assert_array_equal(up.weight_view(), np.einsum("hwoi->oihw", k))
    # DepthwiseConv2D [kh, kw, C, dm] → [C·dm, 1, kh, kw], channel c·dm + m, groups C
    dw = ck.layer("dw")
    assert dw is not None
    k = _raw(ck, "cnn", kind, dw.weight)
    channels, multiplier = k.shape[2], k.shape[3]
    view = dw.weight_view()
    assert view.shape == (channels * multiplier, 1, 3, 3)
    assert (dw.groups, dw.in_per_group) == (channels, 1)
    for c in range(channels):
        for m in range(multiplier):
            np.testing.assert_array_equal(view[c * multiplier + m, 0], k[:, :, c, m])
    bias = _raw(ck, "cnn", kind, str(dw.bias))
    np.testing.assert_array_equal(dw.bias_vector(), bias)
    # SeparableConv2D = depthwise [kh, kw, C, dm] + pointwise [1, 1, C·dm, out]
    depth, point = ck.layer("sep/depthwise"), ck.layer("sep/pointwise")
    assert depth is not None and point is not None
    kd = _raw(ck, "cnn", kind, depth.weight)
    for c in range(kd.shape[2]):
        for m in range(kd.shape[3]):
            np.testing.assert_array_equal(
                depth.weight_view()[c * kd.shape[3] + m, 0], kd[:, :, c, m]
            )
    kp = _raw(ck, "cnn", kind, point.weight)
    np.testing.assert_array_equal(point.weight_view()[:, :, 0, 0], kp[0, 0].T)
    assert depth.bias is None and point.bias is not None
    assert point.inputs_from == ("sep/depthwise",)


@pytest.mark.parametrize("kind", ["keras", "h5"])
def test_recurrent_layers_split_per_gate(
    loaded: dict[tuple[str, str], Checkpoint], kind: str
) -> None:
    ck = loaded[("rnn", kind)]
    # LSTM kernel [in, 4H] with gates i, f, c, o; recurrent [H, 4H]; bias [4H]
    gates = [layer for layer in ck.layers if layer.name.startswith("lstm/")]
    assert [(g.name.split("/")[1], g.gate) for g in gates] == [
        ("kernel", "i"), ("kernel", "f"), ("kernel", "c"), ("kernel", "o"),
        ("recurrent_kernel", "i"), ("recurrent_kernel", "f"),
        ("recurrent_kernel", "c"), ("recurrent_kernel", "o"),
    ]  # fmt: skip
    hidden = 5
    for index, gate in enumerate(gates[:4]):
        k = _raw(ck, "rnn", kind, gate.weight)
        np.testing.assert_array_equal(
            gate.weight_view(), k[:, index * hidden : (index + 1) * hidden].T
        )
        b = _raw(ck, "rnn", kind, str(gate.bias))
        np.testing.assert_array_equal(gate.bias_vector(), b[index * hidden : (index + 1) * hidden])
        # keras LSTM: recurrent_activation (sigmoid) on i, f, o; activation (tanh) on c
        assert gate.activation is (Activation.TANH if gate.gate == "c" else Activation.SIGMOID)
    for index, gate in enumerate(gates[4:]):
        r = _raw(ck, "rnn", kind, gate.weight)
        np.testing.assert_array_equal(
            gate.weight_view(), r[:, index * hidden : (index + 1) * hidden].T
        )
        assert gate.bias is None  # Keras LSTM has one bias, on the input side
    # GRU [in, 3H] with gates z, r, h; reset_after bias [2, 3H]: input row, recurrent row
    gru = [layer for layer in ck.layers if layer.name.startswith("gru/")]
    assert [g.gate for g in gru] == ["z", "r", "h", "z", "r", "h"]
    hidden = 4
    bias = _raw(ck, "rnn", kind, str(gru[0].bias))
    assert bias.shape == (2, 3 * hidden)
    for index, gate in enumerate(gru):
        row, column = divmod(index, 3)
        np.testing.assert_array_equal(
            gate.bias_vector(), bias[row, column * hidden : (column + 1) * hidden]
        )
    emb = ck.layer("emb")
    assert emb is not None and emb.kind is LayerKind.EMBEDDING
    assert (emb.units, emb.in_per_group) == (20, 8)  # [vocab, dim] rows-first as stored


# --------------------------------------------------------------------------------------------
# Links, activations, norms, constraints, regularizers (from the config Keras wrote)


def _w(model: str, kind: str, layer: str, var: str) -> str:
    """Tensor name of variable ``var`` of ``layer``, from Keras' own records."""
    e = expected(model)
    for index, (owner, path) in enumerate(zip(e["w_layer"], e["w_path"], strict=True)):
        if owner == layer and str(path).endswith("/" + var):
            return names_for(model, kind)[index]
    raise KeyError((layer, var))


@pytest.mark.parametrize("kind", ["keras", "h5"])
def test_cnn_graph_from_config(loaded: dict[tuple[str, str], Checkpoint], kind: str) -> None:
    ck = loaded[("cnn", kind)]
    by = {layer.name: layer for layer in ck.layers}
    assert all(layer.linked_by is Link.CONFIG for layer in ck.layers)
    # c1 → bn1 → ReLU layer: the following layers count as c1's norm and activation
    c1 = by["c1"]
    assert c1.activation is Activation.RELU
    assert c1.norm is not None and c1.norm.kind is NormKind.BATCH
    assert c1.norm.scale == _w("cnn", kind, "bn1", "gamma")
    assert c1.norm.shift == _w("cnn", kind, "bn1", "beta")
    assert c1.norm.mean == _w("cnn", kind, "bn1", "moving_mean")
    assert c1.norm.var == _w("cnn", kind, "bn1", "moving_variance")
    assert c1.norm.eps == pytest.approx(1e-3)
    assert c1.constraint is not None and c1.constraint.kind == "max-norm"
    assert c1.constraint.max_value == 1.5 and c1.constraint.per_unit  # axis [0, 1, 2]
    assert c1.regularizer is not None and c1.regularizer.l2 == pytest.approx(5e-4)
    assert c1.inputs_from == () and c1.from_input
    assert by["c1d"].from_input and not by["dw"].from_input
    # links look through bn1 and the ReLU layer
    assert by["dw"].inputs_from == ("c1",)
    assert by["dw"].activation is Activation.RELU
    assert by["sep/depthwise"].inputs_from == ("dw",)
    assert by["sep/pointwise"].activation is Activation.LEAKY_RELU  # LeakyReLU layer follows
    up = by["up"]
    assert up.inputs_from == ("sep/pointwise",) and up.activation is Activation.GELU
    assert up.norm is not None and up.norm.shift is None  # bn2 has center=False
    assert up.norm.scale == _w("cnn", kind, "bn2", "gamma")
    c1d = by["c1d"]
    assert c1d.activation is Activation.SILU
    assert c1d.constraint is not None and c1d.constraint.kind == "min-max-norm"
    assert (c1d.constraint.min_value, c1d.constraint.max_value, c1d.constraint.rate) == (
        0.5,
        1.0,
        0.5,
    )
    assert c1d.constraint.per_unit  # axis [0, 1] on [k, in, out]
    # Flatten after convs, then Concatenate: the dense takes both convs' units × positions
    for name in ("left", "right"):
        assert by[name].inputs_from == ("up", "c1d")
        # up: 4 channels on a 3×3 grid after pooling; c1d: 3 channels × 10 steps
        assert by[name].fan_in == 4 * 3 * 3 + 3 * 10
        assert by[name].channels_last_inputs  # Keras flattens channels-last
        assert not by[name].from_input
    # Add lists both producers; the head is the only output
    assert by["out"].inputs_from == ("left", "right")
    assert by["out"].activation is Activation.SIGMOID
    assert [layer.name for layer in ck.layers if layer.is_output] == ["out"]


@pytest.mark.parametrize("kind", ["keras", "h5"])
def test_mlp_activations_constraints_regularizers(
    loaded: dict[tuple[str, str], Checkpoint], kind: str
) -> None:
    ck = loaded[("mlp", kind)]
    hidden, mid, head = (ck.layer(n) for n in ("hidden", "mid", "head"))
    assert hidden is not None and mid is not None and head is not None
    assert hidden.activation is Activation.RELU
    assert mid.activation is Activation.TANH  # from the Activation layer after it
    assert head.activation is Activation.SOFTMAX
    assert mid.inputs_from == ("hidden",)  # through Dropout
    assert head.inputs_from == ("mid",)  # through Activation
    assert head.is_output and not hidden.is_output
    assert hidden.constraint is not None and hidden.constraint.kind == "max-norm"
    assert hidden.constraint.max_value == 2.0 and hidden.constraint.per_unit  # Dense axis 0
    assert hidden.regularizer is not None
    assert (hidden.regularizer.l1, hidden.regularizer.l2) == (0.0, pytest.approx(1e-3))
    assert mid.regularizer is not None
    assert (mid.regularizer.l1, mid.regularizer.l2) == (pytest.approx(1e-4), pytest.approx(2e-4))
    assert mid.constraint is not None and mid.constraint.kind == "unit-norm"
    assert head.constraint is not None and head.constraint.kind == "non-neg"
    # Keras applies constraints after every update (FORMATS.md: MaxNorm bounds the L2 norm
    # over axis): the canonical rows must obey them (reference: numpy.linalg.norm).
    assert np.all(np.linalg.norm(hidden.matrix(), axis=1) <= 2.0 + 1e-5)
    np.testing.assert_allclose(np.linalg.norm(mid.matrix(), axis=1), 1.0, rtol=1e-5)
    assert np.all(head.matrix() >= 0)


@pytest.mark.parametrize("kind", ["keras", "h5"])
def test_nested_model_links_cross_the_boundary(
    loaded: dict[tuple[str, str], Checkpoint], kind: str
) -> None:
    ck = loaded[("nested", kind)]
    by = {layer.name: layer for layer in ck.layers}
    assert set(by) == {"stem", "inner_a", "inner_b", "top"}
    stem = by["stem"]
    assert stem.activation is Activation.RELU  # Activation layer after ln
    assert stem.norm is not None and stem.norm.kind is NormKind.LAYER
    assert stem.norm.scale == _w("nested", kind, "ln", "gamma")
    assert stem.norm.shift is None and stem.norm.eps == pytest.approx(1e-4)
    assert by["inner_a"].inputs_from == ("stem",)  # into the nested Sequential
    assert by["inner_b"].inputs_from == ("inner_a",)
    assert by["top"].inputs_from == ("inner_b",)  # out of it
    assert by["top"].is_output and by["inner_a"].activation is Activation.RELU


def test_weights_only_file_infers_kinds_but_not_links(
    loaded: dict[tuple[str, str], Checkpoint],
) -> None:
    ck = loaded[("mlp", "weights.h5")]
    assert [layer.name for layer in ck.layers] == ["hidden", "mid", "head"]
    assert all(layer.linked_by is Link.NONE for layer in ck.layers)
    assert all(layer.activation is Activation.UNKNOWN for layer in ck.layers)
    assert any("no model config" in note for note in ck.notes)


# --------------------------------------------------------------------------------------------
# Optimizer state


@pytest.mark.parametrize(
    ("model", "kind"),
    [(m, k) for m in MODELS for k in ("keras", "h5")] + [("mlp", "weights.h5")],
)
def test_optimizer_slots_map_to_the_right_tensors(
    loaded: dict[tuple[str, str], Checkpoint], model: str, kind: str
) -> None:
    ck = loaded[(model, kind)]
    e = expected(model)
    state = ck.optimizer
    assert state is not None, ck.notes
    names = names_for(model, kind)
    # reference: the optimizer's own lookup (optimizer._get_variable_index) at save time
    want: dict[str, tuple[int, int]] = {}
    for index, name in enumerate(names):
        first, second = int(e["slot_first"][index]), int(e["slot_second"][index])
        if first >= 0 or second >= 0:
            want[name] = (first, second)
    assert set(state.slots) == set(want)
    for name, (first, second) in want.items():
        slots = state.slots[name]
        for got, where in ((slots.first_moment, first), (slots.second_moment, second)):
            if where < 0:
                assert got is None
            else:
                assert got is not None and got.role is TensorRole.OPTIMIZER
                np.testing.assert_array_equal(got.read(), e[f"opt/{where}"])
    assert state.step == int(e["opt/0"])
    kinds = {"mlp": "adam", "cnn": "sgd", "rnn": "rmsprop", "nested": "adam"}
    assert state.kind == kinds[model]
    if kind != "weights.h5" and model in ("mlp", "nested"):
        assert state.beta1 == pytest.approx(float(e["opt_beta_1"]))
        assert state.beta2 == pytest.approx(float(e["opt_beta_2"]))
        assert state.eps == pytest.approx(float(e["opt_epsilon"]))


def test_ambiguous_optimizer_is_left_out_with_a_note(
    loaded: dict[tuple[str, str], Checkpoint],
) -> None:
    # Without a config the nested model's layer order is not recoverable from keys alone.
    ck = loaded[("nested", "weights.h5")]
    assert ck.optimizer is None
    assert any("optimizer state" in note and "not mapped" in note for note in ck.notes)


# --------------------------------------------------------------------------------------------
# Keras 2 layouts built with h5py (FORMATS.md "Keras")


def _k2_functional() -> dict[str, Any]:
    def layer(name: str, cls: str, config: dict[str, Any], inbound: list[str]) -> dict[str, Any]:
        nodes = [[[src, 0, 0, {}] for src in inbound]] if inbound else []
        return {"name": name, "class_name": cls, "config": {"name": name, **config},
                "inbound_nodes": nodes}  # fmt: skip

    return {
        "class_name": "Model",
        "config": {
            "name": "model_1",
            "layers": [
                layer("input_1", "InputLayer", {"batch_input_shape": [None, 4]}, []),
                layer(
                    "dense_1",
                    "Dense",
                    {
                        "units": 3,
                        "activation": "linear",
                        "use_bias": True,
                        "kernel_constraint": {
                            "class_name": "MaxNorm",
                            "config": {"max_value": 2, "axis": 0},
                        },
                        "kernel_regularizer": {
                            "class_name": "L1L2",
                            "config": {"l1": 0.0, "l2": 0.0010000000474974513},
                        },
                    },
                    ["input_1"],
                ),
                layer(
                    "batch_normalization_1",
                    "BatchNormalization",
                    {"axis": -1, "epsilon": 0.001, "center": True, "scale": True},
                    ["dense_1"],
                ),
                layer(
                    "activation_1", "Activation", {"activation": "relu"}, ["batch_normalization_1"]
                ),
                layer("dense_2", "Dense", {"units": 2, "activation": "softmax"}, ["activation_1"]),
            ],
            "input_layers": [["input_1", 0, 0]],
            "output_layers": [["dense_2", 0, 0]],
        },
    }


K2_WEIGHTS: dict[str, list[tuple[str, tuple[int, ...]]]] = {
    # The stored prefix differs from the layer (dense_1_1 under dense_1), as Keras 2 does.
    "dense_1": [("dense_1_1/kernel:0", (4, 3)), ("dense_1_1/bias:0", (3,))],
    "batch_normalization_1": [
        ("batch_normalization_1/gamma:0", (3,)),
        ("batch_normalization_1/beta:0", (3,)),
        ("batch_normalization_1/moving_mean:0", (3,)),
        ("batch_normalization_1/moving_variance:0", (3,)),
    ],
    "dense_2": [("dense_2/kernel:0", (3, 2)), ("dense_2/bias:0", (2,))],
}


def _values(shape: tuple[int, ...], seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return rng.normal(size=shape).astype(np.float32)


def write_keras2(
    path: Path,
    config: dict[str, Any] | None = _k2_functional(),  # noqa: B008 - never mutated
    weights: dict[str, list[tuple[str, tuple[int, ...]]]] = K2_WEIGHTS,
    layer_order: list[str] | None = None,
    optimizer: list[tuple[str, np.ndarray]] | None = None,
    training: dict[str, Any] | None = None,
    whole_model: bool = True,
) -> dict[str, np.ndarray]:
    """A Keras 2 style HDF5 file (attributes as bytes, ``:0`` suffixes). Returns the values."""
    values: dict[str, np.ndarray] = {}
    with h5py.File(path, "w") as f:
        f.attrs["keras_version"] = b"2.4.0"
        f.attrs["backend"] = b"tensorflow"
        if config is not None:
            f.attrs["model_config"] = json.dumps(config).encode()
        if training is not None:
            f.attrs["training_config"] = json.dumps(training).encode()
        root = f.create_group("model_weights") if whole_model else f
        order = layer_order or ["input_1", "dense_1", "batch_normalization_1", "activation_1",
                                "dense_2"]  # fmt: skip
        root.attrs["layer_names"] = [n.encode() for n in order]
        for seed, layer in enumerate(order):
            group = root.create_group(layer)
            entries = weights.get(layer, [])
            group.attrs["weight_names"] = [w.encode() for w, _ in entries]
            for offset, (weight, shape) in enumerate(entries):
                value = _values(shape, 10 * seed + offset)
                group.create_dataset(weight, data=value)
                values[f"{layer}/{weight}"] = value
        if optimizer is not None:
            group = f.create_group("optimizer_weights")
            group.attrs["weight_names"] = [n.encode() for n, _ in optimizer]
            for name, value in optimizer:
                group.create_dataset(name, data=value)
    return values


def test_keras2_functional_layout(tmp_path: Path) -> None:
    path = tmp_path / "k2.h5"
    values = write_keras2(path)
    ck = load(path)
    assert ck.format.value == "keras-h5"
    # names are the HDF5 path below model_weights, in weight_names order (gamma before beta)
    assert list(ck.tensors) == list(values)
    for name, value in values.items():
        np.testing.assert_array_equal(ck.tensors[name].read(), value)  # reference: h5py write
    d1, d2 = ck.layer("dense_1"), ck.layer("dense_2")
    assert d1 is not None and d2 is not None
    np.testing.assert_array_equal(d1.weight_view(), values["dense_1/dense_1_1/kernel:0"].T)
    assert d1.activation is Activation.RELU and d2.activation is Activation.SOFTMAX
    assert d1.norm is not None
    assert d1.norm.scale == "batch_normalization_1/batch_normalization_1/gamma:0"
    assert d1.norm.mean == "batch_normalization_1/batch_normalization_1/moving_mean:0"
    assert d2.inputs_from == ("dense_1",) and d2.linked_by is Link.CONFIG and d2.is_output
    assert d1.constraint is not None and d1.constraint.per_unit
    assert d1.regularizer is not None and d1.regularizer.l2 == pytest.approx(1e-3)


def _trainable_k2() -> list[tuple[str, tuple[int, ...]]]:
    """(variable name, shape) of the Keras 2 model's trainable weights, model order."""
    out = []
    for layer in ("dense_1", "batch_normalization_1", "dense_2"):
        for weight, shape in K2_WEIGHTS[layer]:
            if "moving" not in weight:
                out.append((weight, shape))
    return out


def _tensor_of(variable: str) -> str:
    layer = next(k for k, v in K2_WEIGHTS.items() if any(w == variable for w, _ in v))
    return f"{layer}/{variable}"


ADAM2 = {"optimizer_config": {"class_name": "Adam", "config": {
    "learning_rate": 0.001, "beta_1": 0.9, "beta_2": 0.999, "epsilon": 1e-07, "amsgrad": False}}}  # fmt: skip


@pytest.mark.parametrize("style", ["tf_keras", "legacy", "keras20"])
def test_keras2_optimizer_layouts(tmp_path: Path, style: str) -> None:
    trainable = _trainable_k2()
    slots: list[tuple[str, np.ndarray]] = []
    truth: dict[tuple[str, str], np.ndarray] = {}  # (tensor name, moment) → value
    if style == "tf_keras":  # iteration:0, then Adam/m/<var>:0, Adam/v/<var>:0 per variable
        slots.append(("iteration:0", np.array(7, dtype=np.int64)))
        for i, (var, shape) in enumerate(trainable):
            for moment, tag in (("first", "m"), ("second", "v")):
                value = _values(shape, 100 + 2 * i + (tag == "v"))
                slots.append((f"Adam/{tag}/{var}", value))
                truth[(_tensor_of(var), moment)] = value
    elif style == "legacy":  # Adam/iter:0, all Adam/<var>/m:0, then all /v:0
        slots.append(("Adam/iter:0", np.array(7, dtype=np.int64)))
        for moment, tag in (("first", "m"), ("second", "v")):
            for i, (var, shape) in enumerate(trainable):
                value = _values(shape, 200 + 2 * i + (tag == "v"))
                slots.append((f"Adam/{var.removesuffix(':0')}/{tag}:0", value))
                truth[(_tensor_of(var), moment)] = value
    else:  # iterations, Variable_N:0: all m then all v over weights sorted by variable name
        slots.append(("Adam/iterations:0", np.array(7, dtype=np.int64)))
        ordered = sorted(trainable)
        n = 0
        for moment in ("first", "second"):
            for var, shape in ordered:
                value = _values(shape, 300 + n)
                slots.append((f"Variable_{n}:0" if n else "Variable:0", value))
                truth[(_tensor_of(var), moment)] = value
                n += 1
        assert [v for v, _ in ordered] != [v for v, _ in trainable]  # order really differs
    path = tmp_path / f"{style}.h5"
    write_keras2(path, optimizer=slots, training=ADAM2)
    ck = load(path)
    state = ck.optimizer
    assert state is not None, ck.notes
    assert state.kind == "adam" and state.step == 7
    assert state.beta1 == pytest.approx(0.9) and state.eps == pytest.approx(1e-7)
    assert len(state.slots) == len(trainable)  # BN moving statistics get no slots
    for (tensor, moment), value in truth.items():
        got = (
            state.slots[tensor].first_moment
            if moment == "first"
            else state.slots[tensor].second_moment
        )
        assert got is not None
        np.testing.assert_array_equal(got.read(), value)  # reference: the values written
    assert not any(n.startswith("optimizer") for n in ck.tensors)


def test_keras2_optimizer_that_does_not_fit_is_not_guessed(tmp_path: Path) -> None:
    trainable = _trainable_k2()
    slots = [("Adam/iterations:0", np.array(3, dtype=np.int64))]
    for n, (_, shape) in enumerate(sorted(trainable)[:-1]):  # one slot short
        slots.append((f"Variable_{n + 1}:0", _values(shape, n)))
    path = tmp_path / "short.h5"
    write_keras2(path, optimizer=slots, training=ADAM2)
    ck = load(path)
    assert ck.optimizer is None
    assert any("not mapped" in note for note in ck.notes)


def test_keras2_weights_only_h5(tmp_path: Path) -> None:
    path = tmp_path / "weights_only.h5"
    weights = {
        "dense_1": [("dense_1/kernel:0", (4, 3)), ("dense_1/bias:0", (3,))],
        "conv2d_transpose_1": [("conv2d_transpose_1/kernel:0", (3, 3, 2, 5))],
    }
    values = write_keras2(path, config=None, weights=weights, layer_order=list(weights),
                          whole_model=False)  # fmt: skip
    ck = load(path)
    assert list(ck.tensors) == list(values)
    dense, up = ck.layer("dense_1"), ck.layer("conv2d_transpose_1")
    assert dense is not None and dense.kind is LayerKind.DENSE
    assert up is not None and up.kind is LayerKind.CONV_TRANSPOSE and up.units == 2
    np.testing.assert_array_equal(
        up.weight_view(),
        np.einsum("hwoi->oihw", values["conv2d_transpose_1/conv2d_transpose_1/kernel:0"]),
    )
    assert dense.linked_by is Link.NONE and dense.activation is Activation.UNKNOWN


def test_keras2_sequential_and_nested_models(tmp_path: Path) -> None:
    inner = {"class_name": "Sequential", "config": {"name": "sequential_1", "layers": [
        {"class_name": "Dense", "config": {"name": "dense_3", "units": 5, "activation": "relu",
                                           "batch_input_shape": [None, 6]}},
        {"class_name": "Dropout", "config": {"name": "dropout_1", "rate": 0.5}},
        {"class_name": "Dense", "config": {"name": "dense_4", "units": 2}},
    ]}}  # fmt: skip
    config = {"class_name": "Model", "config": {"name": "outer", "layers": [
        {"name": "input_1", "class_name": "InputLayer", "config": {"name": "input_1"},
         "inbound_nodes": []},
        {"name": "conv2d_1", "class_name": "Conv2D",
         "config": {"name": "conv2d_1", "filters": 3, "activation": "relu"},
         "inbound_nodes": [[["input_1", 0, 0, {}]]]},
        {"name": "flatten_1", "class_name": "Flatten", "config": {"name": "flatten_1"},
         "inbound_nodes": [[["conv2d_1", 0, 0, {}]]]},
        {"name": "dense_1", "class_name": "Dense", "config": {"name": "dense_1", "units": 6},
         "inbound_nodes": [[["flatten_1", 0, 0, {}]]]},
        {"name": "sequential_1", "class_name": "Sequential", "config": inner["config"],
         "inbound_nodes": [[["dense_1", 0, 0, {}]]]},
        {"name": "dense_2", "class_name": "Dense", "config": {"name": "dense_2", "units": 1},
         "inbound_nodes": [[["sequential_1", 0, 0, {}]]]},
    ], "input_layers": [["input_1", 0, 0]], "output_layers": [["dense_2", 0, 0]]}}  # fmt: skip
    weights = {
        "conv2d_1": [("conv2d_1/kernel:0", (3, 3, 1, 3)), ("conv2d_1/bias:0", (3,))],
        "dense_1": [("dense_1/kernel:0", (3 * 4 * 4, 6)), ("dense_1/bias:0", (6,))],
        "sequential_1": [
            ("dense_3/kernel:0", (6, 5)), ("dense_3/bias:0", (5,)),
            ("dense_4/kernel:0", (5, 2)), ("dense_4/bias:0", (2,)),
        ],
        "dense_2": [("dense_2/kernel:0", (2, 1)), ("dense_2/bias:0", (1,))],
    }  # fmt: skip
    order = ["input_1", "conv2d_1", "flatten_1", "dense_1", "sequential_1", "dense_2"]
    path = tmp_path / "nested_k2.h5"
    values = write_keras2(path, config=config, weights=weights, layer_order=order)
    ck = load(path)
    by = {layer.name: layer for layer in ck.layers}
    assert by["dense_1"].inputs_from == ("conv2d_1",)  # through Flatten
    assert by["dense_1"].fan_in == 3 * 4 * 4  # units × positions
    assert by["dense_3"].inputs_from == ("dense_1",)  # into the nested Sequential
    assert by["dense_4"].inputs_from == ("dense_3",)  # through Dropout
    assert by["dense_2"].inputs_from == ("dense_4",)  # out of it
    np.testing.assert_array_equal(
        by["dense_3"].weight_view(), values["sequential_1/dense_3/kernel:0"].T
    )
    # A Keras 2.0 Sequential config is a bare list of layers.
    bare = {"class_name": "Sequential", "config": inner["config"]["layers"]}
    path = tmp_path / "bare.h5"
    write_keras2(path, config=bare, weights={k: weights["sequential_1"][2 * i : 2 * i + 2]
                 for i, k in enumerate(["dense_3", "dense_4"])},
                 layer_order=["dense_3", "dropout_1", "dense_4"])  # fmt: skip
    ck = load(path)
    assert [(layer.name, layer.inputs_from) for layer in ck.layers] == [
        ("dense_3", ()),
        ("dense_4", ("dense_3",)),
    ]


def _k3(name: str, cls: str, config: dict[str, Any], inbound: list[str]) -> dict[str, Any]:
    """A Keras 3 functional layer entry: inbound nodes as {"args": [...]} with keras_history."""
    tensors = [
        {"class_name": "__keras_tensor__", "config": {"keras_history": [src, 0, 0]}}
        for src in inbound
    ]
    args = [tensors] if len(tensors) > 1 else tensors
    return {
        "module": "keras.layers",
        "class_name": cls,
        "config": {"name": name, **config},
        "name": name,
        "inbound_nodes": [{"args": args, "kwargs": {}}] if inbound else [],
    }


def test_keras3_nested_functional_with_a_name_clash(tmp_path: Path) -> None:
    inner = {
        "name": "blk",
        "layers": [
            _k3("bi", "InputLayer", {}, []),
            _k3("a", "Dense", {"units": 4, "activation": "relu"}, ["bi"]),
            _k3("b", "Dense", {"units": 4}, ["a"]),
            _k3("sum", "Add", {}, ["a", "b"]),
        ],
        "input_layers": [["bi", 0, 0]],
        "output_layers": ["sum", 0, 0],
    }
    outer = {
        "class_name": "Functional",
        "config": {
            "name": "outer",
            "layers": [
                _k3("x", "InputLayer", {}, []),
                _k3("a", "Dense", {"units": 3}, ["x"]),
                {**_k3("blk", "Functional", {}, ["a"]), "config": inner},
                _k3("c", "Dense", {"units": 2, "activation": "tanh"}, ["blk"]),
            ],
            "input_layers": [["x", 0, 0]],
            "output_layers": [["c", 0, 0]],
        },
    }
    weights = {
        "a": [("a/kernel", (5, 3)), ("a/bias", (3,))],
        "blk": [("blk/a/kernel", (3, 4)), ("blk/a/bias", (4,)), ("blk/b/kernel", (4, 4)),
                ("blk/b/bias", (4,))],
        "c": [("c/kernel", (4, 2)), ("c/bias", (2,))],
    }  # fmt: skip
    path = tmp_path / "k3_nested.h5"
    values = write_keras2(path, config=outer, weights=weights, layer_order=["x", "a", "blk", "c"])
    with h5py.File(path, "a") as f:
        f.attrs["keras_version"] = "3.15.1"
    ck = load(path)
    by = {layer.name: layer for layer in ck.layers}
    # the inner "a" clashes with the outer one, so it is qualified by its model
    assert set(by) == {"a", "blk/a", "b", "c"}
    assert by["blk/a"].inputs_from == ("a",)
    assert by["b"].inputs_from == ("blk/a",)
    assert by["c"].inputs_from == ("blk/a", "b")  # the nested model's output is an Add
    assert by["c"].activation is Activation.TANH and by["blk/a"].activation is Activation.RELU
    np.testing.assert_array_equal(by["blk/a"].weight_view(), values["blk/blk/a/kernel"].T)
    np.testing.assert_array_equal(by["a"].weight_view(), values["a/a/kernel"].T)


def test_constraint_axes_decide_per_unit() -> None:
    from steelyard.loaders.keras.layer_settings import constraint_of

    # FORMATS.md: MaxNorm bounds the L2 norm over ``axis`` (default 0: per Dense unit; per
    # conv filter needs [0, 1, 2]). Conv2D kernels are [kh, kw, in, out]: units on axis 3.
    def max_norm(axis: Any) -> dict[str, Any]:
        return {"class_name": "MaxNorm", "config": {"max_value": 3.0, "axis": axis}}

    conv = {3}
    assert constraint_of(max_norm([0, 1, 2]), 4, conv).per_unit
    assert constraint_of(max_norm([-4, -3, -2]), 4, conv).per_unit
    assert not constraint_of(max_norm(0), 4, conv).per_unit
    assert not constraint_of(max_norm([0, 1]), 4, conv).per_unit
    assert constraint_of(max_norm(0), 2, {1}).per_unit  # Dense [in, out]
    assert not constraint_of(max_norm(1), 2, {1}).per_unit
    # Conv2DTranspose [kh, kw, out, in]: units on axis 2
    assert constraint_of(max_norm([0, 1, 3]), 4, {2}).per_unit
    # DepthwiseConv2D [kh, kw, C, dm]: a unit is one (c, m) pair
    assert constraint_of(max_norm([0, 1]), 4, {2, 3}).per_unit


def test_lambda_layer_is_never_decoded(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    import base64
    import marshal

    def refuse(*_: Any, **__: Any) -> Any:
        raise AssertionError("Lambda code must not be decoded")

    monkeypatch.setattr(marshal, "loads", refuse)
    monkeypatch.setattr(base64, "b64decode", refuse)
    config = _k2_functional()
    layers = config["config"]["layers"]
    layers[3] = {"name": "activation_1", "class_name": "Lambda",
                 "config": {"name": "activation_1", "function": ["4wEAAAAAAAAAAAAAAAEAAAAB", None, None],
                            "function_type": "lambda"},
                 "inbound_nodes": [[["batch_normalization_1", 0, 0, {}]]]}  # fmt: skip
    path = tmp_path / "lambda.h5"
    write_keras2(path, config=config)
    ck = load(path)
    d2 = ck.layer("dense_2")
    assert d2 is not None and d2.inputs_from == () and d2.linked_by is Link.NONE
    assert any("Lambda" in note for note in ck.notes)


def _weights_h5(path: Path, datasets: dict[str, np.ndarray]) -> None:
    with h5py.File(path, "w") as f:
        for name, value in datasets.items():
            f.create_dataset(name, data=value)


def test_weights_h5_numeric_order_roles_and_bf16(tmp_path: Path) -> None:
    path = tmp_path / "custom.weights.h5"
    datasets = {f"layers/my_block/vars/{i}": np.full((2,), i, np.float32) for i in range(12)}
    datasets["layers/my_block/vars/12"] = np.arange(3, dtype=np.int64)
    bf16 = np.array([[1.5, -2.0], [0.25, 3.0], [0.0, -0.5]], dtype=ml_dtypes.bfloat16)
    _weights_h5(path, datasets)
    with h5py.File(path, "a") as f:  # Keras 3 writes bf16 as opaque 2-byte data + dtype attr
        ds = f.create_dataset("layers/dense/vars/0", data=bf16)
        ds.attrs["dtype"] = "bfloat16"
    ck = load(path)
    block = [n for n in ck.tensors if n.startswith("layers/my_block/")]
    assert block == [f"layers/my_block/vars/{i}" for i in range(13)]  # 10 after 9
    assert ck.tensors["layers/my_block/vars/12"].role is TensorRole.BOOKKEEPING
    assert ck.tensors["layers/my_block/vars/3"].role is TensorRole.PARAMETER
    tensor = ck.tensors["layers/dense/vars/0"]
    assert tensor.dtype == "bf16" and tensor.role is TensorRole.PARAMETER
    np.testing.assert_array_equal(tensor.read(), bf16)  # reference: ml_dtypes.bfloat16
    dense = ck.layer("layers/dense")
    assert dense is not None
    np.testing.assert_array_equal(dense.weight_view(), bf16.astype(np.float32).T)


def test_optimizer_with_counters_only_has_no_slots(tmp_path: Path) -> None:
    # Keras 3 creates iteration and learning_rate with the optimizer; slots come at the first
    # step (FORMATS.md: ``iteration``, ``learning_rate``, then per variable its slots).
    path = tmp_path / "fresh.weights.h5"
    _weights_h5(path, {
        "layers/dense/vars/0": np.ones((3, 2), np.float32),
        "layers/dense/vars/1": np.zeros(2, np.float32),
        "optimizer/vars/0": np.array(0, np.int64),
        "optimizer/vars/1": np.array(0.001, np.float32),
    })  # fmt: skip
    with h5py.File(path, "a") as f:
        f["optimizer/vars"].attrs["name"] = "adam"
    ck = load(path)
    assert ck.optimizer is not None
    assert ck.optimizer.kind == "adam" and ck.optimizer.step == 0
    assert dict(ck.optimizer.slots) == {}
    # one slot short of Adam's two per variable: ambiguous, so nothing is mapped
    with h5py.File(path, "a") as f:
        f["optimizer/vars/2"] = np.zeros((3, 2), np.float32)
        f["optimizer/vars/3"] = np.zeros((3, 2), np.float32)
        f["optimizer/vars/4"] = np.zeros(2, np.float32)
    ck = load(path)
    assert ck.optimizer is None
    assert any("not mapped" in note for note in ck.notes)


def test_user_block_hdf5_is_recognised(tmp_path: Path) -> None:
    path = tmp_path / "ub.weights.h5"
    with h5py.File(path, "w", userblock_size=512) as f:
        f.create_dataset("layers/dense/vars/0", data=np.ones((3, 2), np.float32))
    head = path.read_bytes()[:4096]
    assert head[:8] != b"\x89HDF\r\n\x1a\n" and head[512:520] == b"\x89HDF\r\n\x1a\n"
    assert KerasH5Loader().sniff(path, head)
    assert load(path).tensors["layers/dense/vars/0"].shape == (3, 2)


# --------------------------------------------------------------------------------------------
# Archives


def _rezip(source: Path, target: Path, extra: list[tuple[str, bytes]] | None = None,
           compression: int = zipfile.ZIP_STORED, skip: tuple[str, ...] = ()) -> None:  # fmt: skip
    with zipfile.ZipFile(source) as archive, zipfile.ZipFile(target, "w", compression) as out:
        for info in archive.infolist():
            if info.filename not in skip:
                out.writestr(info.filename, archive.read(info.filename))
        for name, data in extra or []:
            out.writestr(name, data)


def test_deflated_archive_member_is_read(tmp_path: Path) -> None:
    path = tmp_path / "deflated.keras"
    _rezip(FIX / "mlp.keras", path, compression=zipfile.ZIP_DEFLATED)
    ck = load(path)
    e = expected("mlp")
    for index, name in enumerate(names_for("mlp", "keras")):
        np.testing.assert_array_equal(ck.tensors[name].read(), e[f"w/{index}"])


def test_deflated_weights_member_is_inflated_once_per_run(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    from steelyard.loaders import base

    path = tmp_path / "deflated.keras"
    _rezip(FIX / "mlp.keras", path, compression=zipfile.ZIP_DEFLATED)
    calls: list[str] = []
    original = base.inflate_member

    def counting(source: Path, info: zipfile.ZipInfo, target: Path) -> None:
        calls.append(info.filename)
        original(source, info, target)

    monkeypatch.setattr(base, "inflate_member", counting)
    e = expected("mlp")  # reference: what Keras reported at save time
    for _ in range(2):  # two loads and every tensor read twice: one inflation
        ck = load(path)
        for index, name in enumerate(names_for("mlp", "keras")):
            for _ in range(2):
                np.testing.assert_array_equal(ck.tensors[name].read(), e[f"w/{index}"])
    assert calls == ["model.weights.h5"]


def test_deflated_weights_member_beyond_expansion_budget_is_refused_before_inflating(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    from steelyard import budget
    from steelyard.loaders import base

    path = tmp_path / "padded.keras"
    weights = tmp_path / "w.h5"
    with h5py.File(weights, "w") as f:
        f.create_dataset("layers/dense/vars/0", data=np.zeros((1024, 1024), np.float32))
    with zipfile.ZipFile(FIX / "mlp.keras") as archive:
        config = archive.read("config.json")
    with zipfile.ZipFile(path, "w", zipfile.ZIP_DEFLATED) as out:
        out.writestr("config.json", config)
        out.writestr("model.weights.h5", weights.read_bytes())  # 4 MiB of zeros, deflated
    monkeypatch.setattr(base, "inflate_member", None)  # any inflation would crash the test
    with budget.using(budget.Budget(expansion_bytes=2**20)):
        _expect_load_error(path, "model.weights.h5", "expansion budget")


def _chunked_with_fill(path: Path, shape: tuple[int, int], written: int) -> None:
    with h5py.File(path, "w") as f:
        group = f.create_group("layers/dense/vars")
        kernel = group.create_dataset(
            "0", shape=shape, dtype="<f4", chunks=(64, shape[1]), compression="gzip", fillvalue=0.25
        )
        kernel[:written] = np.random.default_rng(0).normal(size=(written, shape[1]))
        group.create_dataset("1", data=np.zeros(shape[1], np.float32))


def test_fill_value_expansion_beyond_budget_is_refused_at_load(tmp_path: Path) -> None:
    from steelyard import budget

    path = tmp_path / "fill.weights.h5"
    _chunked_with_fill(path, (4096, 256), written=64)  # 4 MiB claimed, ~60 KB stored
    # load() alone refuses: nothing is read.
    with budget.using(budget.Budget(expansion_bytes=2**20)), pytest.raises(LoadError) as info:
        load(path)
    assert "layers/dense/vars/0" in str(info.value) and "expansion budget" in str(info.value)


def test_chunked_dataset_is_decoded_once_in_row_bands(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    path = tmp_path / "bands.weights.h5"
    _chunked_with_fill(path, (1000, 256), written=300)
    monkeypatch.setattr(keras_hdf5, "BLOCK_BYTES", 100_000)  # several bands of 64-row chunks
    log = tmp_path / "decoded.log"
    original = keras_hdf5._read_dataset_into

    def counting(*args: Any) -> int:
        with open(log, "a") as handle:  # runs in the forked sandbox: count through a file
            handle.write("decoded\n")
        return original(*args)

    monkeypatch.setattr(keras_hdf5, "_read_dataset_into", counting)
    with h5py.File(path, "r") as f:  # reference: h5py, fill value included
        reference = f["layers/dense/vars/0"][()]
    tensor = load(path).tensors["layers/dense/vars/0"]
    for _ in range(3):
        np.testing.assert_array_equal(tensor.read(), reference)
    assert log.read_text().splitlines() == ["decoded"]


def test_band_rows_cover_whole_chunks(tmp_path: Path) -> None:
    path = tmp_path / "c.h5"
    with h5py.File(path, "w") as f:
        f.create_dataset("d", shape=(1000, 300), dtype="<f4", chunks=(48, 100))
        f.create_dataset("e", shape=(1000, 300), dtype="<f4", chunks=(1000, 300))
        with pytest.MonkeyPatch.context() as patch:
            patch.setattr(keras_hdf5, "BLOCK_BYTES", 200_000)
            rows = keras_hdf5._band_rows(f["d"], (1000, 300), 4)
            assert rows % 48 == 0 and rows * 300 * 4 <= 200_000
            # A chunk larger than a band: one whole chunk per band, never a part of one.
            assert keras_hdf5._band_rows(f["e"], (1000, 300), 4) == 1000


def test_structure_timeout_follows_the_budget() -> None:
    from steelyard import budget

    # Default: 60 s of structure budget, 5 s for the sandbox (the 20 s promise).
    assert keras_hdf5.load_timeout() == pytest.approx(5.0)
    assert keras_hdf5.load_timeout() < 20
    with budget.using(budget.Budget(load_seconds=600.0)):
        assert keras_hdf5.load_timeout() == pytest.approx(50.0)
    with budget.using(budget.Budget(load_seconds=1.0)):
        assert keras_hdf5.load_timeout() == 1.0


def test_hard_link_alias_of_a_dataset_is_refused(tmp_path: Path) -> None:
    path = tmp_path / "alias.weights.h5"
    with h5py.File(path, "w") as f:
        data = f.create_dataset("layers/dense/vars/0", data=np.ones((3, 2), np.float32))
        f["layers/dense/vars/1"] = data  # a second hard link to the same dataset
    _expect_load_error(path, "another hard link")


def test_natural_order_of_huge_and_non_ascii_numbers() -> None:
    from steelyard.loaders.keras.config_values import natural_key

    names = ["vars/10", "vars/9", "vars/" + "9" * 5000, "vars/0010", "vars/\u00b2"]
    ordered = sorted(names, key=natural_key)
    # int() order for ASCII digit runs (and no conversion of the 5000 digits, which Python
    # refuses past 4300); a superscript two is not a number.
    assert ordered[:4] == ["vars/9", "vars/10", "vars/0010", "vars/" + "9" * 5000]


def test_sniff_does_not_claim_npz_or_pytorch_zips(tmp_path: Path) -> None:
    loader = KerasArchiveLoader()
    npz = tmp_path / "arrays.npz"
    np.savez(npz, config=np.zeros(2), weights=np.ones(3))
    torch_like = tmp_path / "model.pt"
    with zipfile.ZipFile(torch_like, "w") as out:
        out.writestr("archive/data.pkl", b"\x80\x02}q\x00.")
        out.writestr("archive/version", b"3\n")
        out.writestr("archive/data/0", b"\x00" * 16)
    for path in (npz, torch_like):
        assert not loader.sniff(path, path.read_bytes()[:4096])
    keras_file = FIX / "mlp.keras"
    assert loader.sniff(keras_file, keras_file.read_bytes()[:4096])


# --------------------------------------------------------------------------------------------
# Hostile and broken files: always LoadError through steelyard.loaders.load


def _legacy_with(path: Path, build: Any) -> None:
    """A minimal legacy file whose dense_1 kernel is whatever ``build(group)`` creates."""
    config = {"class_name": "Sequential", "config": {"name": "s", "layers": [
        {"class_name": "Dense", "config": {"name": "dense_1", "units": 2}}]}}  # fmt: skip
    with h5py.File(path, "w") as f:
        f.attrs["keras_version"] = "3.15.1"
        f.attrs["model_config"] = json.dumps(config)
        root = f.create_group("model_weights")
        root.attrs["layer_names"] = ["dense_1"]
        group = root.create_group("dense_1")
        group.attrs["weight_names"] = ["dense_1/kernel"]
        build(f, group)


def _expect_load_error(path: Path, *words: str) -> LoadError:
    with pytest.raises(LoadError) as info:
        ck = load(path)
        for tensor in ck.tensors.values():
            tensor.read()
    message = str(info.value)
    assert str(path) in message
    for word in words:
        assert word in message
    return info.value


def test_external_link_is_refused(tmp_path: Path) -> None:
    outside = tmp_path / "outside"
    outside.mkdir()
    secret = outside / "secret.h5"
    with h5py.File(secret, "w") as f:
        f["data"] = np.ones((3, 2), np.float32)
    path = tmp_path / "model" / "ext.h5"
    path.parent.mkdir()

    def build(f: h5py.File, group: h5py.Group) -> None:
        group.create_group("dense_1")
        group["dense_1/kernel"] = h5py.ExternalLink(str(secret), "data")

    _legacy_with(path, build)
    _expect_load_error(path, "external link")
    # A target that does not exist is reported the same way: the link is never followed.
    missing = tmp_path / "model" / "dangling.h5"

    def dangling(f: h5py.File, group: h5py.Group) -> None:
        group.create_group("dense_1")
        group["dense_1/kernel"] = h5py.ExternalLink(str(outside / "absent.h5"), "data")

    _legacy_with(missing, dangling)
    _expect_load_error(missing, "external link")
    weights = tmp_path / "model" / "ext.weights.h5"
    with h5py.File(weights, "w") as f:
        f.create_group("layers/dense/vars")
        f["layers/dense/vars/0"] = h5py.ExternalLink(str(secret), "data")
    _expect_load_error(weights, "external link")


def test_external_storage_is_refused(tmp_path: Path) -> None:
    raw = tmp_path / "raw.bin"
    raw.write_bytes(np.ones(6, np.float32).tobytes())

    def build(f: h5py.File, group: h5py.Group) -> None:
        group.create_dataset(
            "dense_1/kernel", shape=(3, 2), dtype="f4", external=[(str(raw), 0, 24)]
        )

    path = tmp_path / "external_storage.h5"
    _legacy_with(path, build)
    _expect_load_error(path, "external files")


def test_virtual_dataset_pointing_outside_is_refused(tmp_path: Path) -> None:
    other = tmp_path / "elsewhere.h5"
    with h5py.File(other, "w") as f:
        f["data"] = np.ones((3, 2), np.float32)
    path = tmp_path / "virtual.weights.h5"
    with h5py.File(path, "w") as f:
        layout = h5py.VirtualLayout(shape=(3, 2), dtype="f4")
        layout[:] = h5py.VirtualSource(str(other), "data", shape=(3, 2))
        f.create_group("layers/dense/vars").create_virtual_dataset("0", layout)
    _expect_load_error(path, "virtual dataset")


def test_soft_link_outside_the_weights_is_refused(tmp_path: Path) -> None:
    def build(f: h5py.File, group: h5py.Group) -> None:
        f["elsewhere/data"] = np.ones((3, 2), np.float32)
        group.create_group("dense_1")
        group["dense_1/kernel"] = h5py.SoftLink("/elsewhere/data")

    path = tmp_path / "soft.h5"
    _legacy_with(path, build)
    _expect_load_error(path, "soft link")


def test_soft_link_inside_the_weights_is_followed(tmp_path: Path) -> None:
    value = np.arange(6, dtype=np.float32).reshape(3, 2)

    def build(f: h5py.File, group: h5py.Group) -> None:
        f["model_weights/store/k"] = value
        group.create_group("dense_1")
        group["dense_1/kernel"] = h5py.SoftLink("/model_weights/store/k")

    path = tmp_path / "soft_inside.h5"
    _legacy_with(path, build)
    np.testing.assert_array_equal(load(path).tensors["dense_1/dense_1/kernel"].read(), value)


def test_decompression_bomb_is_refused(tmp_path: Path) -> None:
    path = tmp_path / "bomb.weights.h5"
    with h5py.File(path, "w") as f:
        f.create_dataset("layers/dense/vars/0", shape=(1 << 28,), dtype="f4",
                         chunks=(1 << 16,), compression="gzip")  # fmt: skip
    _expect_load_error(path, "declares")


def test_missing_dataset_wrong_shape_and_bad_json(tmp_path: Path) -> None:
    path = tmp_path / "missing.h5"
    _legacy_with(path, lambda f, g: None)
    _expect_load_error(path, "dense_1/kernel")

    path = tmp_path / "shape.h5"
    _legacy_with(
        path, lambda f, g: g.create_dataset("dense_1/kernel", data=np.ones((2, 2, 2), np.float32))
    )
    _expect_load_error(path, "shape")

    for text, word in (("{not json", "not valid JSON"), ('{"a": 1, "a": 2}', "duplicate")):
        path = tmp_path / "json.h5"
        _legacy_with(
            path, lambda f, g: g.create_dataset("dense_1/kernel", data=np.ones((3, 2), np.float32))
        )
        with h5py.File(path, "a") as f:
            f.attrs["model_config"] = text
        _expect_load_error(path, "model_config", word)


def _keras_zip(path: Path, members: list[tuple[str, bytes]]) -> None:
    with zipfile.ZipFile(path, "w") as out:
        for name, data in members:
            out.writestr(zipfile.ZipInfo(name), data)


def test_hostile_archives_are_refused(tmp_path: Path) -> None:
    with zipfile.ZipFile(FIX / "mlp.keras") as archive:
        config, weights = archive.read("config.json"), archive.read("model.weights.h5")
    traversal = tmp_path / "traversal.keras"
    _keras_zip(traversal, [("config.json", config), ("model.weights.h5", weights),
                           ("../../evil.txt", b"x")])  # fmt: skip
    _expect_load_error(traversal, "path-traversal")
    duplicate = tmp_path / "duplicate.keras"
    with pytest.warns(UserWarning):  # zipfile warns about the duplicate it was asked to write
        _keras_zip(duplicate, [("config.json", config), ("model.weights.h5", weights),
                               ("model.weights.h5", weights)])  # fmt: skip
    _expect_load_error(duplicate, "twice")
    npz = tmp_path / "npz_variant.keras"
    buffer = io.BytesIO()
    np.savez(buffer, a=np.array([object()], dtype=object), allow_pickle=True)
    _keras_zip(npz, [("config.json", config), ("model.weights.npz", buffer.getvalue())])
    _expect_load_error(npz, "pickled")
    bad_json = tmp_path / "bad_json.keras"
    _keras_zip(bad_json, [("config.json", b"{oops"), ("model.weights.h5", weights)])
    _expect_load_error(bad_json, "config.json")


def test_oversized_compressed_member_is_refused(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    path = tmp_path / "big.keras"
    _rezip(FIX / "mlp.keras", path, compression=zipfile.ZIP_DEFLATED)
    monkeypatch.setattr(keras_archive, "MAX_INFLATED", 1024)
    _expect_load_error(path, "model.weights.h5")


@pytest.mark.parametrize("name", ["mlp.h5", "mlp.keras", "mlp.weights.h5"])
def test_truncated_files(tmp_path: Path, name: str) -> None:
    data = (FIX / name).read_bytes()
    for keep in (len(data) // 2, len(data) - 100, 600):
        path = tmp_path / name
        path.write_bytes(data[:keep])
        _expect_load_error(path)


@pytest.mark.parametrize("suffix", [".h5", ".keras", ".weights.h5", ".hdf5"])
def test_random_bytes(tmp_path: Path, suffix: str) -> None:
    rng = np.random.default_rng(len(suffix))
    for prefix in (b"", b"\x89HDF\r\n\x1a\n", b"PK\x03\x04"):
        path = tmp_path / f"random{suffix}"
        path.write_bytes(prefix + rng.integers(0, 256, 4000, dtype=np.uint8).tobytes())
        _expect_load_error(path)


def test_stored_member_with_broken_local_header(tmp_path: Path) -> None:
    data = bytearray((FIX / "mlp.keras").read_bytes())
    with zipfile.ZipFile(FIX / "mlp.keras") as archive:
        offset = archive.getinfo("model.weights.h5").header_offset
    data[offset : offset + 4] = b"XXXX"
    path = tmp_path / "header.keras"
    path.write_bytes(bytes(data))
    _expect_load_error(path)


# --------------------------------------------------------------------------------------------
# Property: any damage reads or raises LoadError, in bounded time


def _mutate(data: bytes, op: str, position: float, length: int, seed: int) -> bytes:
    where = int(position * (len(data) - 1))
    if op == "truncate":
        return data[:where]
    rng = np.random.default_rng(seed)
    buffer = bytearray(data)
    if op == "flip":
        for spot in rng.integers(0, len(data), size=max(1, length % 16)):
            buffer[int(spot)] ^= 1 << int(rng.integers(0, 8))
        return bytes(buffer)
    start = int(rng.integers(0, len(data)))
    chunk = data[start : start + length]
    return bytes(buffer[:where] + chunk + buffer[where + len(chunk) :])  # splice over


@pytest.mark.parametrize("name", ["mlp.weights.h5", "mlp.keras", "mlp.h5"])
@settings(max_examples=40, deadline=8000, suppress_health_check=[HealthCheck.too_slow])
@given(
    op=st.sampled_from(["truncate", "flip", "splice"]),
    position=st.floats(0.0, 1.0),
    length=st.integers(1, 4096),
    seed=st.integers(0, 2**32 - 1),
)
def test_damaged_files_read_or_raise_load_error(
    name: str, op: str, position: float, length: int, seed: int
) -> None:
    data = _mutate((FIX / name).read_bytes(), op, position, length, seed)
    saved = keras_hdf5.LOAD_TIMEOUT
    keras_hdf5.LOAD_TIMEOUT = 2.0  # a stuck HDF5 library must become a LoadError in time
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / name
        path.write_bytes(data)
        try:
            ck = load(path)
            for tensor in ck.tensors.values():
                tensor.read()
            for layer in ck.layers:
                layer.weight_view()
                layer.bias_vector()
            if ck.optimizer is not None:
                for slots in ck.optimizer.slots.values():
                    for slot in (slots.first_moment, slots.second_moment):
                        if slot is not None:
                            slot.read()
        except LoadError as exc:
            assert str(path) in str(exc)
        finally:
            keras_hdf5.LOAD_TIMEOUT = saved


# --------------------------------------------------------------------------------------------
# Wrapped layers (TimeDistributed, Bidirectional): real files written by Keras 3.15
# (fixtures/gen_keras_real.py, ``_wrapper_files``); where Keras put each variable and which
# class owns it come from Keras itself, the stored values are read back with h5py.

WRAPPED = ("wrapped_dense", "wrapped_rnn")
WRAPPED_KINDS = ("weights.h5", "legacy-weights.h5", "h5", "keras")


def _wrapped_h5py(model: str, kind: str) -> dict[str, np.ndarray]:
    """Every dataset of the file, as h5py reads it (reference: h5py)."""
    path = FIX / f"{model}.{kind}"
    found: dict[str, np.ndarray] = {}

    def visit(name: str, obj: Any) -> None:
        if isinstance(obj, h5py.Dataset):
            found[name] = np.asarray(obj[()])

    if kind == "keras":
        with zipfile.ZipFile(path) as archive:
            data = archive.read("model.weights.h5")
        with h5py.File(io.BytesIO(data), "r") as f:
            f.visititems(visit)
    else:
        with h5py.File(path, "r") as f:
            (f["model_weights"] if kind == "h5" else f).visititems(visit)
    return {k: v for k, v in found.items() if not k.startswith("optimizer")}


def _canonical_of(cls: str, value: np.ndarray) -> list[np.ndarray]:
    """What a Keras kernel looks like as canonical ``[out, in, k…]`` rows: Dense ``[in,out]``
    and Conv1D ``[k,in,out]`` per /work/shared/FORMATS.md ("Keras"); recurrent kernels are
    split per gate (``[in, G·H]`` → G blocks of ``[H, in]``)."""
    if cls == "Dense":
        return [value.T]
    if cls == "Conv1D":
        return [np.transpose(value, (2, 1, 0))]
    gates = {"LSTM": 4, "GRU": 3, "SimpleRNN": 1}[cls]
    hidden = value.shape[1] // gates
    return [value[:, g * hidden : (g + 1) * hidden].T for g in range(gates)]


@pytest.mark.parametrize("model", WRAPPED)
@pytest.mark.parametrize("kind", WRAPPED_KINDS)
def test_wrapped_layers_become_layers_and_every_weight_is_covered(model: str, kind: str) -> None:
    ck = load(FIX / f"{model}.{kind}")
    e = np.load(FIX / f"{model}.expected.npz")
    reference = _wrapped_h5py(model, kind)
    # Every tensor equals what h5py reads, and nothing is missing.
    assert set(ck.tensors) == set(reference)
    for name, tensor in ck.tensors.items():
        np.testing.assert_array_equal(tensor.read(), reference[name])
    covered = {n for layer in ck.layers for n in layer.tensor_names}
    assert {n for n, t in ck.tensors.items() if t.role is TensorRole.PARAMETER} <= covered
    # Every kernel Keras reports is some layer's canonical weight, in the right orientation.
    views = [layer.weight_view() for layer in ck.layers]
    kernels = 0
    for i, is_kernel in enumerate(e["w_kernel"]):
        if not is_kernel:
            continue
        kernels += 1
        for block in _canonical_of(str(e["w_class"][i]), e[f"w/{i}"]):
            assert any(v.shape == block.shape and np.array_equal(v, block) for v in views), (
                str(e["w_path"][i])
            )
    assert kernels == (13 if model == "wrapped_dense" else 10)


@pytest.mark.parametrize("kind", WRAPPED_KINDS)
def test_wrapped_dense_kinds_names_and_config_links(kind: str) -> None:
    ck = load(FIX / f"wrapped_dense.{kind}")
    dense = [layer for layer in ck.layers if layer.kind is LayerKind.DENSE]
    assert len(dense) == 8  # six TimeDistributed(Dense), td_proj, head
    conv = [layer for layer in ck.layers if layer.kind is LayerKind.CONV]
    assert [(c.units, c.in_per_group, c.kernel) for c in conv] == [(3, 1, (2,))]
    td1 = next(layer for layer in ck.layers if layer.name.startswith("td1/"))
    assert (td1.units, td1.in_per_group) == (10, 12)
    if kind in ("h5", "keras"):
        td0 = next(layer for layer in ck.layers if layer.name.startswith("td0/"))
        assert td1.inputs_from == (td0.name,) and td1.linked_by is Link.CONFIG
        assert td1.activation is Activation.RELU
        lstm = [layer for layer in ck.layers if layer.kind is LayerKind.RECURRENT]
        assert {layer.name.split("/")[1] for layer in lstm} == {"forward_lstm", "backward_lstm"}


def test_wrapped_weights_h5_without_names_infers_classes_from_shapes(tmp_path: Path) -> None:
    """Keras before 3.15 writes no ``name`` attribute on ``vars`` groups: Dense and RNN
    cells are then told apart by their variables' shapes alone."""
    copy = tmp_path / "old.weights.h5"
    copy.write_bytes((FIX / "wrapped_rnn.weights.h5").read_bytes())
    with h5py.File(copy, "r+") as f:
        groups: list[h5py.Group] = []
        f.visititems(lambda _n, o: groups.append(o) if isinstance(o, h5py.Group) else None)
        for group in groups:
            if "name" in group.attrs:
                del group.attrs["name"]
    ck = load(copy)
    gates = sorted(
        {layer.gate for layer in ck.layers if layer.kind is LayerKind.RECURRENT and layer.gate}
    )
    assert gates == ["h", "r", "z"]  # GRU z, r, h and SimpleRNN h (Keras gate names)
    assert sum(layer.kind is LayerKind.DENSE for layer in ck.layers) == 1
    covered = {n for layer in ck.layers for n in layer.tensor_names}
    # A lone 2-D variable (Dense without bias) could as well be an embedding table: left
    # out rather than guessed, and the coverage count shows it.
    assert set(ck.tensors) - covered == {"layers/time_distributed/layer/vars/0"}


def test_keras2_time_distributed_weights_named_after_the_wrapper(tmp_path: Path) -> None:
    """tf.keras 2 names a TimeDistributed Dense's weights ``time_distributed/kernel:0``
    (layout per /work/shared/FORMATS.md "Keras"): the shapes make it a Dense."""
    path = tmp_path / "k2.h5"
    kernel, bias = _values((5, 3), 1), _values((3,), 2)
    with h5py.File(path, "w") as f:
        f.attrs["layer_names"] = [b"time_distributed"]
        f.attrs["keras_version"] = b"2.15.0"
        group = f.create_group("time_distributed")
        group.attrs["weight_names"] = [b"time_distributed/kernel:0", b"time_distributed/bias:0"]
        group["time_distributed/kernel:0"] = kernel
        group["time_distributed/bias:0"] = bias
    ck = load(path)
    (layer,) = ck.layers
    assert layer.kind is LayerKind.DENSE and (layer.units, layer.in_per_group) == (3, 5)
    np.testing.assert_array_equal(layer.weight_view(), kernel.T)
