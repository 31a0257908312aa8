"""What two warm worker *processes* could make of the layer tasks, against the threads used.

The audit's workers are threads (DEVELOPERS.md, "Why threads and not processes"). On small
models their time is interpreter time, which threads take in turns; this measures the
alternative's upper bound. One worker process is forked once at start-up and kept; for each
timed round the parent writes every task index into a pipe and both processes claim tasks
from it (4 bytes a claim, atomic), costliest first, each on its own ``LayerStats`` over its
own load of the checkpoint: the files' digest and every per-layer rule hook on every layer,
then every rule's ``finish``. Results are discarded: no hand-over, no merging, no report,
so the real thing would cost a few milliseconds more (the prototype of section B handed
back about 0.5 MB of statistics per 21M audit). Both processes have run several rounds
before the timed ones, so neither pays first-touch page faults (the cost that sank the
per-audit fork).

Printed, medians of ``--rounds``: the split over two processes, the same tasks run in turn
by one process, and ``steelyard.api.audit(path)`` with its
default threads, all measured in this run. The checkpoint is section B's 21M shape (or a
safetensors path given with ``--path``).

Usage: python bench/process_split.py [--weights gaussian|trained] [--rounds 7] [--path P]
"""

from __future__ import annotations

import os

# One BLAS thread for the whole process, set before numpy loads OpenBLAS: OpenBLAS stops its
# threads at a fork and starts them again at the next multi-threaded call, after which they
# spin for about 100 ms, on the cores the next measurement needs. The audit's layer work
# runs on one BLAS thread per worker anyway.
os.environ["OPENBLAS_NUM_THREADS"] = "1"

import argparse
import shutil
import statistics
import struct
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

from _common import WEIGHTS, machine, write_checkpoint
from audit_speed import SHAPES

from steelyard.api import audit
from steelyard.blas import blas_threads
from steelyard.checkpoint_audit import _parameters, _task_groups, digest_of
from steelyard.loaders import load
from steelyard.policy import Policy
from steelyard.rules import AuditContext, RuleSettings, registry
from steelyard.rules.base import RuleMeasurements, RuleNotes
from steelyard.stats import LayerStats

_DIGEST = (-1,)


def _tasks(path: str) -> list[tuple[int, ...]]:
    """The digest, then the audit's layer tasks, costliest first (as the audit orders them)."""
    checkpoint = load(path)
    groups = _task_groups(checkpoint.layers)
    groups.sort(key=lambda g: -sum(_parameters(checkpoint, checkpoint.layers[i]) for i in g))
    return [_DIGEST, *groups]


def _claim(queue: int) -> int | None:
    data = os.read(queue, 4)
    index = struct.unpack("<i", data)[0] if data else -1
    return None if index < 0 else index


def work(path: str, tasks: list[tuple[int, ...]], queue: int) -> None:
    """Load the checkpoint, run the claimed tasks with every rule, then every ``finish``."""
    checkpoint = load(path)
    policy = Policy()
    stats = LayerStats(checkpoint)
    context = AuditContext(
        checkpoint=checkpoint, stats=stats, policy=policy, gradients=None,
        notes=RuleNotes(), measurements=RuleMeasurements(),
    )
    specs = list(registry().values())
    settings: dict[str, RuleSettings[Any]] = {s.name: RuleSettings(s, policy) for s in specs}
    hooked = [s for s in specs if s.per_layer is not None]
    with blas_threads(1):
        while (index := _claim(queue)) is not None:
            if tasks[index] == _DIGEST:
                digest_of(checkpoint.files or (checkpoint.path,))
                continue
            for i in tasks[index]:
                layer = checkpoint.layers[i]
                for spec in hooked:
                    assert spec.per_layer is not None
                    if settings[spec.name].enabled(layer):
                        list(spec.per_layer(context, settings[spec.name], layer))
                stats.spread(layer)
                stats.release(layer)
        for spec in specs:
            if spec.finish is not None:
                list(spec.finish(context, settings[spec.name]))


def fill(queue_in: int, count: int, stops: int) -> None:
    """Every task index, then one stop mark per process that will claim."""
    os.write(queue_in, struct.pack(f"<{count + stops}i", *range(count), *([-1] * stops)))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--weights", choices=WEIGHTS, default="gaussian")
    parser.add_argument("--rounds", type=int, default=7)
    parser.add_argument("--path", help="a safetensors checkpoint instead of the 21M draw")
    args = parser.parse_args()
    folder = Path(tempfile.mkdtemp(prefix="steelyard-split-"))
    try:
        path = args.path or str(
            write_checkpoint(folder, SHAPES["base"], "bf16", 2**40, seed=1, weights=args.weights)
        )
        tasks = _tasks(path)
        queue, queue_in = os.pipe()
        go_r, go_w = os.pipe()
        done_r, done_w = os.pipe()
        pid = os.fork()
        if pid == 0:  # the worker: one round per byte on its command pipe, until closed
            for unused in (go_w, done_r, queue_in):
                os.close(unused)  # or the command pipe would never reach its end
            try:
                while os.read(go_r, 1):
                    work(path, tasks, queue)
                    os.write(done_w, b"x")
            finally:
                os._exit(0)

        def split() -> None:
            fill(queue_in, len(tasks), 2)
            os.write(go_w, b"g")
            work(path, tasks, queue)
            os.read(done_r, 1)

        def alone() -> None:
            fill(queue_in, len(tasks), 1)
            work(path, tasks, queue)

        def threads() -> None:
            audit(path)

        measured: dict[str, list[float]] = {"split": [], "alone": [], "threads": []}
        steps = {"split": split, "alone": alone, "threads": threads}
        for _ in range(3):  # warm every process and allocator first
            for step in steps.values():
                step()
        for _ in range(args.rounds):
            for name, step in steps.items():
                start = time.perf_counter()
                step()
                measured[name].append(time.perf_counter() - start)
        os.close(go_w)
        os.waitpid(pid, 0)
        median = {k: statistics.median(v) * 1e3 for k, v in measured.items()}
        print(f"machine: {machine()}")
        print(f"checkpoint: {path} ({args.weights if not args.path else 'given'}), {len(tasks) - 1} layer tasks")
        print(
            f"two warm processes: {median['split']:.1f} ms; one process, same tasks: "
            f"{median['alone']:.1f} ms ({median['alone'] / median['split']:.2f} ×); "
            f"the audit on its default threads: {median['threads']:.1f} ms "
            f"({median['threads'] / median['split']:.2f} × the split)"
        )
    finally:
        shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    sys.exit(main())
