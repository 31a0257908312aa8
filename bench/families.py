"""Weight families: the full audit against a hand-written scan and a plain read, on weights
of several kinds drawn for the same shapes.

Run from the repository root::

    python bench/families.py                        # the quick size (34M), every family
    python bench/families.py --sizes quick,300m --rounds 3
    python bench/families.py --sizes 300m --families near-duplicate,gaussian
    python bench/families.py --sizes 300m-narrow --rounds 1

A benchmark whose weights all look alike can be tuned to. Every size is drawn here in five
families (seeded, bf16, at least two shards, ``config.json`` of a llama model; the draws are
in ``bench/_common.py``):

* ``gaussian``: i.i.d. N(0, 1/fan_in), a never-trained model;
* ``trained``: the published benchmarks' draw (per-unit log-normal scales, a rank-4 part);
* ``lowrank-heavytail``: a power-law part (s_k ∝ k^-1 over rank 64, s_1 at 6 × the noise's
  Marchenko–Pastur edge: rows share a few strong directions) plus Student-t noise
  (ν = 5) at the initialisation scale, per-row scales;
* ``outlier-channels``: ``lowrank-heavytail`` with a few input columns at 20–50 × the median
  column norm (the same channels in every matrix of a width) and a few rows 8 × larger;
* ``near-duplicate``: ``lowrank-heavytail`` in which 30 % of the rows are copies of another
  row plus noise of 1e-3 of its norm (bf16 rounds most of that noise away).

Measured for each family, each in a fresh child process, interleaved round by round across
families and steps (median time, largest peak), with the page cache warm (every file is read
just before each family's steps):

* ``floor``: one sequential read of the checkpoint's bytes, ``readinto`` a 16 MiB buffer;
* ``scan``: for every tensor ``safe_open(...).get_tensor``, widen to float32,
  ``numpy.linalg.norm(x, axis=1)`` for 2-D tensors, ``numpy.isnan(x).any()``;
* ``audit``: ``steelyard.api.audit(path)``, every rule enabled, default ``--jobs``;
* ``audit-1``: the same with ``jobs=1``: how the audit scales with cores, and whether its
  report (all but the creation time) is the same as with the default jobs;
* ``searched``: the same with ``twin-units``'s ``report-unlinked`` on, so every layer is
  twin-searched (a llama block's projections otherwise are not: no consumer to merge into);
* ``pair``: two ``audit-1`` children at once, each in its own process, their timed calls
  started together: how much two independent audits slow each other on this machine (the
  memory system, caches, the host's scheduling). ``2 × audit-1 / pair`` is the most any
  two-worker audit could gain here, whatever its design: the ceiling of ``jobs 2``.

``scan``, ``audit`` and ``searched`` children first import what they need and run their
step once on a tiny checkpoint (lazy imports), untimed but reported as ``startup``; the
timed call is the second. After the rounds, one more child per family and variant times
every rule's hooks on one thread (``_common.rule_shares``).

Nothing is asserted: the issue's targets (audit <= 1.0 × scan on trained-like weights,
<= 1.3 × on the others, <= 12 × the floor, peak RSS < 1 GiB) are printed beside the ratios.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import shutil
import statistics
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

from _common import (
    WEIGHTS,
    MemoryProbe,
    Shape,
    emit,
    machine,
    mib,
    rule_shares,
    run_child,
    run_children,
    shard_files,
    write_checkpoint,
)

SIZES = {
    "quick": Shape(vocab=8000, hidden=512, intermediate=1408, layers=8),
    "300m": Shape(vocab=32000, hidden=1024, intermediate=2816, layers=20),
    "1.3b": Shape(vocab=32000, hidden=2048, intermediate=5632, layers=24),
    # About 300M parameters spent on 83 narrow blocks (width 512): 581 matrices of 2^18 to
    # 2^20 weights, every one a small layer, so the audit's per-layer work and its interpreter
    # lock decide its time rather than its bytes (docs/performance.md, D, seventeenth session).
    "300m-narrow": Shape(vocab=32000, hidden=512, intermediate=1408, layers=83),
    # A fine-grained mixture of experts: 32 experts of 512 per block, 576 expert matrices of
    # 512 x 1024 in 393M parameters (every one a small layer; see docs/performance.md, D).
    "moe": Shape(vocab=32000, hidden=1024, intermediate=512, layers=6, heads=16, experts=32),
}
TINY = Shape(vocab=256, hidden=64, intermediate=128, layers=1)
FAMILIES = ("gaussian", "trained", "lowrank-heavytail", "outlier-channels", "near-duplicate")
STEPS = ("floor", "scan", "audit", "audit-1", "searched", "pair")
#: Seconds the two children of ``pair`` are given to start before their timed calls begin.
PAIR_START = 4.0
SHARD_BYTES = 3 * 2**29  # 1.5 GiB
CHUNK = 16 * 2**20
GIB = 2**30
#: The issue's trained-like families (target 1.0 × the scan): correlated rows, and the same
#: with outlier channels; i.i.d. and near-duplicate rows get 1.3 ×.
TRAINED_LIKE = ("trained", "lowrank-heavytail", "outlier-channels")


# ---- children -------------------------------------------------------------------------------
def floor(path: Path) -> int:
    """One sequential read of every shard into one reused buffer."""
    buffer = bytearray(CHUNK)
    view = memoryview(buffer)
    total = 0
    for file in shard_files(path):
        with open(file, "rb", buffering=0) as handle:
            while count := handle.readinto(view):
                total += count
    return total


def scan(path: Path) -> int:
    """What a user would write by hand with the safetensors package."""
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


def _policy(step: str) -> Any:
    from steelyard.policy import Policy

    return Policy(rules={"twin-units": {"report-unlinked": True}}) if step == "searched" else None


def child(step: str, path_text: str, tiny_text: str) -> None:
    path, tiny = Path(path_text), Path(tiny_text)
    started = time.perf_counter()
    extra: dict[str, object] = {}
    if step in ("shares", "shares-searched"):
        # Imported first, or its import (about a second) is charged to the first rule.
        import ml_dtypes
        from threadpoolctl import threadpool_limits

        # One BLAS thread, as each of the audit's workers has: two threads on a busy
        # machine made small products several times slower.
        with threadpool_limits(1):
            emit({"shares": rule_shares(str(path), _policy(step.replace("shares-", "")))})
        return
    if step == "scan":
        import ml_dtypes  # noqa: F401 - the numpy backend of safetensors needs it for bf16

        scan(tiny)
    elif step in ("audit", "audit-1", "searched", "pair"):
        from steelyard.api import audit

        audit(tiny, policy=_policy(step))
    startup = time.perf_counter() - started
    if step == "pair":
        # Both children begin their timed call at the same wall-clock instant.
        time.sleep(max(0.0, float(os.environ["STEELYARD_BENCH_START"]) - time.time()))
    # No polling thread while timed (see MemoryProbe): VmHWM gives the peak RSS.
    with MemoryProbe(sample=False) as probe:
        extra["began"] = time.time()  # wall clock: a pair's two children are compared
        start = time.perf_counter()
        if step == "floor":
            extra["bytes"] = floor(path)
        elif step == "scan":
            scan(path)
        else:
            one = step in ("audit-1", "pair")
            report = audit(path, policy=_policy(step), jobs=1 if one else None)
            extra["findings"] = len(report.audits[0].findings)
        seconds = time.perf_counter() - start
    if step in ("audit", "audit-1"):
        # Reports must not depend on --jobs: everything but the creation time is compared.
        document = json.loads(report.render("json"))
        document.pop("created", None)
        extra["report_sha256"] = hashlib.sha256(json.dumps(document, sort_keys=True).encode()).hexdigest()
    emit({"seconds": seconds, "startup": startup, **extra, **probe.report()})


# ---- parent -----------------------------------------------------------------------------------
def warm(path: Path) -> None:
    for file in shard_files(path):
        with open(file, "rb") as handle:
            while handle.read(64 * 2**20):
                pass


def write(folder: Path, shape: Shape, family: str) -> Path:
    # At least two shards, at most 1.5 GiB each, as in bench/large_sharded.py.
    shard = min(SHARD_BYTES, shape.parameters + 64 * 2**20)
    from threadpoolctl import threadpool_limits

    # One BLAS thread: the draws' small QRs and products ran 10× slower with two threads
    # on a busy machine.
    with threadpool_limits(1):
        return write_checkpoint(folder, shape, "bf16", shard, seed=2, weights=family)


def measure(
    size: str,
    shape: Shape,
    families: list[str],
    rounds: int,
    root: Path,
    tiny: Path,
    with_shares: bool = True,
) -> dict[str, Any]:
    """Every family of one size: written, measured in interleaved rounds, deleted."""
    paths: dict[str, Path] = {}
    for family in families:
        started = time.perf_counter()
        paths[family] = write(root / size / family, shape, family)
        print(f"  wrote {size} {family} in {time.perf_counter() - started:.0f} s", flush=True)
    runs: dict[str, dict[str, list[dict[str, Any]]]] = {f: {s: [] for s in STEPS} for f in families}
    loads: list[float] = []
    for round_index in range(rounds):
        for family in families:
            warm(paths[family])
            for step in STEPS:
                loads.append(os.getloadavg()[0])
                args = [step, str(paths[family]), str(tiny)]
                if step == "pair":
                    start = {"STEELYARD_BENCH_START": str(time.time() + PAIR_START)}
                    both = run_children(Path(__file__), [args, args], start)
                    result = {**both[0], "seconds": statistics.mean(r["seconds"] for r in both)}
                    result["vm_hwm"] = max(r["vm_hwm"] for r in both)
                    skew = abs(both[0]["began"] - both[1]["began"])
                    if skew > 0.05 * result["seconds"]:
                        # The two timed calls overlapped only in part: the ceiling is too high.
                        print(f"  pair {family}: timed calls began {skew:.3f} s apart", flush=True)
                else:
                    result = run_child(Path(__file__), args)
                runs[family][step].append(result)
        print(f"  round {round_index + 1}/{rounds} done, load {os.getloadavg()[0]:.2f}", flush=True)
    summary: dict[str, Any] = {"size": size, "parameters": shape.parameters, "families": {}}
    for family in families:
        steps: dict[str, Any] = {}
        for step in STEPS if rounds else ():  # --rounds 0: only the per-rule times
            results = runs[family][step]
            steps[step] = {
                "seconds": statistics.median(r["seconds"] for r in results),
                "all_seconds": [round(r["seconds"], 3) for r in results],
                "startup": statistics.median(r["startup"] for r in results),
                "vm_hwm": max(r["vm_hwm"] for r in results),
                **{k: results[0][k] for k in ("findings", "bytes", "report_sha256") if k in results[0]},
            }
        shares = {
            variant: run_child(Path(__file__), [f"shares{suffix}", str(paths[family]), str(tiny)])[
                "shares"
            ]
            for variant, suffix in (("audit", ""), ("searched", "-searched"))
            if with_shares
        }
        summary["families"][family] = {"steps": steps, "shares": shares}
        shutil.rmtree(paths[family].parent, ignore_errors=True)
    loads = loads or [os.getloadavg()[0]]
    summary["load_average_1min"] = [min(loads), statistics.median(loads), max(loads)]
    return summary


def print_summary(summary: dict[str, Any]) -> None:
    print(
        f"\n{summary['size']} ({summary['parameters']:,} parameters, bf16); 1-minute load "
        "average during the runs min/median/max "
        + "/".join(f"{x:.2f}" for x in summary["load_average_1min"])
    )
    print(
        "| family | floor | scan | audit | audit/scan | audit/floor | jobs 1 | jobs 1 / jobs 2 "
        "| pair | jobs 2 ceiling | same report | searched | searched/scan | searched/floor "
        "| peak RSS floor / scan / audit / audit-1 / searched / pair | findings |"
    )
    print(
        "| --- | ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: | --- | ---: | ---: "
        "| ---: | --- | ---: |"
    )
    for family, data in summary["families"].items():
        if not data["steps"]:
            continue
        s = {k: v["seconds"] for k, v in data["steps"].items()}
        peaks = " / ".join(mib(data["steps"][k]["vm_hwm"]) for k in STEPS)
        target = 1.0 if family in TRAINED_LIKE else 1.3
        same = data["steps"]["audit"]["report_sha256"] == data["steps"]["audit-1"]["report_sha256"]
        flag = "" if s["audit"] / s["scan"] <= target else " (over)"
        print(
            f"| {family} | {s['floor']:.3f} s | {s['scan']:.2f} s | {s['audit']:.2f} s "
            f"| **{s['audit'] / s['scan']:.2f}**{flag} | {s['audit'] / s['floor']:.0f} "
            f"| {s['audit-1']:.2f} s | {s['audit-1'] / s['audit']:.2f} "
            f"| {s['pair']:.2f} s | {2 * s['audit-1'] / s['pair']:.2f} "
            f"| {'yes' if same else 'NO'} "
            f"| {s['searched']:.2f} s | {s['searched'] / s['scan']:.2f} "
            f"| {s['searched'] / s['floor']:.0f} | {peaks} "
            f"| {data['steps']['audit']['findings']} / {data['steps']['searched']['findings']} |"
        )
    print("\nper-rule seconds on one thread (audit | searched), top 4 of each:")
    for family, data in summary["families"].items():
        if not data["shares"]:
            continue
        parts = []
        for variant in ("audit", "searched"):
            shares = data["shares"][variant]
            total = sum(shares.values())
            top = sorted(shares.items(), key=lambda kv: -kv[1])[:4]
            parts.append(
                f"total {total:.2f} s: "
                + ", ".join(f"{n} {t:.2f} s ({100 * t / total:.0f} %)" for n, t in top)
            )
        print(f"  {family}: " + " | ".join(parts))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", default="quick", help="comma-separated: " + ",".join(SIZES))
    parser.add_argument("--families", default=",".join(FAMILIES))
    parser.add_argument("--rounds", type=int, default=3)
    parser.add_argument("--json", type=Path, help="also write every measurement here")
    parser.add_argument("--no-shares", action="store_true", help="skip the per-rule times")
    parser.add_argument("--child", nargs=3, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        child(*args.child)
        return
    families = args.families.split(",")
    unknown = [f for f in families if f not in WEIGHTS] + [
        s for s in args.sizes.split(",") if s not in SIZES
    ]
    if unknown:
        parser.error(f"unknown family or size: {', '.join(unknown)}")
    root = Path(tempfile.mkdtemp(prefix="steelyard-families-"))
    print(f"machine: {machine()}", flush=True)
    summaries = []
    try:
        tiny = write_checkpoint(root / "tiny", TINY, "bf16", 2**40, seed=9, weights="trained")
        for size in args.sizes.split(","):
            shape = SIZES[size]
            need = 2 * shape.parameters * len(families) + GIB
            if shutil.disk_usage(root).free < need:
                print(f"{size}: skipped, needs {need / GIB:.1f} GiB free disk")
                continue
            summary = measure(size, shape, families, args.rounds, root, tiny, not args.no_shares)
            summary["machine"] = machine()
            print_summary(summary)
            summaries.append(summary)
            if args.json:
                args.json.write_text(json.dumps(summaries, indent=1))
    finally:
        shutil.rmtree(root, ignore_errors=True)
    if not summaries:
        sys.exit(1)


if __name__ == "__main__":
    main()
