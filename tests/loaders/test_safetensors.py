"""safetensors loader against the reference `safetensors` package and `ml_dtypes`."""

from __future__ import annotations

import json
import struct
from pathlib import Path

import ml_dtypes
import numpy as np
import pytest
import safetensors.numpy as st_numpy
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from steelyard.errors import LoadError
from steelyard.graph import Format, LayerKind, Link, TensorRole
from steelyard.loaders import load
from tests.conftest import mlp_tensors


def _raw_file(path: Path, header: object, data: bytes = b"", pad: bool = True) -> Path:
    text = json.dumps(header).encode()
    if pad:
        text += b" " * (-len(text) % 8)
    path.write_bytes(struct.pack("<Q", len(text)) + text + data)
    return path


def test_tensors_match_reference_reader(tmp_path: Path, rng: np.random.Generator) -> None:
    tensors = mlp_tensors(rng)
    tensors["position_ids"] = np.arange(10, dtype=np.int64)
    tensors["scale64"] = rng.normal(size=(3, 2))
    path = tmp_path / "m.safetensors"
    st_numpy.save_file(tensors, path)
    checkpoint = load(path)
    reference = st_numpy.load_file(path)  # reference: the safetensors package
    assert set(checkpoint.tensors) == set(reference)
    for name, array in reference.items():
        np.testing.assert_array_equal(checkpoint.tensors[name].read(), array)
    assert checkpoint.format is Format.SAFETENSORS
    # parameters = floating tensors only; position ids are bookkeeping (the JSON contract).
    assert checkpoint.tensors["position_ids"].role is TensorRole.BOOKKEEPING
    assert checkpoint.parameters == sum(a.size for n, a in reference.items() if a.dtype.kind == "f")


def test_bf16_matches_package_after_ml_dtypes(tmp_path: Path, rng: np.random.Generator) -> None:
    values = rng.normal(size=(5, 7)).astype(ml_dtypes.bfloat16)
    path = tmp_path / "b.safetensors"
    st_numpy.save_file({"w.weight": values}, path)
    # reference: the package reads BF16 once ml_dtypes is imported (imported above).
    reference = st_numpy.load_file(path)["w.weight"]
    got = load(path).tensors["w.weight"]
    assert got.dtype == "bf16"
    np.testing.assert_array_equal(got.read().view(np.uint16), reference.view(np.uint16))
    np.testing.assert_array_equal(got.read_float32(), reference.astype(np.float32))


def test_float32_parts_fill_the_caller_array_as_the_package_reads_them(
    tmp_path: Path, rng: np.random.Generator
) -> None:
    # A streamed float32 pass reads the file straight into the layer's matrix
    # (Tensor.fill_span); every part must hold what the safetensors package reads there,
    # and a part that would leave the tensor or the file is refused, never half-filled.
    values = rng.normal(size=(37, 11)).astype(np.float32)
    values[3, 4], values[5, 6] = np.nan, -np.inf
    path = tmp_path / "f.safetensors"
    st_numpy.save_file({"w.weight": values, "h.weight": values[:2].astype(np.float16)}, path)
    reference = st_numpy.load_file(path)["w.weight"].reshape(-1)  # reference: safetensors
    tensor = load(path).tensors["w.weight"]
    assert tensor.fill_span is not None
    assert load(path).tensors["h.weight"].fill_span is None  # other dtypes convert
    out = np.full(reference.size, 7.0, np.float32)
    for start, stop in ((0, 1), (1, 100), (100, 101), (101, reference.size)):
        tensor.widen_part(start, stop, out[start:stop])
    np.testing.assert_array_equal(out.view(np.uint32), reference.view(np.uint32))
    strided = np.zeros(2 * 11, np.float32)[::2]  # not contiguous: read, then copied
    tensor.widen_part(0, 11, strided)
    np.testing.assert_array_equal(strided, reference[:11])
    with pytest.raises(ValueError):
        tensor.fill_span(reference.size - 2, reference.size + 1, np.zeros(3, np.float32))
    # The file shrinks after it was listed: the read stops with the loader's reason.
    data = path.read_bytes()
    data_start = 8 + struct.unpack("<Q", data[:8])[0]
    w_stop = json.loads(data[8:data_start])["w.weight"]["data_offsets"][1]
    listed = load(path).tensors["w.weight"]
    path.write_bytes(data[: data_start + w_stop - 8])  # w's last two values are gone
    with pytest.raises(LoadError, match="ended before"):
        listed.widen_part(0, reference.size, np.zeros(reference.size, np.float32))


