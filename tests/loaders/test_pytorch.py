"""PyTorch loader against files written by real torch, and against hostile pickles.

The expected arrays in ``fixtures/real/torch/*.npz`` are what ``torch.load`` /
``torch.jit.load`` returned when ``fixtures/gen_torch_real.py`` wrote the files (torch 2.13),
so torch itself is the reference and is not needed here. Hostile files are written with raw
pickle opcodes (``pickletools`` documents each one) inside otherwise valid zip archives.
"""

from __future__ import annotations

import json
import math
import os
import pickle
import struct
import sys
import zipfile
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import ml_dtypes
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from steelyard.errors import LoadError
from steelyard.graph import Checkpoint, Format, TensorRole
from steelyard.loaders import load, sniff_format
from steelyard.loaders.pytorch.loader import PytorchLoader
from tests.conftest import FIXTURES

TORCH = FIXTURES / "real" / "torch"
EXPECTED: dict[str, Any] = json.loads((TORCH / "expected.json").read_text())
SCRIPTED: dict[str, Any] = EXPECTED["torchscript"]
#: Every real file by stem, whatever its ending, except archives with no module state at all.
REAL = {
    p.stem: p
    for pattern in ("*.pt", "*.jit", "*.ts")
    for p in sorted(TORCH.glob(pattern))
    if SCRIPTED.get(p.stem, {"state_dict": [""]})["state_dict"]
}


def _expected(stem: str) -> dict[str, np.ndarray]:
    with np.load(TORCH / f"{stem}.npz") as data:
        return {k: data[k] for k in data.files}


# --------------------------------------------------------------------------- real torch files


@pytest.mark.parametrize("stem", sorted(REAL))
def test_tensors_equal_what_torch_loaded(stem: str) -> None:
    checkpoint = load(REAL[stem])
    expected = _expected(stem)  # reference: torch.load / torch.jit.load at generation time
    names = {k for k in expected if not k.startswith("bits/")}
    assert checkpoint.format is Format.PYTORCH
    assert set(checkpoint.tensors) == names
    for name in names:
        tensor = checkpoint.tensors[name]
        assert tensor.shape == expected[name].shape
        np.testing.assert_array_equal(tensor.read_float32(), expected[name].astype(np.float32))


def test_dtypes_and_counts_match_torch() -> None:
    checkpoint = load(TORCH / "cnn_bn_state_dict.pt")
    expected = _expected("cnn_bn_state_dict")
    for name, array in expected.items():
        assert checkpoint.tensors[name].read().dtype == array.dtype  # reference: torch dtypes
    # num_batches_tracked is int64 bookkeeping; every float tensor is a parameter.
    assert checkpoint.tensors["bn1.num_batches_tracked"].role is TensorRole.BOOKKEEPING
    floats = sum(a.size for a in expected.values() if a.dtype.kind == "f")
    assert checkpoint.parameters == floats


def test_bf16_matches_torch_bits_and_ml_dtypes_cast() -> None:
    checkpoint = load(TORCH / "mlp_bf16.pt")
    expected = _expected("mlp_bf16")
    for name, tensor in checkpoint.tensors.items():
        array = tensor.read()
        assert tensor.dtype == "bf16" and array.dtype == np.dtype(ml_dtypes.bfloat16)
        # reference: torch's own bf16 bits (tensor.view(torch.int16)) ...
        np.testing.assert_array_equal(array.view(np.int16), expected[f"bits/{name}"])
        # ... and ml_dtypes' rounding of the float32 master copy agrees with them.
        master = _expected("mlp_state_dict")[name]
        np.testing.assert_array_equal(
            array.view(np.uint16), master.astype(ml_dtypes.bfloat16).view(np.uint16)
        )


def test_fp16_and_fp8_match_numpy_and_ml_dtypes() -> None:
    half = load(TORCH / "mlp_fp16.pt")
    master = _expected("mlp_state_dict")
    for name, tensor in half.tensors.items():
        # reference: numpy float16 rounding of the float32 copy (IEEE round-to-nearest-even)
        np.testing.assert_array_equal(tensor.read(), master[name].astype(np.float16))
    fp8 = load(TORCH / "fp8_mixed.pt")
    bits = _expected("fp8_mixed")
    assert fp8.tensors["e4m3"].read().dtype == np.dtype(ml_dtypes.float8_e4m3fn)
    assert fp8.tensors["e5m2"].read().dtype == np.dtype(ml_dtypes.float8_e5m2)
    for name in ("e4m3", "e5m2"):
        # reference: torch's raw fp8 bytes (tensor.view(torch.uint8))
        np.testing.assert_array_equal(fp8.tensors[name].read().view(np.uint8), bits[f"bits/{name}"])
    assert fp8.tensors["u16"].read().tolist() == [1, 2, 60000]


def test_views_and_shared_storages() -> None:
    checkpoint = load(TORCH / "views_shared.pt")
    expected = _expected("views_shared")
    facts = EXPECTED["views_shared"]
    assert facts["base_t_contiguous"] is False  # torch said the transpose is not contiguous
    base_t = checkpoint.tensors["base_t"].read()
    assert not base_t.flags.c_contiguous
    np.testing.assert_array_equal(base_t, expected["base"].T)  # reference: numpy transpose
    np.testing.assert_array_equal(checkpoint.tensors["row"].read(), expected["base"][1])
    np.testing.assert_array_equal(checkpoint.tensors["col"].read(), expected["base"][:, 2])
    np.testing.assert_array_equal(
        checkpoint.tensors["emb.weight"].read(), checkpoint.tensors["head.weight"].read()
    )
    # Stored tensors are read-only to the rules (a contiguous one is read by a positioned
    # read into a fresh array, a view of a storage through the map).
    assert not checkpoint.tensors["base"].read().flags.writeable


