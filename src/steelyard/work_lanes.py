"""Two queues of layer tasks for the audit's workers: one worker prefers the small ones.

A small layer's time is mostly interpreter time (a few hundred small numpy calls), which one
thread holds at a time: two workers on small layers at once hand the interpreter lock over at
almost every call and each goes 2-3 × slower. A large layer's time is mostly numpy loops,
file reads and hashing, which release it. So worker 0 takes the small tasks first and the
others the large ones first, and the two overlap; a worker whose queue is empty takes from
the other one, so neither kind waits for a worker (an i.i.d. model's small layers, each with
a full untrained-layer test, are more work than its large ones).

Each queue is ordered costliest first (longest processing time first, Graham 1969); a worker
takes from the front of its own queue and from the back of the other, so the last tasks of
the run are small ones. Results come back in the tasks' own order, whatever ran where.
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
        self._queues = (deque(large), deque(small))
        self.failed = False

    def take(self, prefer_small: bool) -> tuple[int, T] | None:
        """The next task for a worker: the front of its own queue, else the back of the
        other; None when both are empty or a task has failed."""
        own, other = (1, 0) if prefer_small else (0, 1)
        with self._lock:
            if self.failed:
                return None
            if self._queues[own]:
                return self._queues[own].popleft()
            if self._queues[other]:
                return self._queues[other].pop()
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
    0 preferring the tasks for which ``small`` holds and the others the rest (see the module).
    The pool may already be busy with other work; a worker starts when a thread is free."""
    if pool is None or jobs <= 1:
        return [work(task) for task in tasks]
    order = sorted(range(len(tasks)), key=lambda i: -cost(tasks[i]))
    is_small = [small(task) for task in tasks]
    queues: _Queues[T] = _Queues(
        [(i, tasks[i]) for i in order if not is_small[i]],
        [(i, tasks[i]) for i in order if is_small[i]],
    )
    results: dict[int, R] = {}

    def worker(prefer_small: bool) -> None:
        while (taken := queues.take(prefer_small)) is not None:
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
