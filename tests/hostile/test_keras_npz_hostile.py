"""Hostile Keras, HDF5 and NumPy archives: small files that claim much.

Every case is generated here, into ``tmp_path``, and run through the real CLI in a child
process (``harness.run``: 4 GiB address cap, own peak RSS, wall time). The promise checked is
the issue's: exit 2 with one ``steelyard: ...`` line (or a clean result for a valid but
hostile file), no traceback, under 20 s and 1 GiB.

How the files are built (sources named beside each writer): HDF5 with h5py (the reference
library), zip archives by hand from the PKWARE APPNOTE layout (so that a member of hundreds
of MB of zeros costs a few hundred KB of deflate and no RAM to write), ``.npy`` members
from the NumPy format specification (``numpy.lib.format``).
"""

from __future__ import annotations

import json
import struct
import zlib
from collections.abc import Iterable, Iterator
from pathlib import Path

import h5py
import numpy as np
import pytest

from tests.hostile.harness import Outcome, assert_bounded, assert_refused, run

_MIB = 2**20
_ZERO_BLOCK = bytes(_MIB)


# --------------------------------------------------------------------------------------------
# Writers


def _deflate(pieces: Iterable[bytes]) -> Iterator[bytes]:
    """Raw deflate (RFC 1951) of ``pieces``, full-flushing after each piece.

    A full flush resets the compressor's window, so every 1 MiB block of zeros compresses to
    the same ~1 KB: it is compressed once and repeated (cheap bombs, identical bytes)."""
    compressor = zlib.compressobj(9, zlib.DEFLATED, -15)
    zero_block: bytes | None = None
    for piece in pieces:
        if piece == _ZERO_BLOCK and zero_block is not None:
            yield zero_block
            continue
        out = compressor.compress(piece) + compressor.flush(zlib.Z_FULL_FLUSH)
        if piece == _ZERO_BLOCK:
            zero_block = out
        yield out
    yield compressor.flush(zlib.Z_FINISH)


def _zeros(nbytes: int) -> Iterator[bytes]:
    while nbytes > 0:
        step = min(nbytes, _MIB)
        yield _ZERO_BLOCK if step == _MIB else bytes(step)
        nbytes -= step


def write_zip_deflated(path: Path, members: list[tuple[str, list[Iterable[bytes]] | bytes]]) -> None:
    """A zip archive (PKWARE APPNOTE 4.3: local headers, central directory, end record) of
    deflated members, streamed: a member is given as bytes or as a list of piece iterables
    (concatenated), so a run of zeros never exists in memory."""
    central: list[bytes] = []
    with open(path, "wb") as out:
        for name, content in members:
            parts: list[Iterable[bytes]] = [[content]] if isinstance(content, bytes) else content
            raw_name = name.encode()
            offset = out.tell()
            out.write(b"\0" * (30 + len(raw_name)))
            crc = size = 0

            def plain(parts: list[Iterable[bytes]] = parts) -> Iterator[bytes]:
                nonlocal crc, size
                for part in parts:
                    for piece in part:
                        crc = zlib.crc32(piece, crc)
                        size += len(piece)
                        yield piece

            stored = 0
            for chunk in _deflate(plain()):
                out.write(chunk)
                stored += len(chunk)
            end = out.tell()
            fields = (20, 0, 8, 0, 0x21, crc, stored, size, len(raw_name), 0)
            out.seek(offset)
            out.write(b"PK\x03\x04" + struct.pack("<HHHHHIIIHH", *fields) + raw_name)
            out.seek(end)
            central.append(
                b"PK\x01\x02"
                + struct.pack("<HHHHHHIIIHHHHHII", 20, *fields, 0, 0, 0, 0, offset)
                + raw_name
            )
        start = out.tell()
        for entry in central:
            out.write(entry)
        directory = out.tell() - start
        out.write(
            b"PK\x05\x06" + struct.pack("<HHHHIIH", 0, 0, len(central), len(central), directory, start, 0)
        )


def npy_header(dtype: str, shape: tuple[int, ...]) -> bytes:
    """A version 1.0 ``.npy`` header (NumPy format specification, ``numpy.lib.format``)."""
    text = f"{{'descr': '{dtype}', 'fortran_order': False, 'shape': {shape!r}, }}"
    text += " " * (-(10 + len(text) + 1) % 64) + "\n"
    return b"\x93NUMPY\x01\x00" + struct.pack("<H", len(text)) + text.encode("latin1")


def npy_zeros(shape: tuple[int, ...], dtype: str = "<f4") -> list[Iterable[bytes]]:
    """An ``.npy`` member of zeros, as pieces (never whole in memory)."""
    nbytes = int(np.prod(shape, dtype=np.int64)) * np.dtype(dtype).itemsize
    return [[npy_header(dtype, shape)], _zeros(nbytes)]