def test_legacy_format_matches_torch() -> None:
    legacy = load(TORCH / "legacy_mlp.pt")
    assert PytorchLoader().sniff(
        TORCH / "legacy_mlp.pt", (TORCH / "legacy_mlp.pt").read_bytes()[:64]
    )
    zipped = load(TORCH / "mlp_state_dict.pt")
    assert list(legacy.tensors) == list(zipped.tensors)
    for name, tensor in legacy.tensors.items():
        np.testing.assert_array_equal(tensor.read(), zipped.tensors[name].read())


def test_torchscript_names_and_notes() -> None:
    checkpoint = load(TORCH / "ts_cnn.pt")
    expected = _expected("ts_cnn")  # reference: torch.jit.load(...).state_dict()
    assert list(checkpoint.tensors) == list(expected)
    assert any("TorchScript" in note for note in checkpoint.notes)


@pytest.mark.parametrize("stem", ["ts_cnn", "ts_traced_consts", "ts_buffers", "ts_recurrent"])
def test_torchscript_counts_equal_torchs_state_dict(stem: str) -> None:
    checkpoint = load(REAL[stem])
    if stem == "ts_cnn":  # written before the counts were recorded: count torch's npz
        expected = _expected(stem)
        names = list(expected)
        floats = sum(a.size for a in expected.values() if a.dtype.kind == "f")
    else:
        # reference: torch.jit.load(path).state_dict() at generation time, and
        # sum(p.numel() for p in state_dict().values() if p.dtype.is_floating_point)
        names, floats = SCRIPTED[stem]["state_dict"], SCRIPTED[stem]["state_dict_floats"]
    assert list(checkpoint.tensors) == names
    assert checkpoint.parameters == floats


def test_torchscript_code_constants_and_plain_attributes_are_not_state() -> None:
    traced = load(REAL["ts_traced_consts"])
    facts = SCRIPTED["ts_traced_consts"]
    assert facts["constants"] == 1  # torch's code_with_constants: CONSTANTS.c0
    assert not any(name.startswith("CONSTANTS") for name in traced.tensors)
    count = facts["constants"]
    values = facts["constant_tensor_elements"]
    assert any(f"{count} tensor ({values} values) in constants.pkl" in n for n in traced.notes)
    # A tensor set as a plain attribute is stored in the archive but is not module state.
    buffers = load(REAL["ts_buffers"])
    assert "plain" not in buffers.tensors
    assert any("'plain'" in note and "not counted" in note for note in buffers.notes)
    # The non-persistent buffer is state for TorchScript (it keeps no persistence flag), so
    # torch's count of the loaded module exceeds the eager module's by exactly its size.
    scripted = SCRIPTED["ts_buffers"]
    assert scripted["state_dict_floats"] - scripted["eager_state_dict_floats"] == 6
    assert buffers.tensors["scratch"].shape == (6,)
    assert buffers.tensors["steps"].role is TensorRole.BOOKKEEPING  # an int64 buffer
    # The LSTM's list of flat weights repeats its parameters and adds nothing.
    recurrent = load(REAL["ts_recurrent"])
    assert not any("_flat_weights" in name for name in recurrent.tensors)


def test_frozen_torchscript_is_an_input_error_naming_its_constants() -> None:
    facts = SCRIPTED["ts_frozen"]
    assert facts["state_dict"] == []  # torch.jit.freeze moved every weight into the code
    count, values = facts["constants"], facts["constant_tensor_elements"]
    _refused(TORCH / facts["file"], f"{count} constants of its code ({values} values)", "freez")


@pytest.mark.parametrize("ending", [".pt", ".jit", ".ts", ".bin", ""])
@pytest.mark.parametrize("stem", ["ts_cnn", "ts_traced_consts", "ts_buffers"])
def test_torchscript_recognised_by_content_whatever_the_ending(
    tmp_path: Path, stem: str, ending: str
) -> None:
    copy = tmp_path / f"model{ending}"
    copy.write_bytes(REAL[stem].read_bytes())
    assert sniff_format(copy) == Format.PYTORCH.value
    original, renamed = load(REAL[stem]), load(copy)
    assert list(renamed.tensors) == list(original.tensors)
    assert renamed.parameters == original.parameters


def test_torchscript_code_is_never_run(tmp_path: Path) -> None:
    canary = tmp_path / "canary"
    module = Raw(
        _global("__torch__.m", "Net") + b")\x81" + _emit({"w": T("0", 1, (1,), (1,))}) + b"b"
    )
    code = (
        f"import os\nos.system('touch {canary}')\n"
        'class Net(Module):\n  __parameters__ = ["w", ]\n'
        "  def forward(self: __torch__.m.Net, x: Tensor) -> Tensor:\n"
        f"    return torch.add(x, os.system('touch {canary}'))\n"
    ).encode()
    path = _archive(
        tmp_path / "run_me.ts",
        _pickle(module),
        {"0": _floats(np.ones(1))},
        extra={"archive/code/__torch__/m.py": code, "archive/constants.pkl": _pickle(())},
    )
    checkpoint = load(path)
    assert list(checkpoint.tensors) == ["w"] and checkpoint.parameters == 1
    assert not canary.exists()