@pytest.mark.parametrize(("tag", "dtype"), [("F8_E4M3", ml_dtypes.float8_e4m3fn), ("F8_E5M2", ml_dtypes.float8_e5m2)])
def test_fp8_decoded_from_raw_bytes(tmp_path: Path, rng: np.random.Generator, tag: str, dtype: type) -> None:
    # The package's numpy backend cannot read FP8 at all, so the reference is ml_dtypes' cast.
    values = rng.normal(size=(4, 6)).astype(np.float32)
    stored = values.astype(dtype)
    path = _raw_file(tmp_path / "f8.safetensors", {"x.weight": {"dtype": tag, "shape": [4, 6], "data_offsets": [0, 24]}}, stored.tobytes())
    got = load(path).tensors["x.weight"].read_float32()
    np.testing.assert_array_equal(got, stored.astype(np.float32))  # reference: ml_dtypes


def test_sharded_index_and_folder(tmp_path: Path, rng: np.random.Generator) -> None:
    tensors = mlp_tensors(rng, (5, 8, 8, 3))
    names = sorted(tensors)
    first, second = names[: len(names) // 2], names[len(names) // 2 :]
    st_numpy.save_file({n: tensors[n] for n in first}, tmp_path / "model-00001-of-00002.safetensors")
    st_numpy.save_file({n: tensors[n] for n in second}, tmp_path / "model-00002-of-00002.safetensors")
    weight_map = {n: "model-00001-of-00002.safetensors" for n in first}
    weight_map |= {n: "model-00002-of-00002.safetensors" for n in second}
    index = tmp_path / "model.safetensors.index.json"
    index.write_text(json.dumps({"metadata": {"total_size": 0}, "weight_map": weight_map}))
    for target in (index, tmp_path):
        checkpoint = load(target)
        assert len(checkpoint.files) == 2
        for name, array in tensors.items():
            np.testing.assert_array_equal(checkpoint.tensors[name].read(), array)
    assert [layer.name for layer in checkpoint.layers] == ["fc1", "fc2", "fc3"]
    assert checkpoint.layer("fc3").inputs_from == ("fc2",)  # type: ignore[union-attr]


def test_index_pointing_outside_is_refused(tmp_path: Path, rng: np.random.Generator) -> None:
    outside = tmp_path / "outside.safetensors"
    st_numpy.save_file({"a": np.zeros(2, np.float32)}, outside)
    folder = tmp_path / "model"
    folder.mkdir()
    index = folder / "model.safetensors.index.json"
    for location in ("../outside.safetensors", str(outside)):
        index.write_text(json.dumps({"weight_map": {"a": location}}))
        with pytest.raises(LoadError, match=r"outside|absolute"):
            load(index)
    (folder / "link.safetensors").symlink_to(outside)
    index.write_text(json.dumps({"weight_map": {"a": "link.safetensors"}}))
    with pytest.raises(LoadError, match="symbolic link"):
        load(index)


def test_orientation_and_links_follow_pytorch_names(tmp_path: Path, rng: np.random.Generator) -> None:
    tensors = {
        "features.0.weight": rng.normal(size=(8, 3, 3, 3)).astype(np.float32),
        "features.0.bias": np.zeros(8, np.float32),
        "features.1.weight": np.ones(8, np.float32),
        "features.1.bias": np.zeros(8, np.float32),
        "features.1.running_mean": np.zeros(8, np.float32),
        "features.1.running_var": np.ones(8, np.float32),
        "features.1.num_batches_tracked": np.array(3, np.int64),
        "features.3.weight": rng.normal(size=(16, 8, 3, 3)).astype(np.float32),
        "embed_tokens.weight": rng.normal(size=(50, 12)).astype(np.float32),
        "lstm.weight_ih_l0": rng.normal(size=(4 * 6, 12)).astype(np.float32),
        "lstm.weight_hh_l0": rng.normal(size=(4 * 6, 6)).astype(np.float32),
        "lstm.bias_ih_l0": rng.normal(size=24).astype(np.float32),
        "lstm.bias_hh_l0": rng.normal(size=24).astype(np.float32),
    }
    path = tmp_path / "cnn.safetensors"
    st_numpy.save_file(tensors, path)
    checkpoint = load(path)
    conv0 = checkpoint.layer("features.0")
    assert conv0 is not None and conv0.kind is LayerKind.CONV and conv0.kernel == (3, 3)
    assert conv0.norm is not None and conv0.norm.var == "features.1.running_var"
    conv3 = checkpoint.layer("features.3")
    assert conv3 is not None and conv3.inputs_from == ("features.0",) and conv3.linked_by is Link.INFERRED
    embedding = checkpoint.layer("embed_tokens")
    assert embedding is not None and embedding.kind is LayerKind.EMBEDDING and embedding.units == 50
    gates = [layer for layer in checkpoint.layers if layer.kind is LayerKind.RECURRENT]
    # torch LSTM gate order is i, f, g, o (torch.nn.LSTM documentation).
    assert [g.gate for g in gates if "ih" in g.name] == ["i", "f", "g", "o"]
    forget = next(g for g in gates if g.name == "lstm.ih_l0.f")
    np.testing.assert_array_equal(forget.matrix(), tensors["lstm.weight_ih_l0"][6:12])
    assert checkpoint.tensors["features.1.num_batches_tracked"].role is TensorRole.BOOKKEEPING


def test_gpt2_conv1d_is_transposed_with_config(tmp_path: Path, rng: np.random.Generator) -> None:
    # GPT-2's Conv1D stores [in, out] (transformers' pytorch_utils.Conv1D); config.json says so.
    w = rng.normal(size=(8, 32)).astype(np.float32)
    st_numpy.save_file({"h.0.mlp.c_fc.weight": w, "h.0.mlp.c_proj.weight": w.T.copy()}, tmp_path / "model.safetensors")
    (tmp_path / "config.json").write_text(json.dumps({"model_type": "gpt2", "activation_function": "gelu_new"}))
    layer = load(tmp_path / "model.safetensors").layer("h.0.mlp.c_fc")
    assert layer is not None and (layer.units, layer.fan_in) == (32, 8)
    np.testing.assert_array_equal(layer.matrix(), w.T)


BAD_HEADERS: list[tuple[str, object, bytes, str]] = [
    ("not an object", [1, 2, 3], b"", "not a JSON object"),
    ("bad dtype", {"a": {"dtype": "Q7", "shape": [1], "data_offsets": [0, 4]}}, b"\0" * 4, "unsupported dtype"),
    ("out of bounds", {"a": {"dtype": "F32", "shape": [4], "data_offsets": [0, 16]}}, b"\0" * 8, "outside"),
    ("size mismatch", {"a": {"dtype": "F32", "shape": [3], "data_offsets": [0, 8]}}, b"\0" * 8, "needs 12 bytes"),
    ("overlap", {"a": {"dtype": "F32", "shape": [2], "data_offsets": [0, 8]},
                 "b": {"dtype": "F32", "shape": [2], "data_offsets": [4, 12]}}, b"\0" * 12, "overlaps"),
    ("gap", {"a": {"dtype": "F32", "shape": [1], "data_offsets": [4, 8]}}, b"\0" * 8, "gap"),
    ("trailing", {"a": {"dtype": "F32", "shape": [1], "data_offsets": [0, 4]}}, b"\0" * 12, "after the last"),
    ("negative shape", {"a": {"dtype": "F32", "shape": [-1], "data_offsets": [0, 4]}}, b"\0" * 4, "shape"),
    ("metadata", {"__metadata__": {"k": 1}}, b"", "strings"),
]


@pytest.mark.parametrize(("label", "header", "data", "message"), BAD_HEADERS, ids=[b[0] for b in BAD_HEADERS])
def test_lying_headers_are_refused(tmp_path: Path, label: str, header: object, data: bytes, message: str) -> None:
    path = _raw_file(tmp_path / "bad.safetensors", header, data)
    with pytest.raises(LoadError, match=message) as raised:
        load(path)
    assert str(path) in str(raised.value)


def test_huge_header_length_is_refused_without_reading(tmp_path: Path) -> None:
    path = tmp_path / "huge.safetensors"
    path.write_bytes(struct.pack("<Q", 2**60) + b"{" + b" " * 4095)
    with pytest.raises(LoadError, match="header claims"):
        load(path)
    path.write_bytes(struct.pack("<Q", 5000) + b"{" + b" " * 100)
    with pytest.raises(LoadError, match="header claims 5000 bytes but the file has"):
        load(path)


def test_duplicate_keys_are_refused(tmp_path: Path) -> None:
    # Python's json keeps the last duplicate silently; the reference loader rejects them.
    text = b'{"a":{"dtype":"F32","shape":[1],"data_offsets":[0,4]},"a":{"dtype":"F32","shape":[1],"data_offsets":[0,4]}}'
    text += b" " * (-len(text) % 8)
    path = tmp_path / "dup.safetensors"
    path.write_bytes(struct.pack("<Q", len(text)) + text + b"\0" * 4)
    with pytest.raises(LoadError, match="duplicate"):
        load(path)


@pytest.mark.parametrize("content", [b"", b"\0" * 3, b"random bytes that are not a checkpoint" * 10])
def test_empty_and_random_files(tmp_path: Path, content: bytes) -> None:
    path = tmp_path / "model.safetensors"
    path.write_bytes(content)
    with pytest.raises(LoadError):
        load(path)


def _valid_bytes() -> bytes:
    rng = np.random.default_rng(1)
    return st_numpy.save(mlp_tensors(rng, (3, 4, 2)))


@settings(max_examples=150, deadline=2000, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_mutated_files_read_or_fail_cleanly(tmp_path: Path, data: st.DataObject) -> None:
    raw = bytearray(_valid_bytes())
    action = data.draw(st.sampled_from(["truncate", "flip", "splice"]))
    if action == "truncate":
        raw = raw[: data.draw(st.integers(0, len(raw) - 1))]
    elif action == "flip":
        for _ in range(data.draw(st.integers(1, 8))):
            raw[data.draw(st.integers(0, len(raw) - 1))] ^= 1 << data.draw(st.integers(0, 7))
    else:
        start = data.draw(st.integers(0, len(raw)))
        raw[start:start] = data.draw(st.binary(min_size=1, max_size=64))
    path = tmp_path / "fuzz.safetensors"
    path.write_bytes(bytes(raw))
    try:
        checkpoint = load(path)
        for tensor in checkpoint.tensors.values():
            tensor.read_float32()
    except LoadError:
        pass


def test_layout_file_overrides_orientation_activation_and_links(tmp_path: Path, rng: np.random.Generator) -> None:
    # A TF-style export stores dense kernels [in, out]; the user says so in a layout file.
    k1 = rng.normal(size=(6, 10)).astype(np.float32)
    k2 = rng.normal(size=(10, 3)).astype(np.float32)
    path = tmp_path / "tf.safetensors"
    st_numpy.save_file({"dense_a.weight": k1, "dense_b.weight": k2}, path)
    assert load(path).layer("dense_b").inputs_from == ()  # type: ignore[union-attr]
    (tmp_path / "tf.layout.toml").write_text(
        'orientation = "in-out"\n'
        '[[layer]]\nname = "dense_a"\nactivation = "relu"\n'
        '[[layer]]\nname = "dense_b"\ninputs-from = ["dense_a"]\nactivation = "softmax"\n'
    )
    checkpoint = load(path)
    first, second = checkpoint.layer("dense_a"), checkpoint.layer("dense_b")
    assert first is not None and second is not None
    assert (first.units, first.fan_in) == (10, 6) and first.activation.value == "relu"
    np.testing.assert_array_equal(first.matrix(), k1.T)
    assert second.inputs_from == ("dense_a",) and second.is_output
    (tmp_path / "tf.layout.toml").write_text('[[layer]]\nname = "nope"\n')
    with pytest.raises(LoadError, match="checkpoint lacks"):
        load(path)


@pytest.mark.parametrize(
    "shape", [(2**40, 0), (0, 2**40), (2**30, 0, 3, 3)], ids=["units", "inputs", "conv"]
)
def test_zero_element_weight_claiming_huge_dims_is_refused_by_the_unit_budget(
    tmp_path: Path, shape: tuple[int, ...]
) -> None:
    # The reference writer (safetensors.numpy.save_file) stores a zero-element tensor with
    # any dims; it holds no bytes, but a layer built on it would claim 2**30+ units or inputs.
    path = tmp_path / "zero.safetensors"
    st_numpy.save_file(
        {"fc.weight": np.zeros(shape, np.float32), "head.weight": np.ones((2, 2), np.float32)},
        str(path),
    )
    with pytest.raises(LoadError, match="unit budget"):
        load(path)


def test_zero_element_weight_within_the_unit_budget_still_loads(tmp_path: Path) -> None:
    # Reference writer: safetensors.numpy.save_file; a [16, 0] weight is an (empty) layer.
    path = tmp_path / "zero.safetensors"
    st_numpy.save_file({"fc.weight": np.zeros((16, 0), np.float32)}, str(path))
    layer = load(path).layers[0]
    assert (layer.units, layer.in_per_group) == (16, 0)