def sparse_weights_h5(path: Path, datasets: dict[str, tuple[int, ...]]) -> None:
    """A Keras 3 ``.weights.h5`` layout whose contiguous float32 datasets are allocated but
    never written (h5py low-level API: early allocation, no fill), so the file is as large as
    it claims but sparse on disk and all zeros."""
    with h5py.File(path, "w") as f:
        for name, shape in datasets.items():
            group = f.require_group(name.rpartition("/")[0])
            dcpl = h5py.h5p.create(h5py.h5p.DATASET_CREATE)
            dcpl.set_alloc_time(h5py.h5d.ALLOC_TIME_EARLY)
            dcpl.set_fill_time(h5py.h5d.FILL_TIME_NEVER)
            space = h5py.h5s.create_simple(shape)
            h5py.h5d.create(
                group.id, name.rpartition("/")[2].encode(), h5py.h5t.IEEE_F32LE, space, dcpl=dcpl
            )


def file_pieces(path: Path) -> Iterator[bytes]:
    """A file's bytes in 1 MiB pieces."""
    with open(path, "rb") as handle:
        while piece := handle.read(_MIB):
            yield piece


def keras_archive(path: Path, weights: Path, config: object | None = None) -> None:
    """A ``.keras`` archive whose ``model.weights.h5`` member is deflated."""
    cfg = json.dumps(config if config is not None else {"class_name": "Model", "config": {}})
    write_zip_deflated(
        path,
        [
            ("metadata.json", b'{"keras_version": "3.15.0"}'),
            ("config.json", cfg.encode()),
            ("model.weights.h5", [file_pieces(weights)]),
        ],
    )


def _check_clean(outcome: Outcome) -> None:
    """A valid (if hostile) file: an audit result, not a refusal or a crash."""
    assert_bounded(outcome)
    assert outcome.code in (0, 1), (outcome.code, outcome.stderr[-2000:])


# --------------------------------------------------------------------------------------------
# HDF5 datasets whose fill value expands


