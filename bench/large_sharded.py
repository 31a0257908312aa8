"""Target C: the full audit of large sharded bf16 checkpoints against a hand-written scan.

Run from the repository root::

    python bench/large_sharded.py                  # about 300M and 1.3B parameters
    python bench/large_sharded.py --sizes 300m --jobs 2

For each size a seeded decoder-only transformer (q/k/v/o and gate/up/down projections,
RMS-norm weights, untied head, vocabulary 32000) is written in bf16 with the ``safetensors``
package in shards of at most 1.5 GiB (and at least two), with a ``config.json`` (``model_type`` llama,
``hidden_act`` silu), into a temporary folder that is deleted afterwards; free disk is
checked first and the sizes are scaled down (with a note) when it is short.

Measured, each in a fresh child process, with the page cache warm for all of them:

* ``baseline``: what a user would write by hand with the safetensors package: for every
  tensor ``safe_open(...).get_tensor(name)``, widen to float32, ``numpy.linalg.norm(x,
  axis=1)`` for 2-D tensors and ``numpy.isnan(x).any()``;
* ``audit``: ``steelyard.api.audit(index, jobs=N)`` with every rule enabled;
* ``audit-1``: the same with ``jobs=1``; its JSON report must equal the ``jobs=N`` one
  (``SOURCE_DATE_EPOCH`` fixes the timestamp);
* ``core``: the audit with ``twin-units`` and ``untrained-layer`` disabled by policy, to
  show what the shared pass and the other rules cost on their own;
* ``searched`` (with ``--searched``): the full audit with ``twin-units``'s
  ``report-unlinked`` on, so that every layer goes through the twin search (by default a
  layer whose twins could not be reported, as in these models, is not searched).

Every file is read once before the first measurement, so that all of them see a warm page
cache. ``baseline``, ``audit``, ``core`` and ``searched`` are repeated ``--rounds`` times,
interleaved round by round so that drifting load on a shared machine touches all of them
alike (median time, largest peak); ``audit-1`` runs once.

Targets: audit time <= 1.5 × baseline, peak RSS (VmHWM) < 1.5 GiB, identical reports.
"""

from __future__ import annotations

import argparse
import shutil
import statistics
import sys
import tempfile
import time
from pathlib import Path

from _common import (
    WEIGHTS,
    MemoryProbe,
    Shape,
    emit,
    machine,
    mib,
    run_child,
    shard_files,
    write_checkpoint,
)

SIZES = {
    "300m": Shape(vocab=32000, hidden=1024, intermediate=2816, layers=20),
    "1.3b": Shape(vocab=32000, hidden=2048, intermediate=5632, layers=24),
    # Not run by default: the sizes of today's large models in a few blocks (a 256k-row
    # vocabulary, 4096-wide attention with grouped 1024-wide keys and values, 16384-wide
    # feed-forward); 2.6B parameters, 5.2 GB on disk.
    "wide": Shape(vocab=256000, hidden=4096, intermediate=16384, layers=2, kv=1024),
}
SHARD_BYTES = 3 * 2**29  # 1.5 GiB
GIB = 2**30


def baseline(path: Path) -> int:
    import ml_dtypes  # noqa: F401 - the numpy backend of safetensors needs it for bf16
    import numpy as np
    from safetensors import safe_open

    nans = 0
    for file in shard_files(path):
        with safe_open(str(file), framework="numpy") as handle:
            for name in handle.keys():  # noqa: SIM118 - safe_open has no __iter__
                x = handle.get_tensor(name).astype(np.float32)
                if x.ndim == 2:
                    np.linalg.norm(x, axis=1)
                nans += bool(np.isnan(x).any())
                del x
    return nans


def child(mode: str, path_text: str, jobs: str, out: str) -> None:
    path = Path(path_text)
    with MemoryProbe() as probe:
        start = time.perf_counter()
        if mode == "baseline":
            baseline(path)
            extra: dict[str, object] = {}
        else:
            from steelyard.api import audit
            from steelyard.policy import Policy

            policy = None
            if mode == "core":
                off = {"enabled": False}
                policy = Policy(rules={"twin-units": off, "untrained-layer": off})
            elif mode == "searched":
                policy = Policy(rules={"twin-units": {"report-unlinked": True}})
            report = audit(path, policy=policy, jobs=int(jobs))
            Path(out).write_text(report.to_json())
            extra = {"findings": len(report.audits[0].findings)}
        seconds = time.perf_counter() - start
    emit({"seconds": seconds, **extra, **probe.report()})


