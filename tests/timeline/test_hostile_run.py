"""A run folder that tries to make the timeline read outside it, or block on a side file:
links are not followed (listed in the notes), a FIFO named ``trainer_state.json`` is never
opened (the confined side-file reader refuses anything but a regular file)."""

from __future__ import annotations

import os
from pathlib import Path

import pytest

import steelyard
from steelyard.policy import Policy
from tests.timeline._runs import write_run


@pytest.mark.skipif(not hasattr(os, "symlink"), reason="needs symbolic links")
def test_linked_checkpoint_outside_the_run_is_not_read(tmp_path: Path) -> None:
    run = tmp_path / "run"
    write_run(run, [1, 2])
    (outside,) = write_run(tmp_path / "elsewhere", [3])
    (run / "checkpoint-3").symlink_to(outside.parent, target_is_directory=True)
    timeline = steelyard.timeline(run, policy=Policy())
    assert [c.position.value for c in timeline.checkpoints] == [1, 2]
    assert not any("elsewhere" in c.path for c in timeline.checkpoints)
    assert any("checkpoint-3" in note and "not read" in note for note in timeline.notes)


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="needs FIFOs")
def test_fifo_trainer_state_is_never_opened(tmp_path: Path) -> None:
    paths = write_run(tmp_path, [10, 20], trainer_state=False)
    os.mkfifo(paths[0].parent / "trainer_state.json")  # opening it for reading would block
    timeline = steelyard.timeline(tmp_path, policy=Policy())
    assert [(c.position.value, c.position.source) for c in timeline.checkpoints] == [
        (10, "name"),
        (20, "name"),
    ]