def fill_bomb_h5(
    path: Path, shape: tuple[int, int], dtype: str, filters: dict[str, object], written_rows: int
) -> None:
    """A ``.weights.h5`` dense layer whose kernel is chunked and filtered, with only its first
    rows written (random, so they stay large after compression): every other chunk is the
    fill value, which HDF5 materialises on read (h5py ``fillvalue``)."""
    rng = np.random.default_rng(shape[0] + written_rows)
    chunk_rows = max(1, _MIB // (shape[1] * np.dtype(dtype).itemsize))
    with h5py.File(path, "w") as f:
        group = f.create_group("layers/dense/vars")
        kernel = group.create_dataset(
            "0", shape=shape, dtype=dtype, chunks=(chunk_rows, shape[1]), fillvalue=0.5, **filters
        )
        kernel[:written_rows] = rng.standard_normal((written_rows, shape[1])).astype(dtype)
        group.create_dataset("1", data=np.zeros(shape[1], dtype=dtype))


@pytest.mark.parametrize(
    ("shape", "dtype", "filters"),
    [
        ((16384, 16384), "<f4", {"compression": "gzip", "compression_opts": 1}),
        ((8192, 32768), "<f4", {"compression": "lzf"}),
        ((8192, 16384), "<f8", {"compression": "gzip", "shuffle": True}),
    ],
    ids=["gzip-f32", "lzf-f32", "shuffle-gzip-f64"],
)
def test_hdf5_fill_value_bomb_is_refused_before_reading(
    tmp_path: Path, shape: tuple[int, int], dtype: str, filters: dict[str, object]
) -> None:
    # 1 GiB claimed from ~1 MB of stored chunks: within the old 1000:1 ratio limit.
    row_bytes = shape[1] * np.dtype(dtype).itemsize
    path = tmp_path / "bomb.weights.h5"
    fill_bomb_h5(path, shape, dtype, filters, written_rows=(1600 * 1024) // row_bytes + 1)
    assert path.stat().st_size < 2 * _MIB
    assert_refused(run(["audit", str(path)], tmp_path), "expand")


def test_hdf5_many_fill_bombs_exceed_the_checkpoint_budget(tmp_path: Path) -> None:
    # Five datasets of 448 MiB, each within the per-object budget, 2.2 GiB together.
    path = tmp_path / "five.weights.h5"
    rng = np.random.default_rng(5)
    with h5py.File(path, "w") as f:
        for i in range(5):
            group = f.create_group(f"layers/dense_{i}/vars")
            kernel = group.create_dataset(
                "0", shape=(7168, 16384), dtype="<f4", chunks=(16, 16384), fillvalue=1.0,
                compression="gzip", compression_opts=1,
            )
            kernel[:8] = rng.standard_normal((8, 16384))
            group.create_dataset("1", data=np.zeros(16384, dtype="<f4"))
    assert path.stat().st_size < 3 * _MIB
    assert_refused(run(["audit", str(path)], tmp_path), "budget")


# --------------------------------------------------------------------------------------------
# Compressed archive members, huge in absolute terms


@pytest.mark.parametrize("mib", [640, 900])
def test_keras_weights_member_inflating_beyond_budget_is_refused(tmp_path: Path, mib: int) -> None:
    weights = tmp_path / "w.h5"
    sparse_weights_h5(weights, {"layers/dense/vars/0": (mib * 256, 1024), "layers/dense/vars/1": (1024,)})
    path = tmp_path / "bomb.keras"
    keras_archive(path, weights)
    weights.unlink()
    assert path.stat().st_size < 2 * _MIB
    assert_refused(run(["audit", str(path)], tmp_path), "model.weights.h5", "expand")


def test_keras_weights_member_is_inflated_once(tmp_path: Path) -> None:
    # 300 MiB of weights in 60 layers, deflated to ~300 KB: within every budget, but the old
    # reader inflated the whole member again for each of the 120 tensor reads.
    weights = tmp_path / "w.h5"
    layout: dict[str, tuple[int, ...]] = {}
    for i in range(60):
        layout[f"layers/dense_{i}/vars/0"] = (1280, 1024)
        layout[f"layers/dense_{i}/vars/1"] = (1024,)
    sparse_weights_h5(weights, layout)
    path = tmp_path / "slow.keras"
    keras_archive(path, weights)
    weights.unlink()
    assert path.stat().st_size < 2 * _MIB
    _check_clean(run(["audit", str(path)], tmp_path))


@pytest.mark.parametrize(
    ("shape", "dtype"),
    [((720 * 256, 1024), "<f4"), ((600 * 512, 1024), "<f2"), ((96, 1024, 1024), "<f8")],
)
def test_npz_member_inflating_beyond_budget_is_refused(
    tmp_path: Path, shape: tuple[int, ...], dtype: str
) -> None:
    path = tmp_path / "bomb.npz"
    write_zip_deflated(path, [("bias.npy", npy_header("<f4", (4,)) + bytes(16)), ("kernel.npy", npy_zeros(shape, dtype))])
    assert path.stat().st_size < 2 * _MIB
    assert_refused(run(["audit", str(path)], tmp_path), "kernel.npy", "expand")


def test_npz_members_together_beyond_checkpoint_budget_are_refused(tmp_path: Path) -> None:
    path = tmp_path / "many.npz"
    members: list[tuple[str, list[Iterable[bytes]] | bytes]] = [
        (f"layer{i}.weight.npy", npy_zeros((480 * 256, 1024))) for i in range(5)
    ]
    write_zip_deflated(path, members)
    assert path.stat().st_size < 3 * _MIB
    assert_refused(run(["audit", str(path)], tmp_path), "budget")


# --------------------------------------------------------------------------------------------
# HDF5 structures that hang or explode a walk


def damaged_heap_h5(path: Path, names: list[str], zeroed: int) -> None:
    """A legacy Keras file whose ``layer_names`` is a variable-length string attribute (kept
    in a global heap collection), with object ``zeroed`` of the collection given size 0.

    HDF5 File Format Specification, "Global Heap": "GCOL", version, 3 reserved bytes, an
    8-byte collection size, then objects (2-byte index, 2-byte reference count, 4 reserved
    bytes, 8-byte size, data padded to 8 bytes)."""
    with h5py.File(path, "w") as f:
        f.attrs.create("layer_names", names, dtype=h5py.string_dtype())
        for name in names:
            f.create_group(name).attrs.create("weight_names", [], dtype=h5py.string_dtype())
    data = bytearray(path.read_bytes())
    start = data.find(b"GCOL")
    assert start > 0
    position = start + 16
    for _ in range(zeroed):
        (size,) = struct.unpack("<Q", data[position + 8 : position + 16])
        position += 16 + (size + 7) // 8 * 8
    data[position : position + 16] = b"\x00" * 16
    path.write_bytes(bytes(data))


@pytest.mark.parametrize(("count", "zeroed"), [(2, 0), (5, 3)])
def test_damaged_hdf5_heap_is_refused_within_the_time_promise(
    tmp_path: Path, count: int, zeroed: int
) -> None:
    path = tmp_path / "loop.h5"
    damaged_heap_h5(path, [f"dense_{i}" for i in range(count)], zeroed)
    assert_refused(run(["audit", str(path)], tmp_path, timeout=60), "HDF5")


def hard_link_lattice(path: Path, depth: int, fan: int) -> None:
    """A ``.weights.h5`` whose nested ``layers`` groups are linked ``fan`` times each to the
    next level (HDF5 hard links, h5py ``group[name] = other``): ``fan ** depth`` paths to
    one object, though the file holds ``depth`` groups."""
    with h5py.File(path, "w") as f:
        level = f.create_group(f"lattice{depth}")
        vars_ = level.create_group("vars")
        vars_.create_dataset("0", data=np.ones((4, 4), dtype="<f4"))
        for k in range(depth - 1, -1, -1):
            upper = f.create_group(f"lattice{k}")
            inner = upper.create_group("layers")
            for j in range(fan):
                inner[f"dense_{j}"] = level
            level = upper
        f["layers"] = level["layers"]


@pytest.mark.parametrize(("depth", "fan"), [(8, 5), (12, 3), (30, 2)])
def test_hdf5_hard_link_lattice_is_walked_linearly(tmp_path: Path, depth: int, fan: int) -> None:
    path = tmp_path / "lattice.weights.h5"
    hard_link_lattice(path, depth, fan)
    assert path.stat().st_size < _MIB
    # Refused at the first second link to a group, or (fan 2) at the nesting limit first.
    assert_refused(run(["audit", str(path)], tmp_path, timeout=60), "HDF5")


def test_hdf5_group_linked_into_itself_is_refused(tmp_path: Path) -> None:
    path = tmp_path / "cycle.weights.h5"
    with h5py.File(path, "w") as f:
        group = f.create_group("layers/dense")
        group.create_group("vars").create_dataset("0", data=np.ones(3, dtype="<f4"))
        group["again"] = f["layers"]
    assert_refused(run(["audit", str(path)], tmp_path, timeout=60), "link")


# --------------------------------------------------------------------------------------------
# Model configs whose searches were not linear


def _weights_with(path: Path, layers: dict[str, tuple[int, ...]]) -> Path:
    with h5py.File(path, "w") as f:
        f.create_group("layers")
        for name, shape in layers.items():
            f.create_dataset(name, data=np.full(shape, 0.01, dtype="<f4"))
    return path


def _layer(cls: str, name: str, inbound: list[str], **config: object) -> dict[str, object]:
    history = [
        {"class_name": "__keras_tensor__", "config": {"keras_history": [src, 0, 0]}}
        for src in inbound
    ]
    node = {"args": [history if len(history) != 1 else history[0]], "kwargs": {}}
    return {
        "class_name": cls,
        "name": name,
        "config": {"name": name, **config},
        "inbound_nodes": [node] if inbound else [],
    }


@pytest.mark.parametrize("count", [40_000, 80_000])
def test_layer_with_many_inbound_tensors_is_read_linearly(tmp_path: Path, count: int) -> None:
    # One merge layer fed by tensor i of one input layer, for many i (Keras 2 node lists).
    nodes = [[["x", 0, i, {}] for i in range(count)]]
    config = {
        "class_name": "Functional",
        "config": {
            "name": "wide",
            "layers": [
                {"class_name": "InputLayer", "name": "x", "config": {"name": "x"}, "inbound_nodes": []},
                {"class_name": "Concatenate", "name": "cat", "config": {"name": "cat"}, "inbound_nodes": nodes},
            ],
            "input_layers": [["x", 0, 0]],
            "output_layers": [["cat", 0, 0]],
        },
    }
    path = tmp_path / "wide.keras"
    weights = _weights_with(tmp_path / "w.h5", {})
    keras_archive(path, weights, config)
    weights.unlink()
    _check_clean(run(["audit", str(path)], tmp_path, timeout=60))


@pytest.mark.parametrize(("levels", "width"), [(15, 8), (30, 3)])
def test_diamond_of_merges_before_a_dense_layer_is_searched_linearly(
    tmp_path: Path, levels: int, width: int
) -> None:
    # Each level: ``width`` Dropout layers reading the previous Add, merged by a new Add.
    # ``width ** levels`` paths lead from the Dense layer back to the input.
    layers = [_layer("InputLayer", "x", [], batch_shape=[None, 4])]
    previous = "x"
    for level in range(levels):
        branches = [f"drop_{level}_{j}" for j in range(width)]
        layers += [_layer("Dropout", b, [previous], rate=0.1) for b in branches]
        layers.append(_layer("Add", f"add_{level}", branches))
        previous = f"add_{level}"
    layers.append(_layer("Dense", "head", [previous], units=2, use_bias=True))
    config = {
        "class_name": "Functional",
        "config": {
            "name": "diamond",
            "layers": layers,
            "input_layers": [["x", 0, 0]],
            "output_layers": [["head", 0, 0]],
        },
    }
    path = tmp_path / "diamond.keras"
    weights = _weights_with(
        tmp_path / "w.h5", {"layers/dense/vars/0": (4, 2), "layers/dense/vars/1": (2,)}
    )
    keras_archive(path, weights, config)
    weights.unlink()
    _check_clean(run(["audit", str(path)], tmp_path, timeout=60))
