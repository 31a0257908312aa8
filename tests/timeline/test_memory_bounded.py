"""Memory does not grow with the number of checkpoints: counted, not timed.

An instrumented reader keeps a weak reference to every array a tensor read returns
(``Tensor.read``, ``read_part``, ``read_float32``) and every block the drift pass reads, and
to every loaded checkpoint and every audit's statistics. Before each checkpoint is loaded the
test counts which of them are still alive. A run of 40 checkpoints must hold no more than a
run of 10 at any of those moments, and the bound must be small: the first and previous
checkpoints' structures (no weights), no statistics, no weight arrays. tracemalloc (which
numpy reports its buffers to) gives the peak of traced memory as a second, independent check.
"""

from __future__ import annotations

import gc
import tracemalloc
import weakref
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import pytest

import steelyard
from steelyard.graph import Checkpoint, Tensor
from steelyard.policy import Policy
from steelyard.run_timeline import drift, engine
from tests.timeline._runs import write_run

SHAPES = {
    "fc1.weight": (64, 48),
    "fc1.bias": (64,),
    "fc2.weight": (64, 64),
    "fc2.bias": (64,),
    "fc3.weight": (10, 64),
}


class Census:
    """Weak references to what the run read and built, counted at checkpoint boundaries."""

    def __init__(self) -> None:
        self.arrays: list[weakref.ref[Any]] = []
        self.checkpoints: list[weakref.ref[Any]] = []
        self.stats: list[weakref.ref[Any]] = []
        self.seen: list[tuple[int, int, int]] = []

    @staticmethod
    def _alive(refs: list[weakref.ref[Any]]) -> int:
        return sum(1 for ref in refs if ref() is not None)

    def count(self, _path: str = "") -> None:
        gc.collect()  # only what is still reachable counts as held
        self.seen.append(
            (self._alive(self.arrays), self._alive(self.checkpoints), self._alive(self.stats))
        )


def _tracking(census: Census, method: Callable[..., Any]) -> Callable[..., Any]:
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        result = method(*args, **kwargs)
        census.arrays.append(weakref.ref(result))
        return result

    return wrapper


@contextmanager
def instrumented(monkeypatch: pytest.MonkeyPatch) -> Iterator[Census]:
    census = Census()
    for name in ("read", "read_part", "read_float32"):
        monkeypatch.setattr(Tensor, name, _tracking(census, getattr(Tensor, name)))
    monkeypatch.setattr(drift.RowReader, "block", _tracking(census, drift.RowReader.block))
    original_load, original_stats = engine.load, engine.LayerStats

    def load(path: Any) -> Checkpoint:
        checkpoint = original_load(path)
        census.checkpoints.append(weakref.ref(checkpoint))
        return checkpoint

    class CountedStats(original_stats):  # type: ignore[misc,valid-type]
        def __init__(self, *args: Any, **kwargs: Any) -> None:
            super().__init__(*args, **kwargs)
            census.stats.append(weakref.ref(self))

    monkeypatch.setattr(engine, "load", load)
    monkeypatch.setattr(engine, "LayerStats", CountedStats)
    yield census


def _run(root: Path, count: int, monkeypatch: pytest.MonkeyPatch) -> Census:
    write_run(root, [100 * (i + 1) for i in range(count)], shapes=SHAPES, seed=count)
    with monkeypatch.context() as patch, instrumented(patch) as census:
        result = steelyard.timeline([root], policy=Policy(), on_checkpoint=census.count, jobs=1)
        census.count()
    assert len(result.checkpoints) == count
    return census


def test_live_arrays_do_not_grow_with_checkpoints(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    short = _run(tmp_path / "ten", 10, monkeypatch)
    long = _run(tmp_path / "forty", 40, monkeypatch)
    # The instrument works: the runs read thousands of arrays in all.
    assert len(long.arrays) > 3 * len(short.arrays) > 100
    for census in (short, long):
        arrays, checkpoints, stats = zip(*census.seen, strict=True)
        assert max(arrays) == 0  # no weight array outlives its checkpoint
        assert max(checkpoints) <= 2  # the first and the previous checkpoint's structure
        assert max(stats) == 0  # no audit statistics survive their checkpoint
    assert max(long.seen) == max(short.seen)


def _peak(root: Path, count: int) -> int:
    write_run(root, [i + 1 for i in range(count)], shapes=SHAPES, seed=1)
    gc.collect()
    tracemalloc.start()
    try:
        steelyard.timeline([root], policy=Policy(), jobs=1)
        return tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


def test_traced_peak_does_not_grow_with_checkpoints(tmp_path: Path) -> None:
    # A warm-up run first: one-time costs (lazy imports, caches built on first use) seen once
    # in a test session of another order made the second measured run 2 MB higher.
    _peak(tmp_path / "warm", 3)
    ten, forty = _peak(tmp_path / "ten", 10), _peak(tmp_path / "forty", 40)
    # The kept result grows by a few numbers per layer and checkpoint (a few kB here); a
    # copy of one checkpoint's weights per checkpoint would add ~35 kB each, 1 MB over 30.
    assert forty - ten < 300_000, (ten, forty)