def test_protocol_4_file_with_parameter_and_plain_values() -> None:
    import pickletools

    path = TORCH / "protocol4_extras.pt"
    with zipfile.ZipFile(path) as archive:
        opcodes = {
            op.name for op, _, _ in pickletools.genops(archive.read("protocol4_extras/data.pkl"))
        }
    assert "STACK_GLOBAL" in opcodes  # reference: pickletools' reading of torch's output
    checkpoint = load(path)
    assert set(checkpoint.tensors) == {"param", "double", "flag"}
    assert checkpoint.tensors["flag"].read().dtype == np.bool_
    assert any("non-tensor" in note for note in checkpoint.notes)


def test_layers_from_pytorch_names() -> None:
    cnn = load(TORCH / "cnn_bn_state_dict.pt")
    # PyTorch naming habits (common practice, no source): bn1 follows conv1, and in a
    # Sequential the BatchNorm is the next index.
    conv1, block = cnn.layer("conv1"), cnn.layer("features.0")
    assert conv1 is not None and conv1.norm is not None and conv1.norm.scale == "bn1.weight"
    assert block is not None and block.norm is not None
    assert block.norm.mean == "features.1.running_mean"
    mlp = load(TORCH / "mlp_state_dict.pt")
    second = mlp.layer("net.2")
    assert second is not None and second.inputs_from == ("net.0",)
    expected = _expected("mlp_state_dict")
    np.testing.assert_array_equal(second.matrix(), expected["net.2.weight"])


# --------------------------------------------------------------------------- optimizer state


def _check_slots(checkpoint: Checkpoint, stem: str, first: str, second: str | None) -> None:
    optimizer = checkpoint.optimizer
    assert optimizer is not None
    with np.load(TORCH / f"{stem}.optim.npz") as data:
        # reference: torch's optimizer.state[param] for each named parameter (by object).
        expected = {k: data[k] for k in data.files}
    assert set(optimizer.slots) == set(EXPECTED[stem]["names"])
    for name, slots in optimizer.slots.items():
        assert slots.first_moment is not None
        assert slots.first_moment.role is TensorRole.OPTIMIZER
        np.testing.assert_array_equal(slots.first_moment.read(), expected[f"{first}/{name}"])
        if second is None:
            assert slots.second_moment is None
        else:
            assert slots.second_moment is not None
            np.testing.assert_array_equal(slots.second_moment.read(), expected[f"{second}/{name}"])
    for tensor in checkpoint.tensors.values():
        assert tensor.role is not TensorRole.OPTIMIZER


def test_adam_checkpoint() -> None:
    checkpoint = load(TORCH / "train_adam.pt")
    facts = EXPECTED["train_adam"]
    optimizer = checkpoint.optimizer
    assert optimizer is not None
    _check_slots(checkpoint, "train_adam", "exp_avg", "exp_avg_sq")
    # torch 2.13 Adam groups carry decoupled_weight_decay=False (recorded at generation).
    assert facts["has_decoupled_weight_decay_key"] and facts["decoupled_weight_decay"] is False
    assert optimizer.kind == "adam" and optimizer.decoupled is False
    assert (optimizer.beta1, optimizer.beta2) == tuple(facts["betas"])
    assert optimizer.eps == facts["eps"]
    assert optimizer.weight_decay == facts["weight_decays"][0]
    assert optimizer.step == facts["step"]
    assert optimizer.source == "optimizer in train_adam.pt"
    assert any("'model'" in note for note in checkpoint.notes)
    # Optimizer tensors are not counted: the count is the state dict's float tensors.
    expected = _expected("train_adam")
    assert checkpoint.parameters == sum(a.size for a in expected.values() if a.dtype.kind == "f")


def test_adamw_with_param_names_groups_and_prefix() -> None:
    checkpoint = load(TORCH / "train_adamw_named.pt")
    facts = EXPECTED["train_adamw_named"]
    optimizer = checkpoint.optimizer
    assert optimizer is not None
    assert facts["has_param_names"] and facts["decoupled_weight_decay"] is True
    _check_slots(checkpoint, "train_adamw_named", "exp_avg", "exp_avg_sq")
    assert optimizer.kind == "adamw" and optimizer.decoupled is True
    assert optimizer.weight_decay == max(facts["weight_decays"])
    assert optimizer.step == facts["step"]
    assert all(not name.startswith("module.") for name in checkpoint.tensors)
    assert any("module." in note for note in checkpoint.notes)


def test_sgd_momentum_checkpoint() -> None:
    checkpoint = load(TORCH / "train_sgd.pt")
    facts = EXPECTED["train_sgd"]
    optimizer = checkpoint.optimizer
    assert optimizer is not None
    _check_slots(checkpoint, "train_sgd", "momentum_buffer", None)
    assert optimizer.kind == "sgd" and optimizer.decoupled is False
    assert optimizer.beta1 == facts["momentum"] and optimizer.step is None
    assert optimizer.weight_decay == facts["weight_decays"][0]


# --------------------------------------------------------------------------- crafted pickles


@dataclass(frozen=True)
class G:
    """A global called with arguments (GLOBAL + args + REDUCE)."""

    module: str
    name: str
    args: tuple[Any, ...] = ()


