"""Work run while a sandboxed reader's child reads (steelyard.loaders.meanwhile).

The child must be forked before the work starts (so that no thread or half-done import of the
work is copied into it), the work runs once, only when a reader is started, and its failure is
never reported as a broken file. The Keras demo file (fixtures/make_demo.py, written by Keras)
is read the same with and without it.
"""

from __future__ import annotations

import os
import time
from pathlib import Path

import pytest

from steelyard.errors import LoadError
from steelyard.loaders import load
from steelyard.loaders.meanwhile import meanwhile
from steelyard.loaders.sandbox import isolated
from tests.conftest import FIXTURES


def _child_pid_after(delay: float) -> int:
    time.sleep(delay)
    return os.getpid()


def test_the_work_runs_once_while_the_child_reads(tmp_path: Path) -> None:
    seen: list[float] = []
    parent = os.getpid()
    with meanwhile(lambda: seen.append(time.monotonic())):
        started = time.monotonic()
        child = isolated(tmp_path, _child_pid_after, (0.3,), timeout=10)
        finished = time.monotonic()
        again = isolated(tmp_path, _child_pid_after, (0.0,), timeout=10)
    assert child != parent and again != parent  # both ran in a child
    assert len(seen) == 1  # once, by the first reader
    # the work ran before the child's answer came, not after it
    assert started <= seen[0] < started + 0.3 <= finished


def test_no_reader_no_work() -> None:
    seen: list[int] = []
    with meanwhile(lambda: seen.append(1)):
        pass
    isolated(Path("."), _child_pid_after, (0.0,), timeout=10)  # outside the block
    assert seen == []


def _boom() -> None:
    raise RuntimeError("an import the caller will meet again")


def test_a_failing_work_is_not_a_broken_file() -> None:
    demo = FIXTURES / "demo" / "pumpwear-nightly-bad.keras"
    plain = load(demo)
    with meanwhile(_boom):
        read = load(demo)  # no LoadError: the work's failure stays the caller's
    assert [layer.name for layer in read.layers] == [layer.name for layer in plain.layers]
    assert set(read.tensors) == set(plain.tensors)


def test_a_stuck_reader_is_still_refused_in_time(tmp_path: Path) -> None:
    with meanwhile(lambda: time.sleep(0.05)), pytest.raises(LoadError, match="was not read within"):
        isolated(tmp_path, _spin, (), timeout=0.5)


def _spin() -> None:
    while True:
        pass
