"""Start-up cost of the commands: wall and CPU time of ``steelyard --version``, ``steelyard
rules``, the audit of the 5,091-parameter demo (``fixtures/demo/pumpwear-nightly-bad.keras
--fail-on never``, as a table and as JSON) and JSON audits of one invented ~5,000-parameter
two-layer network written by each format's reference library (safetensors, numpy, onnx and,
when installed, gguf), median of N fresh processes each, beside a bare ``python -c pass``
measured in the same run, and which heavy libraries each one imported.

Measured as installed: the package's bytecode is compiled first (compileall) and every child
runs with PYTHONDONTWRITEBYTECODE unset, because a shell that sets it (as the development
shell here does) makes every run compile all sources again, which no user's install does.
CPU time (user + system of the child) is shown beside the wall time because it moves less
with the machine's load; the load average is printed with the numbers.

Usage: python bench/startup.py [--runs 7]
Targets (issue 18, "Start-up"): --version and rules under 0.25 s wall, every audit of a
5,000-parameter model under 0.5 s wall. Exit 1 when a median misses its target.
"""

from __future__ import annotations

import argparse
import compileall
import os
import resource
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

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


def small_models(folder: Path) -> list[tuple[str, Path]]:
    """An invented 40 -> 100 -> 10 network (5,110 parameters, N(0, 0.1²) weights, zero
    biases) written by each format's reference library; GGUF only when ``gguf`` is there."""
    rng = np.random.default_rng(5)
    shapes = {"fc1.weight": (100, 40), "fc1.bias": (100,), "fc2.weight": (10, 100), "fc2.bias": (10,)}
    tensors = {
        name: (0.1 * rng.standard_normal(shape)).astype(np.float32) if len(shape) == 2
        else np.zeros(shape, np.float32)
        for name, shape in shapes.items()
    }
    from safetensors.numpy import save_file

    written = [("safetensors", folder / "small.safetensors"), ("npz", folder / "small.npz")]
    save_file(tensors, str(written[0][1]))
    np.savez(written[1][1], **tensors)  # type: ignore[arg-type]
    from onnx import TensorProto, helper, numpy_helper, save

    nodes = [
        helper.make_node("Gemm", ["x", "fc1.weight", "fc1.bias"], ["h"], transB=1),
        helper.make_node("Relu", ["h"], ["r"]),
        helper.make_node("Gemm", ["r", "fc2.weight", "fc2.bias"], ["y"], transB=1),
    ]
    graph = helper.make_graph(
        nodes, "small", [helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, 40])],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, 10])],
        [numpy_helper.from_array(value, name) for name, value in tensors.items()],
    )
    save(helper.make_model(graph), str(folder / "small.onnx"))
    written.append(("onnx", folder / "small.onnx"))
    try:
        import gguf
    except ImportError:
        return written
    writer = gguf.GGUFWriter(str(folder / "small.gguf"), "llama")
    for name, value in tensors.items():
        writer.add_tensor(name, value)
    writer.write_header_to_file()
    writer.write_kv_data_to_file()
    writer.write_tensors_to_file()
    writer.close()
    written.append(("gguf", folder / "small.gguf"))
    return written


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--runs", type=int, default=7)
    runs = parser.parse_args().runs
    import steelyard

    package = Path(steelyard.__file__).parent
    compileall.compile_dir(str(package), quiet=1)
    audit = ["audit", str(DEMO), "--fail-on", "never"]
    folder = Path(tempfile.mkdtemp(prefix="steelyard-startup-"))
    commands: list[tuple[str, list[str], float | None]] = [
        ("steelyard --version", ["--version"], 0.25),
        ("steelyard rules", ["rules"], 0.25),
        ("steelyard rules dead-unit", ["rules", "dead-unit"], None),
        ("demo audit, table", audit, 0.5),
        ("demo audit, JSON", [*audit, "--format", "json"], 0.5),
    ] + [
        (f"5k {kind} audit, JSON", ["audit", str(path), "--fail-on", "never", "-f", "json"], 0.5)
        for kind, path in small_models(folder)
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
    shutil.rmtree(folder, ignore_errors=True)
    return 1 if missed else 0


if __name__ == "__main__":
    raise SystemExit(main())