@dataclass(frozen=True)
class T:
    """A tensor over storage ``key``: ``_rebuild_tensor_v2`` with a storage persistent id."""

    key: str
    numel: int
    size: tuple[int, ...]
    stride: tuple[int, ...]
    offset: int = 0
    storage: str = "FloatStorage"


@dataclass(frozen=True)
class Raw:
    """Opcodes inserted as they are."""

    data: bytes


def _str(text: str) -> bytes:
    raw = text.encode()
    return b"X" + struct.pack("<I", len(raw)) + raw  # BINUNICODE


def _global(module: str, name: str) -> bytes:
    return b"c" + module.encode() + b"\n" + name.encode() + b"\n"  # GLOBAL


def _emit(obj: Any) -> bytes:
    """Protocol-2 opcodes for plain data plus the markers above (see pickletools)."""
    if isinstance(obj, Raw):
        return obj.data
    if obj is None:
        return b"N"
    if obj is True or obj is False:
        return b"\x88" if obj else b"\x89"  # NEWTRUE / NEWFALSE
    if isinstance(obj, int):
        return b"J" + struct.pack("<i", obj)  # BININT
    if isinstance(obj, float):
        return b"G" + struct.pack(">d", obj)  # BINFLOAT
    if isinstance(obj, str):
        return _str(obj)
    if isinstance(obj, tuple):
        return b"(" + b"".join(_emit(v) for v in obj) + b"t"  # MARK ... TUPLE
    if isinstance(obj, list):
        return b"](" + b"".join(_emit(v) for v in obj) + b"e"  # EMPTY_LIST MARK ... APPENDS
    if isinstance(obj, dict):
        items = b"".join(_emit(k) + _emit(v) for k, v in obj.items())
        return b"}(" + items + b"u"  # EMPTY_DICT MARK ... SETITEMS
    if isinstance(obj, G):
        return _global(obj.module, obj.name) + _emit(obj.args) + b"R"  # REDUCE
    if isinstance(obj, T):
        pid = _emit(("storage", Raw(_global("torch", obj.storage)), obj.key, "cpu", obj.numel))
        args = (
            Raw(pid + b"Q"),
            obj.offset,
            obj.size,
            obj.stride,
            False,
            G("collections", "OrderedDict"),
        )
        return _global("torch._utils", "_rebuild_tensor_v2") + _emit(args) + b"R"
    raise TypeError(obj)


def _pickle(obj: Any) -> bytes:
    return b"\x80\x02" + _emit(obj) + b"."


def _archive(
    path: Path,
    data_pkl: bytes,
    storages: dict[str, bytes] | None = None,
    extra: dict[str, bytes] | None = None,
    byteorder: bytes = b"little",
    compress: int = zipfile.ZIP_STORED,
) -> Path:
    with zipfile.ZipFile(path, "w", compression=compress) as archive:
        archive.writestr("archive/data.pkl", data_pkl)
        archive.writestr("archive/byteorder", byteorder)
        for key, blob in (storages or {}).items():
            archive.writestr(f"archive/data/{key}", blob)
        for name, blob in (extra or {}).items():
            archive.writestr(name, blob)
        archive.writestr("archive/version", b"3\n")
    return path


def _floats(values: np.ndarray) -> bytes:
    return np.asarray(values, dtype="<f4").tobytes()


def test_crafted_state_dict_reads_back(tmp_path: Path) -> None:
    weights = np.arange(6, dtype=np.float32).reshape(2, 3)
    blob = pickle.dumps(b"abc", protocol=2)[2:-1]  # bytes pickle as _codecs.encode(...)
    data = _pickle(
        {
            "w": T("0", 6, (2, 3), (3, 1)),
            "w_t": T("0", 6, (3, 2), (1, 3)),
            "tail": T("0", 6, (2,), (1,), offset=4),
            "blob": Raw(blob),
        }
    )
    path = _archive(tmp_path / "ok.pt", data, {"0": _floats(weights)})
    checkpoint = load(path)
    # reference: numpy's own layout of the same bytes
    np.testing.assert_array_equal(checkpoint.tensors["w"].read(), weights)
    np.testing.assert_array_equal(checkpoint.tensors["w_t"].read(), weights.T)
    np.testing.assert_array_equal(checkpoint.tensors["tail"].read(), weights.ravel()[4:])
    assert "blob" not in checkpoint.tensors


def test_big_endian_byteorder_record(tmp_path: Path) -> None:
    values = np.array([1.5, -2.25, 3.0], dtype=np.float32)
    data = _pickle({"w": T("0", 3, (3,), (1,))})
    path = _archive(
        tmp_path / "be.pt", data, {"0": values.astype(">f4").tobytes()}, byteorder=b"big"
    )
    # reference: numpy's big-endian encoding of the same values
    np.testing.assert_array_equal(load(path).tensors["w"].read(), values)


def test_deflated_members_are_read(tmp_path: Path) -> None:
    source = TORCH / "mlp_state_dict.pt"
    target = tmp_path / "deflated.pt"
    with zipfile.ZipFile(source) as src, zipfile.ZipFile(target, "w", zipfile.ZIP_DEFLATED) as dst:
        for info in src.infolist():
            dst.writestr(info.filename, src.read(info))
    expected = _expected("mlp_state_dict")
    checkpoint = load(target)
    for name, tensor in checkpoint.tensors.items():
        np.testing.assert_array_equal(tensor.read(), expected[name])


