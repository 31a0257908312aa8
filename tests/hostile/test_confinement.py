"""Confinement: nothing outside a model's folder is ever opened, whatever links point there.

Every case plants a *canary* outside the folder: a real checkpoint whose only tensor has a
unique name. Links to it are placed inside the folder in every role a file can play (a weight
file, a shard an index names, an ONNX model's external data, a ``config.json`` or layout file,
a gradient sidecar, a linked sub-folder, a chain of links, absolute and relative targets), and
FIFOs in those roles. The run must skip or refuse each one with its reason, never open the
canary (``assert_stayed_inside``: the child logs every open), and never print its tensor name.
All files are generated here; the real CLI runs in a child (``harness.run``).
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np
import pytest
from onnx import TensorProto, helper, numpy_helper

from tests.conftest import mlp_tensors, write_safetensors
from tests.hostile.harness import Outcome, assert_bounded, assert_stayed_inside, run

CANARY = "canary_tensor_5f3e9a.weight"

needs_links = pytest.mark.skipif(not hasattr(os, "symlink"), reason="no symbolic links")


def _canary(outside: Path) -> Path:
    outside.mkdir()
    data = np.arange(12, dtype=np.float32).reshape(3, 4)
    path = write_safetensors(outside / "secret.safetensors", {CANARY: data})
    (outside / "raw.bin").write_bytes(data.tobytes())
    (outside / "config.json").write_text(json.dumps({"canary": CANARY}))
    (outside / "weights.layout.toml").write_text(f'[[layer]]\nname = "{CANARY}"\n')
    return path


def _link(at: Path, target: Path, absolute: bool) -> None:
    at.symlink_to(target if absolute else Path(os.path.relpath(target, at.parent)))


def _onnx_with_external(folder: Path, location: str) -> Path:
    """A one-Gemm ONNX model whose weight lives in external data ``location`` (onnx helper:
    the format's reference writer; external data fields per the ONNX IR spec)."""
    weight = numpy_helper.from_array(np.zeros((3, 4), dtype=np.float32), "w")
    weight.ClearField("raw_data")
    weight.data_location = TensorProto.EXTERNAL
    for key, value in (("location", location), ("offset", "0"), ("length", "48")):
        entry = weight.external_data.add()
        entry.key, entry.value = key, value
    graph = helper.make_graph(
        [helper.make_node("Gemm", ["x", "w"], ["y"], transB=1)],
        "g",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, 4])],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, 3])],
        initializer=[weight],
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    path = folder / "model.onnx"
    path.write_bytes(model.SerializeToString())
    return path


def _index(folder: Path, shard: str) -> Path:
    path = folder / "model.safetensors.index.json"
    path.write_text(json.dumps({"metadata": {}, "weight_map": {CANARY: shard}}))
    return path


def _hostile_tree(root: Path, absolute: bool) -> tuple[Path, Path]:
    """``root/models`` full of links to ``root/outside``; one honest model among them."""
    secret = _canary(root / "outside")
    models = root / "models"
    models.mkdir()
    write_safetensors(models / "honest.safetensors", mlp_tensors(np.random.default_rng(1)))
    # A linked weight file, a chain of links, linked unread/sidecar/training-state names.
    _link(models / "linked.safetensors", secret, absolute)
    _link(models / "hop.bin", secret, absolute)
    _link(models / "chain.pt", models / "hop.bin", absolute=False)
    _link(models / "model.grads.safetensors", secret, absolute)
    _link(models / "optimizer.pt", secret, absolute)
    _link(models / "secret.gguf", secret, absolute)
    # A linked sub-folder holding the canary, and a linked config beside the honest model.
    _link(models / "sub", root / "outside", absolute)
    _link(models / "config.json", root / "outside" / "config.json", absolute)
    _link(models / "honest.layout.toml", root / "outside" / "weights.layout.toml", absolute)
    # A shard set whose index names a linked shard.
    sharded = models / "sharded"
    sharded.mkdir()
    _link(sharded / "model-00001-of-00001.safetensors", secret, absolute)
    _index(sharded, "model-00001-of-00001.safetensors")
    # A linked index.
    linked_index = models / "linked-index"
    linked_index.mkdir()
    _index(root / "outside", "secret.safetensors")
    _link(linked_index / "model.safetensors.index.json", root / "outside" / "model.safetensors.index.json", absolute)
    # An ONNX model whose external data is a link to the canary's raw bytes.
    external = models / "onnx"
    external.mkdir()
    _onnx_with_external(external, "data.bin")
    _link(external / "data.bin", root / "outside" / "raw.bin", absolute)
    return models, root / "outside"


