"""Start-up cost of the commands that read no weights: wall time of ``steelyard --version``
and ``steelyard rules`` (median of N fresh processes), beside a bare ``python -c pass`` measured
in the same run, and which heavy libraries ``import steelyard.cli`` pulls in.

Usage: python bench/startup.py [--runs 7]
Targets (issue "close to the machine's limit"): --version and rules under 0.25 s.
"""

from __future__ import annotations

import argparse
import statistics
import subprocess
import sys
import time


def _wall(args: list[str], runs: int) -> float:
    times = []
    for _ in range(runs):
        start = time.perf_counter()
        subprocess.run(args, check=True, capture_output=True)
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--runs", type=int, default=7)
    runs = parser.parse_args().runs
    bare = _wall([sys.executable, "-c", "pass"], runs)
    version = _wall([sys.executable, "-m", "steelyard", "--version"], runs)
    rules = _wall([sys.executable, "-m", "steelyard", "rules"], runs)
    heavy = subprocess.run(
        [
            sys.executable,
            "-c",
            "import sys, steelyard.cli; print(' '.join(m for m in "
            "('numpy', 'ml_dtypes', 'onnx', 'h5py', 'rich', 'typer') if m in sys.modules))",
        ],
        check=True,
        capture_output=True,
        text=True,
    ).stdout.strip()
    print(f"python -c pass        {bare:6.3f} s")
    print(f"steelyard --version   {version:6.3f} s   target 0.25 s")
    print(f"steelyard rules       {rules:6.3f} s   target 0.25 s")
    print(f"imported by steelyard.cli: {heavy}")
    return 0 if max(version, rules) <= 0.25 else 1


if __name__ == "__main__":
    raise SystemExit(main())