def _refused(path: Path, *needles: str) -> LoadError:
    with pytest.raises(LoadError) as caught:
        load(path)
    message = str(caught.value)
    assert str(path) in message and "\n" not in message
    for needle in needles:
        assert needle in message
    return caught.value


def test_storage_size_disagreeing_with_record(tmp_path: Path) -> None:
    data = _pickle({"w": T("0", 6, (2, 3), (3, 1))})
    path = _archive(tmp_path / "short.pt", data, {"0": _floats(np.zeros(5))})
    _refused(path, "storage '0'", "20 bytes")


def test_missing_storage_record(tmp_path: Path) -> None:
    data = _pickle({"w": T("7", 6, (2, 3), (3, 1))})
    path = _archive(tmp_path / "missing.pt", data, {"0": _floats(np.zeros(6))})
    _refused(path, "'7'")


@pytest.mark.parametrize(
    ("size", "stride", "offset"),
    [((2, 3), (3, 2), 0), ((2, 3), (3, 1), 1), ((7,), (1,), 0), ((2,), (1,), 9)],
)
def test_strides_out_of_bounds(
    tmp_path: Path, size: tuple[int, ...], stride: tuple[int, ...], offset: int
) -> None:
    data = _pickle({"w": T("0", 6, size, stride, offset=offset)})
    path = _archive(tmp_path / "oob.pt", data, {"0": _floats(np.zeros(6))})
    last = offset + sum((s - 1) * st for s, st in zip(size, stride, strict=True))
    assert last >= 6  # the claim really does reach past the storage
    _refused(path, "storage holds 6")


@pytest.mark.parametrize("name", ["../evil.txt", "/abs/evil.txt", "archive/data/../../x"])
def test_traversal_member_names(tmp_path: Path, name: str) -> None:
    data = _pickle({"w": T("0", 1, (1,), (1,))})
    path = _archive(tmp_path / "trav.pt", data, {"0": _floats(np.zeros(1))}, extra={name: b"x"})
    _refused(path, "path-traversal")


def test_two_records_are_refused(tmp_path: Path) -> None:
    data = _pickle({"w": T("0", 1, (1,), (1,))})
    path = _archive(
        tmp_path / "two.pt", data, {"0": _floats(np.zeros(1))}, extra={"other/data.pkl": data}
    )
    _refused(path, "2 PyTorch records")


def test_plain_zip_is_not_claimed(tmp_path: Path) -> None:
    path = tmp_path / "plain.zip"
    with zipfile.ZipFile(path, "w") as archive:
        archive.writestr("notes/readme.txt", b"hello")
    assert not PytorchLoader().sniff(path, path.read_bytes()[:64])


def _optimizer(shapes: list[tuple[int, ...]], params: list[int]) -> dict[str, Any]:
    state = {}
    for index, shape in enumerate(shapes):
        numel = math.prod(shape)
        stride = tuple(math.prod(shape[i + 1 :]) for i in range(len(shape)))
        state[index] = {
            "step": 2.0,
            "exp_avg": T(f"m{index}", numel, shape, stride),
            "exp_avg_sq": T(f"v{index}", numel, shape, stride),
        }
    group = {"lr": 0.001, "betas": (0.9, 0.999), "eps": 1e-8, "weight_decay": 0.0, "params": params}
    return {"state": state, "param_groups": [group]}


def _training_file(tmp_path: Path, shapes: list[tuple[int, ...]], params: list[int]) -> Path:
    model = {"fc.weight": T("0", 6, (2, 3), (3, 1)), "fc.bias": T("1", 2, (2,), (1,))}
    storages = {"0": _floats(np.ones(6)), "1": _floats(np.ones(2))}
    for index, shape in enumerate(shapes):
        storages[f"m{index}"] = storages[f"v{index}"] = _floats(np.ones(math.prod(shape)))
    data = _pickle({"model": model, "optimizer": _optimizer(shapes, params), "epoch": 1})
    return _archive(tmp_path / "train.pt", data, storages)


def test_crafted_optimizer_maps_by_order(tmp_path: Path) -> None:
    checkpoint = load(_training_file(tmp_path, [(2, 3), (2,)], [0, 1]))
    assert checkpoint.optimizer is not None
    assert list(checkpoint.optimizer.slots) == ["fc.weight", "fc.bias"]
    assert checkpoint.optimizer.decoupled is None  # no decoupled_weight_decay key: unknown


@pytest.mark.parametrize(
    ("shapes", "params"),
    [([(2,), (2, 3)], [0, 1]), ([(2, 3), (2,), (4,)], [0, 1, 2]), ([(2, 3)], [0])],
)
def test_ambiguous_optimizer_is_not_guessed(
    tmp_path: Path, shapes: list[tuple[int, ...]], params: list[int]
) -> None:
    checkpoint = load(_training_file(tmp_path, shapes, params))
    assert checkpoint.optimizer is None
    assert any("unambiguously" in note for note in checkpoint.notes)
    assert set(checkpoint.tensors) == {"fc.weight", "fc.bias"}