def fit_to_disk(names: list[str], folder: Path) -> list[tuple[str, Shape, str]]:
    """The sizes that fit the free disk (one at a time, with 1 GiB to spare)."""
    free = shutil.disk_usage(folder).free
    chosen: list[tuple[str, Shape, str]] = []
    for name in names:
        shape = SIZES[name]
        note = ""
        while 2 * shape.parameters + GIB > free and shape.layers > 2:
            shape = Shape(shape.vocab, shape.hidden, shape.intermediate, shape.layers // 2)
            note = f"scaled down to {shape.layers} blocks: {free / GIB:.1f} GiB free disk"
        chosen.append((name, shape, note))
    return chosen


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", default="300m,1.3b")
    parser.add_argument("--jobs", type=int, default=None, help="default: the machine's cores")
    parser.add_argument("--weights", choices=WEIGHTS, default="trained")
    parser.add_argument("--skip-core", action="store_true")
    parser.add_argument("--searched", action="store_true", help="also time every layer searched")
    parser.add_argument("--rounds", type=int, default=3, help="repeats of the timed runs")
    parser.add_argument("--child", nargs=4, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        child(*args.child)
        return
    import os

    jobs = args.jobs or len(os.sched_getaffinity(0))
    root = Path(tempfile.mkdtemp(prefix="steelyard-bench-"))
    env = {"SOURCE_DATE_EPOCH": "1700000000"}
    failed = False
    print(f"machine: {machine()}")
    try:
        for name, shape, note in fit_to_disk(args.sizes.split(","), root):
            folder = root / name
            started = time.perf_counter()
            # At least two shards, at most 1.5 GiB each.
            shard = min(SHARD_BYTES, shape.parameters + 64 * 2**20)
            path = write_checkpoint(folder, shape, "bf16", shard, seed=2, weights=args.weights)
            shards = len(list(folder.glob("*.safetensors")))
            print(
                f"\n{name}: {shape.parameters:,} parameters bf16 ({args.weights}), {shards} shards, "
                f"largest tensor {mib(2 * shape.largest)} ({mib(4 * shape.largest)} float32); "
                f"written in {time.perf_counter() - started:.0f} s {note}"
            )
            for file in shard_files(path):  # warm the page cache for every run alike
                with open(file, "rb") as handle:
                    while handle.read(64 * 2**20):
                        pass
            # (mode, jobs, rounds); the repeated runs are interleaved round by round.
            modes = [("baseline", jobs, args.rounds), ("audit", jobs, args.rounds)]
            modes.append(("audit-1", 1, 1))
            if not args.skip_core:
                modes.append(("core", jobs, args.rounds))
            if args.searched:
                modes.append(("searched", jobs, args.rounds))
            results: dict[str, list[dict[str, object]]] = {mode: [] for mode, _, _ in modes}
            for round_index in range(max(rounds for _, _, rounds in modes)):
                for mode, j, rounds in modes:
                    if round_index < rounds:
                        out = folder / f"{mode}.json"
                        argv = [mode.split("-")[0], str(path), str(j), str(out)]
                        results[mode].append(run_child(Path(__file__), argv, env))
            runs: dict[str, dict[str, object]] = {}
            for mode, j, _ in modes:
                result = dict(results[mode][0])
                result["seconds"] = statistics.median(float(r["seconds"]) for r in results[mode])
                result["vm_hwm"] = max(float(r["vm_hwm"]) for r in results[mode])
                result["peak_anon"] = max(float(r["peak_anon"]) for r in results[mode])
                runs[mode] = result
                times = ", ".join(f"{float(r['seconds']):.1f}" for r in results[mode])
                print(
                    f"  {mode:<9} jobs {j}: {float(result['seconds']):7.1f} s, "
                    f"VmHWM {mib(float(result['vm_hwm']))}, peak anonymous "
                    f"{mib(float(result['peak_anon']))}"
                    + (f", {result['findings']} findings" if "findings" in result else "")
                    + (f" (runs: {times} s)" if len(results[mode]) > 1 else "")
                )
            base = float(runs["baseline"]["seconds"])
            ratio = float(runs["audit"]["seconds"]) / base
            same = (folder / "audit.json").read_text() == (folder / "audit-1.json").read_text()
            peak = max(float(runs[m]["vm_hwm"]) for m in ("audit", "audit-1"))
            if "searched" in runs:
                searched = float(runs["searched"]["seconds"]) / base
                print(f"  ratio searched/baseline {searched:.2f} (every layer twin-searched)")
            print(
                f"  ratio audit/baseline {ratio:.2f} (target <= 1.5): {'ok' if ratio <= 1.5 else 'OVER'}"
            )
            if "core" in runs:
                core = float(runs["core"]["seconds"]) / base
                print(f"  ratio core/baseline {core:.2f} (twin-units and untrained-layer off)")
            print(
                f"  peak RSS {mib(peak)} (target < 1536 MiB): {'ok' if peak < 1.5 * GIB else 'OVER'}"
            )
            print(f"  reports with jobs {jobs} and jobs 1 identical: {same}")
            failed |= ratio > 1.5 or peak >= 1.5 * GIB or not same
            shutil.rmtree(folder, ignore_errors=True)
    finally:
        shutil.rmtree(root, ignore_errors=True)
    if failed:
        sys.exit(1)


if __name__ == "__main__":
    main()
