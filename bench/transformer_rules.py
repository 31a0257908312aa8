"""What the transformer rules cost: the full audit with and without ``untrained-token``,
``essential-weight``, ``quantization-error`` (``--rules tokens``), ``head-circuits`` and
``moe-experts`` (``--rules structure``) or all five (``--rules all``, the default), on the
same file.

Run from the repository root::

    python bench/transformer_rules.py                    # fp32, 5 rounds, all five rules
    python bench/transformer_rules.py --dtype bf16 --rounds 7
    python bench/transformer_rules.py --model moe --rules structure

The ``dense`` checkpoint is ``bench/audit_speed.py``'s seeded transformer-shaped safetensors
file (vocabulary 8000, width 512, 4 blocks, feed-forward 1408, untied head: ~21M parameters)
with a head count (8 heads of 64) in its config.json; ``moe`` has the same attention and 8
routed experts of width 352 plus a router per block (~23M parameters). Each round runs, each in a
fresh child process (one untimed warm-up call first), the audit with the chosen rules disabled
by policy ("before") and the full audit ("after"), default ``--jobs``. Target: median after /
median before <= 1.3.
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

SHAPES = {
    # 8 heads of 64 (the config names them, so head-circuits judges every block).
    "dense": Shape(vocab=8000, hidden=512, intermediate=1408, layers=4, heads=8),
    # The same width with 8 routed experts of 352 per block (~23M parameters).
    "moe": Shape(vocab=8000, hidden=512, intermediate=352, layers=4, heads=8, experts=8),
}
RULE_SETS = {
    "tokens": ("untrained-token", "essential-weight", "quantization-error"),
    "structure": ("head-circuits", "moe-experts"),
}
RULE_SETS["all"] = RULE_SETS["tokens"] + RULE_SETS["structure"]
NEW_RULES: tuple[str, ...] = RULE_SETS["all"]


def child(mode: str, path: str, jobs: str, rules: str) -> None:
    from steelyard.api import audit
    from steelyard.policy import Policy

    off = {"enabled": False}
    policy = Policy(rules={name: off for name in RULE_SETS[rules]}) if mode == "before" else None
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
    parser.add_argument("--model", choices=tuple(SHAPES), default="dense")
    parser.add_argument("--rules", choices=tuple(RULE_SETS), default="all",
                        help="which rules 'before' leaves out: the token rules, the head and "
                        "expert rules, or all five")
    parser.add_argument("--child", nargs=4, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        child(*args.child)
        return
    shape = SHAPES[args.model]
    new_rules = RULE_SETS[args.rules]
    folder = Path(tempfile.mkdtemp(prefix="steelyard-bench-"))
    try:
        path = write_checkpoint(folder, shape, args.dtype, shard_bytes=2**40, seed=1, weights=args.weights)
        print(f"machine: {machine()}")
        print(f"checkpoint ({args.model}): {shape.parameters:,} parameters {args.dtype} ({args.weights}), "
              f"{path.stat().st_size / MIB:,.1f} MiB")
        before, after = [], []
        for _ in range(args.rounds):
            before.append(run_child(Path(__file__), ["before", str(path), args.jobs, args.rules]))
            after.append(run_child(Path(__file__), ["after", str(path), args.jobs, args.rules]))
        t_before = statistics.median(r["seconds"] for r in before)
        t_after = statistics.median(r["seconds"] for r in after)
        ratio = t_after / t_before
        print(f"audit without {', '.join(new_rules)}: median {t_before * 1e3:.1f} ms, "
              f"findings {before[0]['findings']}")
        print(f"full audit: median {t_after * 1e3:.1f} ms, findings {after[0]['findings']}")
        print(f"ratio {ratio:.2f} (target <= 1.3): {'ok' if ratio <= 1.3 else 'OVER'}")
        if ratio > 1.3:
            sys.exit(1)
    finally:
        shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    main()
