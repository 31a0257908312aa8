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


def test_object_arrays_are_skipped_with_a_note_and_never_unpickled(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    path = tmp_path / "pickled.npz"
    np.savez(path, ok=np.zeros(2), bad=np.array([{"x": 1}], dtype=object))
    import pickle

    def refuse(*_args: object, **_kwargs: object) -> None:
        raise AssertionError("pickle was used")

    monkeypatch.setattr(pickle, "loads", refuse)
    monkeypatch.setattr(pickle, "load", refuse)
    monkeypatch.setattr(pickle, "Unpickler", refuse)
    checkpoint = load(path)
    assert set(checkpoint.tensors) == {"ok"}
    (note,) = [n for n in checkpoint.notes if "bad" in n]
    assert "pickle" in note and "never loaded" in note


def test_non_tensor_arrays_are_skipped_and_named(tmp_path: Path, rng: np.random.Generator) -> None:
    """Arrays numpy itself writes for vocabularies, records and dates are no tensors: the
    file still loads, each one is named in the notes, booleans stay bookkeeping tensors."""
    path = tmp_path / "mixed.npz"
    weights = rng.normal(size=(4, 3)).astype(np.float32)
    np.savez(  # reference writer: numpy.savez
        path,
        **{
            "fc.weight": weights,
            "vocab": np.array(["<pad>", "hello", "world"]),  # dtype('<U5')
            "raw": np.array([b"ab", b"c"]),  # dtype('S2')
            "records": np.zeros(3, dtype=[("id", "<i4"), ("score", "<f4")]),
            "stamp": np.array(["2024-01-01"], dtype="datetime64[D]"),
            "use_bias": np.array(True),
            "mask": np.array([True, False, True]),
        },
    )
    with np.load(path, allow_pickle=False) as reference:  # reference: numpy.load
        assert reference["vocab"].dtype.kind == "U" and reference["records"].dtype.names
    checkpoint = load(path)
    assert set(checkpoint.tensors) == {"fc.weight", "use_bias", "mask"}
    assert [t.name for t in checkpoint.counted] == ["fc.weight"]
    np.testing.assert_array_equal(checkpoint.tensors["fc.weight"].read(), weights)
    (note,) = [n for n in checkpoint.notes if n.startswith("skipped")]
    for name, why in (("vocab", "text"), ("raw", "bytes"), ("records", "structured"), ("stamp", "dates")):
        assert f"{name} (" in note and why in note.split(f"{name} (", 1)[1].split(")")[0]
    assert [layer.name for layer in checkpoint.layers] == ["fc"]


def test_plain_numpy_suffix_names_become_layers(tmp_path: Path, rng: np.random.Generator) -> None:
    """``fc_w``/``fc_b``, ``conv1_weight``/``conv1_bias`` and ``norm_w`` as hand-written
    NumPy code saves them (common practice, no source) become layers like ``fc.weight``."""
    path = tmp_path / "plain.npz"
    arrays = {
        "conv1_weight": rng.normal(size=(4, 2, 3)).astype(np.float32),
        "conv1_bias": rng.normal(size=4).astype(np.float32),
        "fc1_w": rng.normal(size=(6, 8)).astype(np.float32),
        "fc1_b": rng.normal(size=6).astype(np.float32),
        "fc2_W": rng.normal(size=(3, 6)).astype(np.float32),
        "fc2_b": rng.normal(size=3).astype(np.float32),
        "emb_w": rng.normal(size=(10, 5)).astype(np.float32),
    }
    np.savez(path, **arrays)
    checkpoint = load(path)
    layers = {layer.name: layer for layer in checkpoint.layers}
    assert set(layers) == {"conv1", "fc1", "fc2", "emb"}
    assert layers["fc1"].bias == "fc1_b" and layers["fc2"].inputs_from == ("fc1",)
    assert layers["conv1"].kernel == (3,) and layers["emb"].kind.value == "embedding"
    np.testing.assert_array_equal(layers["fc2"].weight_view(), arrays["fc2_W"])
    covered = {n for layer in checkpoint.layers for n in layer.tensor_names}
    assert covered == set(arrays)


@pytest.mark.parametrize("transposed", [False, True])
@pytest.mark.parametrize(("cell", "gates"), [("lstm", "ifgo"), ("gru", "rzn"), ("rnn", "h")])
def test_plain_numpy_recurrent_weights_split_per_gate(
    tmp_path: Path, rng: np.random.Generator, cell: str, gates: str, transposed: bool
) -> None:
    """``*_w_ih``/``*_w_hh``/``*_b_ih``/``*_b_hh``: gates stacked as PyTorch stacks them
    (LSTM i,f,g,o; GRU r,z,n: https://pytorch.org/docs/stable/generated/torch.nn.LSTM.html,
    torch.nn.GRU), either ``[G·H, in]`` or transposed ``[in, G·H]``; plus ``fc_w``/``fc_b``."""
    hidden, fan = 5, 7
    count = len(gates)
    w_ih = rng.normal(size=(count * hidden, fan)).astype(np.float32)
    w_hh = rng.normal(size=(count * hidden, hidden)).astype(np.float32)
    b_ih = rng.normal(size=count * hidden).astype(np.float32)
    arrays = {
        f"enc_{cell}_w_ih": w_ih.T.copy() if transposed else w_ih,
        f"enc_{cell}_w_hh": w_hh.T.copy() if transposed else w_hh,
        f"enc_{cell}_b_ih": b_ih,
        f"enc_{cell}_b_hh": rng.normal(size=count * hidden).astype(np.float32),
        "fc_w": rng.normal(size=(2, hidden)).astype(np.float32),
        "fc_b": rng.normal(size=2).astype(np.float32),
    }
    path = tmp_path / "rnn.npz"
    np.savez(path, **arrays)
    checkpoint = load(path)
    recurrent = [layer for layer in checkpoint.layers if layer.gate is not None]
    assert len(recurrent) == 2 * count
    for index, gate in enumerate(gates):
        rows = slice(index * hidden, (index + 1) * hidden)
        (ih,) = [x for x in recurrent if x.weight == f"enc_{cell}_w_ih" and x.gate == gate]
        (hh,) = [x for x in recurrent if x.weight == f"enc_{cell}_w_hh" and x.gate == gate]
        np.testing.assert_array_equal(ih.weight_view(), w_ih[rows])
        np.testing.assert_array_equal(hh.weight_view(), w_hh[rows])
        assert (ih.units, ih.in_per_group) == (hidden, fan)
        np.testing.assert_array_equal(ih.bias_view(), b_ih[rows])  # type: ignore[misc]
    covered = {n for layer in checkpoint.layers for n in layer.tensor_names}
    assert covered == set(arrays)


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


# --------------------------------------------------------------------------------------------
# Budgets on compressed members


def test_compressed_member_is_inflated_once_per_run(
    tmp_path: Path, rng: np.random.Generator, monkeypatch: pytest.MonkeyPatch
) -> None:
    from steelyard.loaders import base

    values = rng.normal(size=(64, 32)).astype(np.float32)
    path = tmp_path / "c.npz"
    np.savez_compressed(path, w=values)
    calls: list[str] = []
    original = base.inflate_member

    def counting(source: Path, info: zipfile.ZipInfo, target: Path) -> None:
        calls.append(info.filename)
        original(source, info, target)

    monkeypatch.setattr(base, "inflate_member", counting)
    tensor = load(path).tensors["w"]
    for _ in range(3):
        np.testing.assert_array_equal(tensor.read(), values)  # reference: the saved array
    again = load(path).tensors["w"]  # a second load in the same run reuses the inflated copy
    np.testing.assert_array_equal(again.read(), values)
    assert calls == ["w.npy"]


def test_compressed_member_beyond_expansion_budget_is_refused_before_inflating(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    from steelyard import budget
    from steelyard.loaders import base

    path = tmp_path / "z.npz"
    np.savez_compressed(path, w=np.zeros((1024, 1024), dtype=np.float32))  # 4 MiB of zeros
    monkeypatch.setattr(base, "inflate_member", None)  # any inflation would crash the test
    with budget.using(budget.Budget(expansion_bytes=2**20)), pytest.raises(LoadError) as info:
        load(path)
    assert "'w.npy'" in str(info.value) and "expansion budget" in str(info.value)


def test_members_beyond_checkpoint_budget_together_are_refused(tmp_path: Path) -> None:
    from steelyard import budget

    path = tmp_path / "many.npz"
    np.savez_compressed(path, **{f"w{i}": np.zeros((512, 1024), np.float32) for i in range(4)})
    # Each member adds ~2 MiB; four of them exceed a 6 MiB checkpoint budget.
    limits = budget.Budget(expansion_bytes=4 * 2**20, checkpoint_expansion_bytes=6 * 2**20)
    with budget.using(limits), pytest.raises(LoadError) as info:
        load(path)
    assert "this checkpoint" in str(info.value)


def test_memory_error_while_reading_is_one_load_error(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    path = tmp_path / "m.npz"
    np.savez(path, w=np.ones((4, 4), np.float32))
    tensor = load(path).tensors["w"]

    def exhausted(*args: object, **kwargs: object) -> np.ndarray:
        raise MemoryError

    monkeypatch.setattr(np, "frombuffer", exhausted)
    with pytest.raises(LoadError) as info:
        tensor.read()
    assert "too large to read" in str(info.value) and "\n" not in str(info.value)
