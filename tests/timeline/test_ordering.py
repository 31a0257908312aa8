"""Ordering a run's checkpoints: training steps from names, from ``trainer_state.json`` and
from the file's own metadata, the ``--order`` override, and ties and missing steps reported
rather than guessed."""

from __future__ import annotations

import json
import os
from pathlib import Path

import pytest

from steelyard.errors import SteelyardError
from steelyard.run_timeline.ordering import (
    Order,
    arrange,
    place,
    step_from_names,
)
from tests.timeline._runs import write_run


@pytest.mark.parametrize(
    ("name", "value", "unit"),
    [
        # Trainer folder names (common practice, no source: the spellings trainers use).
        ("checkpoint-1200", 1200, "step"),
        ("step_500", 500, "step"),
        ("global_step800", 800, "step"),
        ("ckpt-7", 7, "step"),
        ("model_iter_30", 30, "step"),
        ("epoch3", 3, "epoch"),
        ("Epoch-12", 12, "epoch"),
    ],
)
def test_step_from_names(name: str, value: int, unit: str) -> None:
    position = step_from_names([name])
    assert position is not None
    assert (position.value, position.unit, position.source) == (value, unit, "name")


@pytest.mark.parametrize("name", ["model", "final", "laststep", "v2-checkpoint", "bestepochs"])
def test_names_without_a_step(name: str) -> None:
    assert step_from_names([name]) is None


def test_names_order_steps_numerically_not_as_text(tmp_path: Path) -> None:
    steps = [900, 1000, 80, 10000]
    write_run(tmp_path, steps, trainer_state=False)
    placed, notes = arrange([tmp_path], Order.step)
    assert [p.position.value for p in placed] == sorted(steps)
    assert {p.position.source for p in placed} == {"name"}
    assert notes == []


def test_trainer_state_is_trusted_over_the_name(tmp_path: Path) -> None:
    # Folders named out of order on purpose: the trainer's global_step decides, and the
    # disagreement is said, not hidden.
    paths = write_run(tmp_path, [10, 20, 30], folder="run-{step}", trainer_state=False)
    for path, step in zip(paths, [300, 100, 200], strict=True):
        (path.parent / "trainer_state.json").write_text(json.dumps({"global_step": step}))
    placed, notes = arrange([tmp_path], Order.step)
    assert [p.position.value for p in placed] == [100, 200, 300]
    assert [p.path for p in placed] == [paths[1], paths[2], paths[0]]
    assert all(p.position.source == "trainer_state" for p in placed)
    # run-10 is no step name (no checkpoint/step/iter word), so nothing disagrees here
    assert notes == []


def test_a_trainer_state_shared_by_several_checkpoints_is_not_used(tmp_path: Path) -> None:
    # Two checkpoint files in one folder with one trainer_state.json: it cannot say which
    # is which, so the names decide and the report says why.
    write_run(tmp_path, [5, 7], folder="run", file="weights_step_{step}.safetensors")
    placed, notes = arrange([tmp_path / "run"], Order.step)
    assert [(p.position.value, p.position.source) for p in placed] == [(5, "name"), (7, "name")]
    assert len(notes) == 1 and "several checkpoints" in notes[0]


def test_disagreeing_sources_are_noted(tmp_path: Path) -> None:
    (path,) = write_run(tmp_path, [500], trainer_state=False)
    (path.parent / "trainer_state.json").write_text(json.dumps({"global_step": 510}))
    placed = place(path, tmp_path)
    assert placed.position.value == 510
    assert any("name says step 500" in n for n in placed.notes)


def test_step_from_safetensors_metadata(tmp_path: Path) -> None:
    # __metadata__ is str -> str in the safetensors format (safetensors docs); written here by
    # the reference package.
    paths = write_run(
        tmp_path,
        [1, 2, 3],
        folder="snap-{step}",
        trainer_state=False,
        metadata=lambda s: {"global_step": str(1000 - 100 * s), "format": "pt"},
    )
    placed, _ = arrange(paths, Order.step)
    assert [p.position.value for p in placed] == [700, 800, 900]
    assert [p.position.source for p in placed] == ["metadata"] * 3
    assert [p.path for p in placed] == list(reversed(paths))