def test_tied_weights_count_once_for_the_optimizer(tmp_path: Path) -> None:
    # named_parameters() lists a tied parameter once (torch convention), the state dict twice.
    model = {"emb.weight": T("0", 6, (2, 3), (3, 1)), "head.weight": T("0", 6, (2, 3), (3, 1))}
    optimizer = _optimizer([(2, 3)], [0])
    storages = {"0": _floats(np.ones(6)), "m0": _floats(np.ones(6)), "v0": _floats(np.ones(6))}
    path = _archive(
        tmp_path / "tied.pt", _pickle({"model": model, "optimizer": optimizer}), storages
    )
    checkpoint = load(path)
    assert checkpoint.optimizer is not None
    assert list(checkpoint.optimizer.slots) == ["emb.weight"]


def test_lightning_style_optimizer_list_and_nested_parts(tmp_path: Path) -> None:
    model = {"fc.weight": T("0", 6, (2, 3), (3, 1)), "fc.bias": T("1", 2, (2,), (1,))}
    storages = {"0": _floats(np.ones(6)), "1": _floats(np.ones(2))}
    for key in ("m0", "v0"):
        storages[key] = _floats(np.full(6, 0.5))
    for key in ("m1", "v1"):
        storages[key] = _floats(np.full(2, 0.5))
    data = _pickle({"state_dict": model, "optimizer_states": [_optimizer([(2, 3), (2,)], [0, 1])]})
    checkpoint = load(_archive(tmp_path / "pl.pt", data, storages))
    assert checkpoint.optimizer is not None
    assert checkpoint.optimizer.source == "optimizer_states in pl.pt"
    slots = checkpoint.optimizer.slots["fc.bias"]
    assert slots.second_moment is not None
    np.testing.assert_array_equal(slots.second_moment.read(), np.full(2, 0.5, np.float32))
    # No known key: every state dict entry is gathered, named by its entry.
    parts = _pickle(
        {"encoder": {"w": T("0", 6, (6,), (1,))}, "decoder": {"w": T("1", 2, (2,), (1,))}}
    )
    gathered = load(_archive(tmp_path / "parts.pt", parts, storages))
    assert set(gathered.tensors) == {"encoder.w", "decoder.w"}
    assert any("gathered" in note for note in gathered.notes)


def test_pre_04_tar_checkpoint_is_refused_clearly(tmp_path: Path) -> None:
    import tarfile

    path = tmp_path / "old.pt"
    with tarfile.open(path, "w", format=tarfile.USTAR_FORMAT) as archive:
        for name in ("sys_info", "pickle", "storages", "tensors"):
            info = tarfile.TarInfo(name)
            info.size = 0
            archive.addfile(info)
    _refused(path, "pre-0.4", "torch.save(obj, path)")


# --------------------------------------------------------------------------- hostile pickles


def _short(text: str) -> bytes:
    raw = text.encode()
    return b"\x8c" + bytes([len(raw)]) + raw  # SHORT_BINUNICODE


def _payloads(canary: Path) -> dict[str, bytes]:
    command = f"touch {canary}"

    class Evil:
        def __reduce__(self) -> tuple[Any, ...]:
            return (os.system, (command,))

    code = f"open({str(canary)!r}, 'w').close()"
    return {
        "global-os-system": _pickle(G("os", "system", (command,))),
        "stack-global-os-system": b"\x80\x04"
        + _short("os")
        + _short("system")
        + b"\x93"
        + _short(command)
        + b"\x85R.",
        "builtins-eval": _pickle(G("builtins", "eval", (code,))),
        "builtins-exec-py2-name": _pickle(G("__builtin__", "exec", (code,))),
        "subprocess-popen": _pickle(G("subprocess", "Popen", (["touch", str(canary)],))),
        "posix-system": _pickle(G("posix", "system", (command,))),
        "reduce-object-in-state-dict": pickle.dumps({"w": Evil()}, protocol=2),
        "attribute-walk": _pickle(G("torch._utils", "_rebuild_tensor_v2.__globals__", ())),
        "torchscript-class-outside-torchscript": _pickle(G("__torch__.m", "Evil", ())),
        "getattr": _pickle(G("builtins", "getattr", (Raw(_global("os", "path")), "join"))),
    }


def test_payloads_are_live(tmp_path: Path) -> None:
    """Control: plain pickle really runs these payloads, so refusing them means something."""
    canary = tmp_path / "control"
    pickle.loads(_payloads(canary)["global-os-system"])  # the point of this test
    assert canary.exists()


@pytest.mark.parametrize("kind", sorted(_payloads(Path("x"))))
def test_hostile_pickles_are_refused_without_running(tmp_path: Path, kind: str) -> None:
    canary = tmp_path / "canary"
    payload = _payloads(canary)[kind]
    path = _archive(tmp_path / "evil.pt", payload, {"0": _floats(np.zeros(1))})
    error = _refused(path)
    assert "refuses to load" in error.reason or "TorchScript" in error.reason
    assert not canary.exists()


def test_hostile_global_after_valid_tensors(tmp_path: Path) -> None:
    canary = tmp_path / "canary"
    data = _pickle({"w": T("0", 1, (1,), (1,)), "x": G("os", "system", (f"touch {canary}",))})
    path = _archive(tmp_path / "mixed.pt", data, {"0": _floats(np.zeros(1))})
    _refused(path, "refers to the global 'os.system', which steelyard refuses to load")
    assert not canary.exists()


