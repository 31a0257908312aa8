"""Start-up cost of the commands: wall and CPU time of ``steelyard --version``, ``steelyard
rules`` and the audit of the 5,091-parameter demo (``fixtures/demo/pumpwear-nightly-bad.keras
--fail-on never``, as a table and as JSON), median of N fresh processes each, beside a bare
``python -c pass`` measured in the same run, and which heavy libraries each one imported.

Measured as installed: the package's bytecode is compiled first (compileall) and every child
runs with PYTHONDONTWRITEBYTECODE unset, because a shell that sets it (as the development
shell here does) makes every run compile all sources again, which no user's install does.
CPU time (user + system of the child) is shown beside the wall time because it moves less
with the machine's load; the load average is printed with the numbers.

Usage: python bench/startup.py [--runs 7]
Targets (issue 18, "Start-up"): --version and rules under 0.25 s wall, the demo audit (table
and JSON) under 0.5 s wall. Exit 1 when a median misses its target.
"""

from __future__ import annotations

import argparse
import compileall
import os
import resource
import statistics
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "fixtures" / "demo" / "pumpwear-nightly-bad.keras"
HEAVY = ("numpy", "ml_dtypes", "pydantic", "rich", "h5py", "onnx", "steelyard.comparison")
#: What a child prints on stderr after the command: the heavy modules it imported.
_PROBE = (
    "import runpy, sys\n"
    "sys.argv = ['steelyard', *sys.argv[1:]]\n"
    "try:\n    runpy.run_module('steelyard', run_name='__main__')\n"
    "except SystemExit as exit:\n    code = exit.code\n"
    "print('imported:' + ' '.join(m for m in {heavy!r} if m in sys.modules), file=sys.stderr)\n"
)


def _environment() -> dict[str, str]:
    env = dict(os.environ)
    env.pop("PYTHONDONTWRITEBYTECODE", None)
    env.setdefault("COLUMNS", "120")
    return env


def _timed(args: list[str], runs: int) -> tuple[float, float]:
    """Median wall and CPU seconds of ``runs`` fresh processes."""
    walls, cpus = [], []
    for _ in range(runs):
        before = resource.getrusage(resource.RUSAGE_CHILDREN)
        start = time.perf_counter()
        subprocess.run(args, check=True, capture_output=True, env=_environment(), cwd=ROOT)
        walls.append(time.perf_counter() - start)
        after = resource.getrusage(resource.RUSAGE_CHILDREN)
        cpus.append(after.ru_utime - before.ru_utime + after.ru_stime - before.ru_stime)
    return statistics.median(walls), statistics.median(cpus)


def _imported(command: list[str]) -> str:
    probe = _PROBE.format(heavy=HEAVY)
    done = subprocess.run(
        [sys.executable, "-c", probe, *command],
        capture_output=True,
        text=True,
        env=_environment(),
        cwd=ROOT,
    )
    lines = [x for x in done.stderr.splitlines() if x.startswith("imported:")]
    return lines[-1].removeprefix("imported:").strip() if lines else "(failed)"


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--runs", type=int, default=7)
    runs = parser.parse_args().runs
    import steelyard

    package = Path(steelyard.__file__).parent
    compileall.compile_dir(str(package), quiet=1)
    audit = ["audit", str(DEMO), "--fail-on", "never"]
    commands: list[tuple[str, list[str], float | None]] = [
        ("steelyard --version", ["--version"], 0.25),
        ("steelyard rules", ["rules"], 0.25),
        ("steelyard rules dead-unit", ["rules", "dead-unit"], None),
        ("demo audit, table", audit, 0.5),
        ("demo audit, JSON", [*audit, "--format", "json"], 0.5),
    ]
    load = os.getloadavg()
    print(f"bytecode compiled ({package}); PYTHONDONTWRITEBYTECODE unset for every run")
    print(f"{runs} runs each, median; load average {load[0]:.2f} {load[1]:.2f} {load[2]:.2f}; "
          f"{os.cpu_count()} CPUs")
    bare_wall, bare_cpu = _timed([sys.executable, "-c", "pass"], runs)
    print(f"{'':28} {'wall':>7} {'CPU':>7} {'x bare':>7}  target")
    print(f"{'python -c pass':28} {bare_wall:6.3f}s {bare_cpu:6.3f}s {1:6.1f}x")
    missed = []
    for label, argv, target in commands:
        wall, cpu = _timed([sys.executable, "-m", "steelyard", *argv], runs)
        goal = f"{target:.2f} s" if target is not None else "-"
        if target is not None and wall > target:
            missed.append(label)
            goal += " MISSED"
        print(f"{label:28} {wall:6.3f}s {cpu:6.3f}s {wall / bare_wall:6.1f}x  {goal}")
    print("heavy libraries imported:")
    for label, argv, _ in commands:
        print(f"  {label:26} {_imported(argv) or '-'}")
    return 1 if missed else 0


if __name__ == "__main__":
    raise SystemExit(main())