def _clean(outcome: Outcome, outside: Path) -> None:
    assert_bounded(outcome)
    assert_stayed_inside(outcome, outside)
    assert CANARY not in outcome.stdout and CANARY not in outcome.stderr


@needs_links
@pytest.mark.parametrize("absolute", [False, True], ids=["relative-links", "absolute-links"])
def test_links_out_of_a_folder_are_skipped_or_refused_and_never_opened(
    tmp_path: Path, absolute: bool
) -> None:
    _, outside = _hostile_tree(tmp_path, absolute)
    outcome = run(["audit", "models", "-f", "json"], cwd=tmp_path)
    _clean(outcome, outside)
    assert outcome.code == 2, outcome.stderr  # the index and the ONNX model are refused
    document = json.loads(outcome.stdout)
    skipped = {Path(s["path"]).name: s["reason"] for s in document["skipped"]}
    for name in ("linked.safetensors", "chain.pt", "model.grads.safetensors", "optimizer.pt",
                 "secret.gguf", "model.safetensors.index.json"):
        assert "symbolic link" in skipped[name], (name, skipped)
    assert "outside the folder" in skipped["linked.safetensors"]
    assert skipped["sub"] == "symbolic link to a folder, not followed"
    errors = {Path(e["path"]).parent.name: e["reason"] for e in document["errors"]}
    assert "symbolic link" in errors["sharded"] and "refused" in errors["sharded"]
    assert "symbolic link" in errors["onnx"] and "refused" in errors["onnx"]
    audited = [a["checkpoint"]["path"] for a in document["audits"]]
    assert audited == [str(Path("models") / "honest.safetensors")]
    # The linked config.json and layout file were not read (the honest model has no layout).
    assert not any("layout" in n for n in document["audits"][0]["notes"])


@needs_links
def test_layers_of_a_folder_with_links_reads_only_the_honest_file(tmp_path: Path) -> None:
    models, outside = _hostile_tree(tmp_path, absolute=False)
    for folder in ("sharded", "linked-index", "onnx"):
        for item in sorted((models / folder).iterdir(), reverse=True):
            item.unlink()
        (models / folder).rmdir()
    outcome = run(["layers", "models", "-f", "json"], cwd=tmp_path)
    _clean(outcome, outside)
    assert outcome.code == 0, outcome.stderr
    assert json.loads(outcome.stdout)["checkpoint"]["path"].endswith("honest.safetensors")


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="no FIFOs on this system")
def test_fifos_in_a_folder_are_listed_and_never_block(tmp_path: Path) -> None:
    # Before: a FIFO with a weight ending was dropped without a word, and a FIFO an index or
    # an ONNX model names was refused as "does not exist".
    models = tmp_path / "models"
    models.mkdir()
    write_safetensors(models / "honest.safetensors", mlp_tensors(np.random.default_rng(2)))
    for name in ("pipe.safetensors", "pipe.onnx", "pipe.gguf", "model.safetensors.index.json.d"):
        os.mkfifo(models / name)
    sharded = models / "sharded"
    sharded.mkdir()
    os.mkfifo(sharded / "model-00001-of-00001.safetensors")
    _index(sharded, "model-00001-of-00001.safetensors")
    external = models / "onnx"
    external.mkdir()
    _onnx_with_external(external, "data.bin")
    os.mkfifo(external / "data.bin")
    outcome = run(["audit", "models", "-f", "json"], cwd=tmp_path, timeout=30)
    assert_bounded(outcome)
    document = json.loads(outcome.stdout)
    skipped = {Path(s["path"]).name: s["reason"] for s in document["skipped"]}
    for name in ("pipe.safetensors", "pipe.onnx", "pipe.gguf", "model.safetensors.index.json.d"):
        assert skipped[name] == "a FIFO, not a regular file", skipped
    errors = {Path(e["path"]).parent.name: e["reason"] for e in document["errors"]}
    assert "FIFO" in errors["sharded"] and "FIFO" in errors["onnx"], errors
    assert outcome.code == 2


def test_an_index_naming_a_shard_through_dotdot_is_refused_unopened(
    tmp_path: Path,
) -> None:
    # The index names a shard through "..": refused before anything is looked at.
    _canary(tmp_path / "outside")
    models = tmp_path / "models"
    models.mkdir()
    _index(models, "../outside/secret.safetensors")
    outcome = run(["audit", "models/model.safetensors.index.json"], cwd=tmp_path)
    assert_bounded(outcome)
    assert_stayed_inside(outcome, tmp_path / "outside")
    assert outcome.code == 2 and "leaves the model's folder" in outcome.stderr
