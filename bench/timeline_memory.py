"""``steelyard timeline`` memory does not grow with the number of checkpoints.

Run from the repository root::

    python bench/timeline_memory.py                  # 40 checkpoints, ~17 MB bf16 each
    python bench/timeline_memory.py --scale 0.5 --count 20

One run of ``--count`` checkpoints of the same transformer-shaped model (seeded bf16 weights
written with the ``safetensors`` package, each checkpoint its own draw, folders
``checkpoint-<step>/``) is written to a temporary folder. Each step below runs in a fresh
child process and reports its peak resident set (``VmHWM``) and peak anonymous memory:

* ``read``: the plain read of one checkpoint's bytes with ``safetensors.numpy.load_file``
  (the baseline: what holding one checkpoint costs);
* ``audit``: ``steelyard.audit`` of one checkpoint (what the timeline does per checkpoint);
* ``timeline-few``: ``steelyard.timeline`` over the first quarter of the checkpoints;
* ``timeline-all``: ``steelyard.timeline`` over all of them.

The target: peak RSS of ``timeline-all`` / ``timeline-few`` <= 1.10 (the exit code says
whether it was met). The run folder is deleted afterwards.
"""

from __future__ import annotations

import argparse
import shutil
import sys
import tempfile
import time
from pathlib import Path

from _common import MemoryProbe, Shape, emit, machine, mib, run_child, write_checkpoint

TARGET = 1.10
BASE = Shape(vocab=4096, hidden=384, intermediate=1024, layers=3)


def child(mode: str, paths: list[str]) -> None:
    import ml_dtypes  # noqa: F401  (bf16 for the safetensors numpy backend)
    from safetensors.numpy import load_file

    import steelyard
    from steelyard.policy import Policy

    started = time.perf_counter()  # the work only, imports excluded
    with MemoryProbe() as probe:
        if mode == "read":
            tensors = load_file(paths[0])
            probe.sample()
            del tensors
        elif mode == "audit":
            steelyard.audit(paths[0], policy=Policy(), jobs=1)
        else:
            result = steelyard.timeline(paths, policy=Policy(), jobs=1)
            assert len(result.checkpoints) == len(paths)
    emit({**probe.report(), "seconds": time.perf_counter() - started})


def _shape(scale: float) -> Shape:
    return Shape(
        vocab=max(256, int(BASE.vocab * scale)),
        hidden=max(64, int(BASE.hidden * scale)),
        intermediate=max(128, int(BASE.intermediate * scale)),
        layers=BASE.layers,
    )


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--child", nargs="+")
    parser.add_argument("--count", type=int, default=40)
    parser.add_argument("--scale", type=float, default=1.0)
    args = parser.parse_args()
    if args.child:
        child(args.child[0], args.child[1:])
        return 0
    shape = _shape(args.scale)
    few = max(2, args.count // 4)
    folder = Path(tempfile.mkdtemp(prefix="steelyard-timeline-"))
    try:
        paths = [
            str(
                write_checkpoint(
                    folder / f"checkpoint-{100 * (i + 1)}", shape, "bf16", 2**40, seed=i
                )
            )
            for i in range(args.count)
        ]
        script = Path(__file__).resolve()
        rows = {
            "read": run_child(script, ["read", paths[0]]),
            "audit": run_child(script, ["audit", paths[0]]),
            f"timeline-{few}": run_child(script, ["timeline", *paths[:few]]),
            f"timeline-{args.count}": run_child(script, ["timeline", *paths]),
        }
    finally:
        shutil.rmtree(folder, ignore_errors=True)
    print(f"machine: {machine()}")
    print(
        f"model: {shape.parameters:,} parameters bf16 ({mib(2 * shape.parameters)} per "
        f"checkpoint), {args.count} checkpoints"
    )
    print(f"{'step':<16} {'start RSS':>10} {'VmHWM':>10} {'peak RssAnon':>14} {'seconds':>8}")
    for name, row in rows.items():
        start, hwm, anon = mib(row["start_rss"]), mib(row["vm_hwm"]), mib(row["peak_anon"])
        print(f"{name:<16} {start:>10} {hwm:>10} {anon:>14} {row['seconds']:>8.1f}")
    added = rows[f"timeline-{args.count}"]["seconds"] - rows[f"timeline-{few}"]["seconds"]
    print(
        f"timeline seconds per added checkpoint: {added / (args.count - few):.2f} "
        f"(one audit: {rows['audit']['seconds']:.2f}; the rest is drift and its extra reads)"
    )
    ratio = rows[f"timeline-{args.count}"]["vm_hwm"] / rows[f"timeline-{few}"]["vm_hwm"]
    anon = rows[f"timeline-{args.count}"]["peak_anon"] / rows[f"timeline-{few}"]["peak_anon"]
    print(f"peak RSS ratio {args.count} / {few} checkpoints: {ratio:.3f} (target <= {TARGET})")
    print(f"peak RssAnon ratio {args.count} / {few} checkpoints: {anon:.3f}")
    return 0 if ratio <= TARGET else 1


if __name__ == "__main__":
    sys.exit(main())