def test_hostile_constants_in_torchscript(tmp_path: Path) -> None:
    canary = tmp_path / "canary"
    module = Raw(
        _global("__torch__.m", "Net") + b")\x81" + _emit({"w": T("0", 1, (1,), (1,))}) + b"b"
    )  # NEWOBJ then BUILD: how torch.jit.save writes modules
    constants = _pickle((G("os", "system", (f"touch {canary}",)),))
    code = {"archive/code/__torch__/m.py": b'class Net(Module):\n  __parameters__ = ["w", ]\n'}
    benign = _archive(tmp_path / "ts.pt", _pickle(module), {"0": _floats(np.ones(1))}, extra=code)
    assert list(load(benign).tensors) == ["w"]
    hostile = _archive(
        tmp_path / "evil_ts.pt",
        _pickle(module),
        {"0": _floats(np.ones(1))},
        extra={**code, "archive/constants.pkl": constants},
    )
    _refused(hostile, "os.system")
    assert not canary.exists()


def test_hostile_legacy_file(tmp_path: Path) -> None:
    canary = tmp_path / "canary"
    head = (TORCH / "legacy_mlp.pt").read_bytes()[:137]  # magic, protocol, sys_info pickles
    path = tmp_path / "legacy_evil.pt"
    path.write_bytes(head + _pickle(G("os", "system", (f"touch {canary}",))))
    _refused(path, "os.system")
    assert not canary.exists()


def test_quantized_and_whole_module_refusals(tmp_path: Path) -> None:
    q = _archive(tmp_path / "q.pt", _pickle({"w": G("torch._utils", "_rebuild_qtensor", ())}))
    _refused(q, "quantized")
    whole = _archive(tmp_path / "m.pt", _pickle(G("torch.nn.modules.linear", "Linear", ())))
    _refused(whole, "state_dict()")


def test_build_on_a_tensor_is_refused(tmp_path: Path) -> None:
    data = _pickle({"w": Raw(_emit(T("0", 1, (1,), (1,))) + _emit((1, 2)) + b"b")})  # BUILD
    path = _archive(tmp_path / "build.pt", data, {"0": _floats(np.zeros(1))})
    _refused(path, "takes none")


def test_deeply_nested_tuples_do_not_crash(tmp_path: Path) -> None:
    # Hashing a tuple nested 10^5 deep (a dict key) overflows the C stack in plain pickle.
    data = b"\x80\x02}" + b")" + b"\x85" * 100_000 + b"K\x01s."
    path = _archive(tmp_path / "deep.pt", data)
    _refused(path, "nests tuples")


def test_over_long_text_integer(tmp_path: Path) -> None:
    data = b"\x80\x02}X\x01\x00\x00\x00aL" + b"9" * 100_000 + b"L\ns."
    _refused(_archive(tmp_path / "long.pt", data), "over-long integer")


# --------------------------------------------------------------------------- fuzzing

_FUZZ = [
    "mlp_state_dict",
    "train_sgd",
    "legacy_mlp",
    "ts_cnn",
    "ts_traced_consts",
    "ts_buffers",
    "views_shared",
]


@settings(
    max_examples=120,
    deadline=3000,
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)
@given(
    stem=st.sampled_from(_FUZZ),
    cut=st.one_of(st.none(), st.floats(0.0, 1.0)),
    flips=st.lists(st.tuples(st.floats(0.0, 1.0), st.integers(1, 255)), max_size=6),
)
def test_damaged_files_read_or_fail_cleanly(
    tmp_path: Path, stem: str, cut: float | None, flips: list[tuple[float, int]]
) -> None:
    data = bytearray(REAL[stem].read_bytes())
    for where, mask in flips:
        data[min(int(where * len(data)), len(data) - 1)] ^= mask
    if cut is not None:
        data = data[: int(cut * len(data))]
    path = tmp_path / f"fuzz_{stem}.pt"
    path.write_bytes(bytes(data))
    loader = PytorchLoader()
    # This loader directly: the registry would also exercise other formats' sniffers.
    if not loader.sniff(path, bytes(data[:4096])):
        return
    try:
        checkpoint = loader.load(path)
        for tensor in checkpoint.tensors.values():
            assert isinstance(tensor.read(), np.ndarray)
        if checkpoint.optimizer is not None:
            for slots in checkpoint.optimizer.slots.values():
                if slots.first_moment is not None:
                    slots.first_moment.read()
    except LoadError as error:
        assert "\n" not in str(error)


def test_torch_is_never_imported() -> None:
    load(TORCH / "train_adam.pt")
    load(TORCH / "ts_cnn.pt")
    assert "torch" not in sys.modules


@settings(
    max_examples=120,
    deadline=3000,
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)
@given(
    stem=st.sampled_from(
        ["train_adam", "ts_cnn", "ts_recurrent", "views_shared", "protocol4_extras"]
    ),
    edits=st.lists(
        st.tuples(st.floats(0.0, 1.0), st.integers(0, 2), st.binary(min_size=1, max_size=6)),
        min_size=1,
        max_size=4,
    ),
)
def test_damaged_pickles_read_or_fail_cleanly(
    tmp_path: Path, stem: str, edits: list[tuple[float, int, bytes]]
) -> None:
    # Edit the pickle itself and re-zip it with a valid CRC, so the unpickler sees the damage.
    with zipfile.ZipFile(REAL[stem]) as archive:
        members = [(info.filename, archive.read(info)) for info in archive.infolist()]
    name, data = next((n, bytearray(d)) for n, d in members if n.endswith("/data.pkl"))
    for where, action, blob in edits:
        at = min(int(where * len(data)), len(data) - 1)
        if action == 0:
            data[at] ^= blob[0] or 1
        elif action == 1:
            del data[at : at + len(blob)]
        else:
            data[at:at] = blob
    path = tmp_path / f"pkl_{stem}.pt"
    with zipfile.ZipFile(path, "w") as archive:
        for member, blob in members:
            archive.writestr(member, bytes(data) if member == name else blob)
    try:
        checkpoint = load(path)
        for tensor in checkpoint.tensors.values():
            assert isinstance(tensor.read(), np.ndarray)
    except LoadError as error:
        assert "\n" not in str(error)


