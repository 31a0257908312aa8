"""NumPy .npz loader against numpy.load (the reference reader), never with pickle."""

from __future__ import annotations

import zipfile
from pathlib import Path

import ml_dtypes
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from steelyard.errors import LoadError
from steelyard.graph import Format
from steelyard.loaders import load
from tests.conftest import mlp_tensors


@pytest.mark.parametrize("compressed", [False, True])
def test_arrays_match_numpy_load(tmp_path: Path, rng: np.random.Generator, compressed: bool) -> None:
    tensors = mlp_tensors(rng)
    tensors["big_endian"] = np.arange(6, dtype=">f4").reshape(2, 3)
    tensors["fortran"] = np.asfortranarray(rng.normal(size=(3, 4)))
    tensors["nested/name.weight"] = rng.normal(size=(2, 2)).astype(np.float16)
    path = tmp_path / "m.npz"
    (np.savez_compressed if compressed else np.savez)(path, **tensors)
    checkpoint = load(path)
    assert checkpoint.format is Format.NPZ
    with np.load(path, allow_pickle=False) as reference:  # reference: numpy.load
        assert set(checkpoint.tensors) == set(reference.files)
        for name in reference.files:
            np.testing.assert_array_equal(checkpoint.tensors[name].read(), reference[name])
    assert checkpoint.layer("fc2").inputs_from == ("fc1",)  # type: ignore[union-attr]


def test_bf16_saved_as_void(tmp_path: Path, rng: np.random.Generator) -> None:
    values = rng.normal(size=(3, 3)).astype(ml_dtypes.bfloat16)
    path = tmp_path / "b.npz"
    np.savez(path, w=values)  # numpy stores bfloat16 as '<V2' (FORMATS.md)
    got = load(path).tensors["w"]
    assert got.dtype == "bf16"
    np.testing.assert_array_equal(got.read_float32(), values.astype(np.float32))  # reference: ml_dtypes


def test_object_arrays_are_refused(tmp_path: Path) -> None:
    path = tmp_path / "pickled.npz"
    np.savez(path, ok=np.zeros(2), bad=np.array([{"x": 1}], dtype=object))
    with pytest.raises(LoadError, match="pickle"):
        load(path)


def test_traversal_member_is_refused(tmp_path: Path) -> None:
    path = tmp_path / "evil.npz"
    buffer = tmp_path / "a.npy"
    np.save(buffer, np.zeros(2))
    with zipfile.ZipFile(path, "w") as archive:
        archive.write(buffer, "../escape.npy")
    with pytest.raises(LoadError, match="traversal"):
        load(path)


def test_member_size_must_match_header(tmp_path: Path) -> None:
    path = tmp_path / "short.npz"
    buffer = tmp_path / "a.npy"
    np.save(buffer, np.zeros(8, np.float32))
    raw = buffer.read_bytes()[:-8]
    with zipfile.ZipFile(path, "w") as archive:
        archive.writestr("a.npy", raw)
    with pytest.raises(LoadError, match="needs 32 bytes"):
        load(path)


@settings(max_examples=100, deadline=2000, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_mutated_archives_read_or_fail_cleanly(tmp_path: Path, data: st.DataObject) -> None:
    source = tmp_path / "src.npz"
    np.savez(source, **mlp_tensors(np.random.default_rng(2), (3, 4, 2)))
    raw = bytearray(source.read_bytes())
    if data.draw(st.booleans()):
        raw = raw[: data.draw(st.integers(1, len(raw) - 1))]
    else:
        for _ in range(data.draw(st.integers(1, 8))):
            raw[data.draw(st.integers(0, len(raw) - 1))] ^= 1 << data.draw(st.integers(0, 7))
    path = tmp_path / "fuzz.npz"
    path.write_bytes(bytes(raw))
    try:
        for tensor in load(path).tensors.values():
            tensor.read_float32()
    except LoadError:
        pass
