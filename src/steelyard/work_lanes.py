"""Two queues of layer tasks for the audit's workers: one worker runs all the small ones.

A small layer's time is mostly interpreter time (a few hundred small numpy calls), which one
thread holds at a time. Two workers on small layers at once hand the interpreter lock back
and forth at almost every call, and each goes 2-3 × slower, so together they finish fewer
layers than one worker alone (21M bf16 i.i.d.: a 512 × 512 layer took 1.8 ms alone and
4-5.7 ms beside another; docs/performance.md, section B, "Ninth session"). A large layer's
time is mostly numpy loops, file reads and hashing, which release it. So worker 0 takes the
small tasks, then large ones from the back of their queue; the other workers take only
large tasks and stop when none is left, rather than take small ones.

Each queue is ordered costliest first (longest processing time first, Graham 1969). Results
come back in the tasks' own order, whatever ran where.
"""

from __future__ import annotations

import threading
from collections import deque
from collections.abc import Callable, Sequence
from concurrent.futures import Future, ThreadPoolExecutor
from typing import Generic, TypeVar

T = TypeVar("T")
R = TypeVar("R")


class _Queues(Generic[T]):
    """The two queues of (position, task), under one lock."""

    def __init__(self, large: list[tuple[int, T]], small: list[tuple[int, T]]) -> None:
        self._lock = threading.Lock()
        self._large, self._small = deque(large), deque(small)
        self.failed = False

    def take(self, small_lane: bool) -> tuple[int, T] | None:
        """The next task for a worker: for the small lane the front of the small queue, else
        the back of the large one; for the others the front of the large queue. None when
        there is none for this worker or a task has failed."""
        with self._lock:
            if self.failed:
                return None
            if small_lane and self._small:
                return self._small.popleft()
            if self._large:
                return self._large.pop() if small_lane else self._large.popleft()
            return None


def run_in_lanes(
    pool: ThreadPoolExecutor | None,
    jobs: int,
    work: Callable[[T], R],
    tasks: Sequence[T],
    cost: Callable[[T], int],
    small: Callable[[T], bool],
) -> list[R]:
    """``[work(t) for t in tasks]``; on ``jobs`` workers of ``pool`` when there is one, worker
    0 running every task for which ``small`` holds and the others only the rest (see the
    module). The pool may already be busy with other work; a worker starts when a thread is
    free."""
    if pool is None or jobs <= 1:
        return [work(task) for task in tasks]
    order = sorted(range(len(tasks)), key=lambda i: -cost(tasks[i]))
    is_small = [small(task) for task in tasks]
    queues: _Queues[T] = _Queues(
        [(i, tasks[i]) for i in order if not is_small[i]],
        [(i, tasks[i]) for i in order if is_small[i]],
    )
    results: dict[int, R] = {}

    def worker(small_lane: bool) -> None:
        while (taken := queues.take(small_lane)) is not None:
            index, task = taken
            try:
                results[index] = work(task)
            except BaseException:
                queues.failed = True  # the others stop taking; the error is raised below
                raise

    workers: list[Future[None]] = [pool.submit(worker, k == 0) for k in range(jobs)]
    for future in workers:
        future.result()
    return [results[i] for i in range(len(tasks))]
