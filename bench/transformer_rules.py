"""What the transformer rules cost: the full audit with and without ``untrained-token``,
``essential-weight`` and ``quantization-error``, on the same file.

Run from the repository root::

    python bench/transformer_rules.py                    # fp32, 5 rounds
    python bench/transformer_rules.py --dtype bf16 --rounds 7

The checkpoint is ``bench/audit_speed.py``'s seeded transformer-shaped safetensors file
(vocabulary 8000, width 512, 4 blocks, feed-forward 1408, untied head: ~21M parameters).
Each round runs, each in a fresh child process (one untimed warm-up call first), the audit
with the three rules disabled by policy ("before": today's audit) and the full audit
("after"), default ``--jobs``. Target: median after / median before <= 1.3.
"""

from __future__ import annotations

import argparse
import shutil
import statistics
import sys
import tempfile
import time
from pathlib import Path

from _common import MIB, WEIGHTS, Shape, emit, machine, run_child, write_checkpoint

SHAPE = Shape(vocab=8000, hidden=512, intermediate=1408, layers=4)
NEW_RULES = ("untrained-token", "essential-weight", "quantization-error")


def child(mode: str, path: str, jobs: str) -> None:
    from steelyard.api import audit
    from steelyard.policy import Policy

    off = {"enabled": False}
    policy = Policy(rules={name: off for name in NEW_RULES}) if mode == "before" else None
    audit(path, policy=policy, jobs=1)  # warm-up: lazy imports, page cache
    seconds = time.perf_counter()
    report = audit(path, policy=policy, jobs=int(jobs) if jobs != "default" else None)
    seconds = time.perf_counter() - seconds
    emit({"seconds": seconds, "findings": len(report.audits[0].findings)})


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--dtype", choices=("f32", "bf16"), default="f32")
    parser.add_argument("--rounds", type=int, default=5)
    parser.add_argument("--jobs", default="default")
    parser.add_argument("--weights", choices=WEIGHTS, default="trained")
    parser.add_argument("--child", nargs=3, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        child(*args.child)
        return
    folder = Path(tempfile.mkdtemp(prefix="steelyard-bench-"))
    try:
        path = write_checkpoint(folder, SHAPE, args.dtype, shard_bytes=2**40, seed=1, weights=args.weights)
        print(f"machine: {machine()}")
        print(f"checkpoint: {SHAPE.parameters:,} parameters {args.dtype} ({args.weights}), "
              f"{path.stat().st_size / MIB:,.1f} MiB")
        before, after = [], []
        for _ in range(args.rounds):
            before.append(run_child(Path(__file__), ["before", str(path), args.jobs]))
            after.append(run_child(Path(__file__), ["after", str(path), args.jobs]))
        t_before = statistics.median(r["seconds"] for r in before)
        t_after = statistics.median(r["seconds"] for r in after)
        ratio = t_after / t_before
        print(f"audit without {', '.join(NEW_RULES)}: median {t_before * 1e3:.1f} ms, "
              f"findings {before[0]['findings']}")
        print(f"full audit: median {t_after * 1e3:.1f} ms, findings {after[0]['findings']}")
        print(f"ratio {ratio:.2f} (target <= 1.3): {'ok' if ratio <= 1.3 else 'OVER'}")
        if ratio > 1.3:
            sys.exit(1)
    finally:
        shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    main()