# --------------------------------------------------------------------------- budgets


def test_unpickling_stops_at_the_load_seconds_budget(tmp_path: Path) -> None:
    from dataclasses import replace

    from steelyard import budget

    # ~1.5 million one-byte opcodes: about a second of the pure-Python unpickler.
    data = b"\x80\x02" + b"N" * 1_500_000 + b"."
    path = _archive(tmp_path / "slow.pt", data)
    with budget.using(replace(budget.current(), load_seconds=0.05)):
        _refused(path, "data.pkl", "time budget")


def test_a_pickle_is_refused_from_its_claimed_size_before_inflating(tmp_path: Path) -> None:
    from steelyard.loaders.pytorch.unpickler import MAX_PICKLE_BYTES

    data = b"\x80\x02" + b"N" * (MAX_PICKLE_BYTES + 1) + b"."
    path = _archive(tmp_path / "big.pt", data, compress=zipfile.ZIP_DEFLATED)
    _refused(path, "data.pkl", "cap for a pickle")


def test_a_deflated_storage_is_inflated_once_for_every_view(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    from steelyard.loaders import base

    calls: list[str] = []
    original = base.inflate_member

    def counted(path: Path, info: zipfile.ZipInfo, target: Path) -> None:
        calls.append(info.filename)
        original(path, info, target)

    monkeypatch.setattr(base, "inflate_member", counted)
    weights = np.arange(12, dtype=np.float32)
    data = _pickle(
        {
            "a": T("0", 12, (3, 4), (4, 1)),
            "b": T("0", 12, (4, 3), (1, 4)),
            "c": T("0", 12, (6,), (2,)),
        }
    )
    path = _archive(tmp_path / "d.pt", data, {"0": _floats(weights)}, compress=zipfile.ZIP_DEFLATED)
    checkpoint = load(path)
    for _ in range(2):
        # reference: numpy's own views of the same values
        np.testing.assert_array_equal(checkpoint.tensors["a"].read(), weights.reshape(3, 4))
        np.testing.assert_array_equal(checkpoint.tensors["b"].read(), weights.reshape(3, 4).T)
        np.testing.assert_array_equal(checkpoint.tensors["c"].read(), weights[::2])
    assert calls == ["archive/data/0"]


def test_a_view_beyond_its_storage_by_more_than_the_budget_is_refused(tmp_path: Path) -> None:
    # 2^27 float32 broadcast from one element: 512 MiB claimed from 4 bytes stored.
    data = _pickle({"w": T("0", 1, (2**27, 2), (0, 0))})
    _refused(_archive(tmp_path / "v.pt", data, {"0": _floats(np.ones(1))}), "'w'", "budget")


def test_a_repeated_prefix_is_stripped_with_one_note(tmp_path: Path) -> None:
    data = _pickle({"module." * 3 + "fc.weight": T("0", 4, (2, 2), (2, 1))})
    checkpoint = load(_archive(tmp_path / "p.pt", data, {"0": _floats(np.ones(4))}))
    assert list(checkpoint.tensors) == ["fc.weight"]
    assert "the 'module.' prefix was stripped from every tensor name (3 times)" in checkpoint.notes


@pytest.mark.parametrize(
    "name",
    [
        "mlp_state_dict.pt", "views_shared.pt", "mlp_bf16.pt", "mlp_fp16.pt", "fp8_mixed.pt",
        "legacy_mlp.pt", "cnn_bn_state_dict.pt", "ts_cnn.pt",
    ],
)
def test_spans_of_contiguous_tensors(name: str) -> None:
    """Tensors that are C-ordered runs of a storage stored as-is get read_span (and
    fill_span for native float32), by positioned reads; strided views and storages that are
    not spans do not. Reference: the tensors' whole reads, which test_tensors_match_torch and
    the tests above check against torch's own values."""
    checkpoint = load(TORCH / name)
    spanned = 0
    for key, tensor in checkpoint.tensors.items():
        whole = np.asarray(tensor.read())
        if tensor.read_span is None:
            continue
        spanned += 1
        assert whole.flags.c_contiguous or whole.size <= 1, key
        flat = whole.reshape(-1)
        for start, stop in ((0, 1), (1, flat.size), (flat.size // 3, flat.size // 2), (0, flat.size)):
            got = tensor.read_span(start, stop)
            assert got.dtype == flat.dtype, key
            assert got.tobytes() == flat[start:stop].tobytes(), (key, start, stop)
        if tensor.dtype in ("f32", "f16", "bf16", "f64"):
            into = np.full((1, flat.size), -9.0, np.float32)
            tensor.widen_part(0, flat.size, into)
            np.testing.assert_array_equal(into[0], flat.astype(np.float32), err_msg=key)
    assert spanned > 0
    if name == "views_shared.pt":
        assert checkpoint.tensors["base_t"].read_span is None  # a transposed view
        assert checkpoint.tensors["col"].read_span is None  # a strided column