def test_step_from_gguf_metadata(tmp_path: Path) -> None:
    gguf = pytest.importorskip("gguf")
    import numpy as np

    paths = []
    for number, step in enumerate([40, 20]):
        path = tmp_path / f"m{number}.gguf"
        writer = gguf.GGUFWriter(str(path), "llama")  # reference writer: the gguf package
        writer.add_uint32("training.global_step", step)
        writer.add_tensor("blk.0.ffn_up.weight", np.ones((4, 8), dtype=np.float32))
        writer.write_header_to_file()
        writer.write_kv_data_to_file()
        writer.write_tensors_to_file()
        writer.close()
        paths.append(path)
    placed, _ = arrange(paths, Order.step)
    assert [(p.path.name, p.position.value, p.position.source) for p in placed] == [
        ("m1.gguf", 20, "metadata"),
        ("m0.gguf", 40, "metadata"),
    ]


def test_order_override(tmp_path: Path) -> None:
    paths = write_run(tmp_path, [3, 1, 2], folder="ckpt-{step}")
    given, _ = arrange(paths, Order.given)
    assert [p.path for p in given] == paths
    by_name, _ = arrange([paths[0], paths[2], paths[1]], Order.name)
    assert [p.path for p in by_name] == sorted(paths)
    by_step, _ = arrange(paths, Order.step)
    assert [p.position.value for p in by_step] == [1, 2, 3]


def test_name_order_compares_numbers_as_numbers(tmp_path: Path) -> None:
    paths = write_run(tmp_path, [9, 10, 100], folder="run{step}", trainer_state=False)
    placed, _ = arrange([paths[2], paths[0], paths[1]], Order.name)
    assert [p.path.parent.name for p in placed] == ["run9", "run10", "run100"]


def test_missing_step_is_an_error_not_a_guess(tmp_path: Path) -> None:
    write_run(tmp_path / "a", [5], folder="checkpoint-{step}")
    write_run(tmp_path / "b", [1], folder="final", trainer_state=False)
    with pytest.raises(SteelyardError, match=r"final.*no training step found"):
        arrange([tmp_path], Order.step)
    placed, _ = arrange([tmp_path], Order.given)  # the override still works
    assert [p.position.value for p in placed].count(None) == 1


def test_mixed_units_are_an_error(tmp_path: Path) -> None:
    write_run(tmp_path / "a", [2], folder="epoch{step}", trainer_state=False)
    write_run(tmp_path / "b", [5], folder="step{step}", trainer_state=False)
    with pytest.raises(SteelyardError, match="different units"):
        arrange([tmp_path], Order.step)


def test_ties_keep_the_given_order_and_are_reported(tmp_path: Path) -> None:
    first = write_run(tmp_path / "x", [100], trainer_state=True)
    second = write_run(tmp_path / "y", [100], trainer_state=True)
    placed, notes = arrange([*second, *first], Order.step)
    assert [p.path for p in placed] == [*second, *first]
    assert len(notes) == 1 and "both at step 100" in notes[0]


def test_broken_trainer_state_is_noted_and_not_used(tmp_path: Path) -> None:
    (path,) = write_run(tmp_path, [70], trainer_state=False)
    (path.parent / "trainer_state.json").write_text('{"global_step": 1, "global_step": 2}')
    placed = place(path, tmp_path)
    assert (placed.position.value, placed.position.source) == (70, "name")
    assert any("trainer state" in n and "duplicate" in n for n in placed.notes)


@pytest.mark.skipif(not hasattr(os, "symlink"), reason="needs symbolic links")
def test_trainer_state_through_a_link_is_never_read(tmp_path: Path) -> None:
    # The confined side-file reader refuses links: a link to a file outside the model's
    # folder must not decide the order.
    outside = tmp_path / "outside.json"
    outside.write_text(json.dumps({"global_step": 99999}))
    (path,) = write_run(tmp_path / "run", [12], trainer_state=False)
    (path.parent / "trainer_state.json").symlink_to(outside)
    placed = place(path, tmp_path / "run")
    assert (placed.position.value, placed.position.source) == (12, "name")
