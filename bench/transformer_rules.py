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
by policy ("before") and the full audit ("after"), default ``--jobs``; and, unless
``--reference none``, the audit of the code as it was before the transformer rules existed
("reference": ``git archive`` of ``--reference``, by default the parent of the commit that
added them, run through that revision's own ``audit_one``).

Two ratios are printed. ``after / reference`` is the issue's target (the audit with the
transformer rules costs at most 1.3 × the audit as it was); ``after / before`` is the rules'
marginal cost on today's code, which grows as the rest of the audit gets faster and is
printed so that this is never hidden.
"""

from __future__ import annotations

import argparse
import io
import shutil
import statistics
import subprocess
import sys
import tarfile
import tempfile
import time
from pathlib import Path

from _common import MIB, ROOT, WEIGHTS, Shape, emit, machine, run_child, write_checkpoint

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
#: The parent of the commit that added untrained-token, essential-weight and quantization-error
#: (cd4b36e): the audit as it was before the transformer rules.
REFERENCE = "cd4b36e~1"


def extract(revision: str, into: Path) -> Path:
    """``src/`` of ``revision`` (``git archive``) under ``into``; returns that ``src``."""
    archive = subprocess.run(
        ["git", "-C", str(ROOT), "archive", revision, "src"], capture_output=True, check=True
    ).stdout
    with tarfile.open(fileobj=io.BytesIO(archive)) as tar:
        tar.extractall(into, filter="data")
    return into / "src"


def child(mode: str, path: str, jobs: str, rules: str) -> None:
    if mode.startswith("reference="):
        reference(mode.removeprefix("reference="), path, jobs)
        return
    from steelyard.api import audit
    from steelyard.policy import Policy

    off = {"enabled": False}
    policy = Policy(rules={name: off for name in RULE_SETS[rules]}) if mode == "before" else None
    audit(path, policy=policy, jobs=1)  # warm-up: lazy imports, page cache
    seconds = time.perf_counter()
    report = audit(path, policy=policy, jobs=int(jobs) if jobs != "default" else None)
    seconds = time.perf_counter() - seconds
    emit({"seconds": seconds, "findings": len(report.audits[0].findings)})


def reference(src: str, path: str, jobs: str) -> None:
    """The audit of the reference revision's code (its API then: ``audit_one(path, policy)``)."""
    sys.path.insert(0, src)
    from steelyard.api import audit_one  # type: ignore[attr-defined]
    from steelyard.policy import Policy

    assert Path(sys.modules["steelyard.api"].__file__ or "").is_relative_to(src)
    count = int(jobs) if jobs != "default" else None
    audit_one(path, Policy(), jobs=1)  # warm-up: lazy imports, page cache
    seconds = time.perf_counter()
    report = audit_one(path, Policy(), jobs=count)
    seconds = time.perf_counter() - seconds
    emit({"seconds": seconds, "findings": len(report.findings)})


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
    parser.add_argument("--reference", default=REFERENCE,
                        help="git revision whose audit is the target's baseline ('none': skip)")
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
        modes = ["before", "after"]
        if args.reference != "none":
            modes.append("reference=" + str(extract(args.reference, folder / "reference")))
        runs: dict[str, list[dict[str, float]]] = {mode: [] for mode in modes}
        for _ in range(args.rounds):  # interleaved, so drifting load touches every mode alike
            for mode in modes:
                runs[mode].append(run_child(Path(__file__), [mode, str(path), args.jobs, args.rules]))
        median = {mode: statistics.median(r["seconds"] for r in done) for mode, done in runs.items()}
        print(f"audit without {', '.join(new_rules)}: median {median['before'] * 1e3:.1f} ms, "
              f"findings {runs['before'][0]['findings']}")
        print(f"full audit: median {median['after'] * 1e3:.1f} ms, findings {runs['after'][0]['findings']}")
        marginal = median["after"] / median["before"]
        print(f"after / before {marginal:.2f} (the rules' marginal cost on today's code)")
        if len(modes) == 3:
            ref = median[modes[2]]
            ratio = median["after"] / ref
            print(f"audit at {args.reference}: median {ref * 1e3:.1f} ms, "
                  f"findings {runs[modes[2]][0]['findings']}")
            print(f"after / reference {ratio:.2f} (target <= 1.3): {'ok' if ratio <= 1.3 else 'OVER'}")
            if ratio > 1.3:
                sys.exit(1)
    finally:
        shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    main()
