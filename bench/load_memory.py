"""Target A: reading a ~1 GB safetensors file tensor by tensor holds one tensor, not the file.

Run from the repository root::

    python bench/load_memory.py            # ~1 GB bf16 file in a temporary folder
    python bench/load_memory.py --scale 0.25

The file is a seeded transformer-shaped bf16 checkpoint written with the ``safetensors``
package. Each mode runs in a fresh child process that loads the checkpoint with
``steelyard.api.load`` and then:

* ``read``: ``tensor.read()`` for every tensor, one at a time (stored dtype);
* ``read_float32``: ``tensor.read_float32()`` for every tensor (bf16 widened chunk by chunk);
* ``layer_pass``: ``LayerStats.row_norms`` and ``LayerStats.nonfinite`` for every layer and
  tensor, the one-pass statistics the audit computes (large tensors streamed in row blocks);
* ``mmap``: for comparison, a plain ``numpy.memmap`` of the file, touching every tensor.

Reported per mode: peak ``VmHWM`` (resident set including file-backed pages), the largest
``RssAnon`` sampled (anonymous memory), both minus the child's resident set right after
imports and load (``start``), next to the largest tensor in the form the mode holds it.
The target is peak − start <= that tensor + a small constant (we use 64 MiB).
"""

from __future__ import annotations

import argparse
import shutil
import sys
import tempfile
from pathlib import Path

from _common import (
    MIB,
    MemoryProbe,
    Shape,
    emit,
    machine,
    mib,
    run_child,
    shard_files,
    write_checkpoint,
)

SLACK = 64 * MIB
#: Scale 1 is ~1.0 GiB of bf16: vocabulary 32000 × 2048 plus 7 blocks 2048 wide.
BASE = Shape(vocab=32000, hidden=2048, intermediate=5632, layers=7)


def child(mode: str, path: str) -> None:
    import numpy as np

    from steelyard.api import load
    from steelyard.stats import LayerStats

    checkpoint = load(path)
    with MemoryProbe() as probe:
        if mode == "read":
            for tensor in checkpoint.tensors.values():
                array = tensor.read()
                probe.sample()
                del array
        elif mode == "read_float32":
            for tensor in checkpoint.tensors.values():
                array = tensor.read_float32()
                probe.sample()
                del array
        elif mode == "layer_pass":
            stats = LayerStats(checkpoint)
            for layer in checkpoint.layers:
                stats.row_norms(layer)
                probe.sample()
                stats.release(layer)
            for tensor in stats.scan_targets():
                stats.nonfinite(tensor)
        elif mode == "mmap":
            total = 0.0
            for file in shard_files(Path(path)):
                mapped = np.memmap(file, dtype=np.uint8, mode="r")
                for start in range(0, mapped.size, 16 * MIB):
                    total += float(mapped[start : start + 16 * MIB : 4096].sum())
                probe.sample()
                del mapped
        else:
            raise SystemExit(f"unknown mode {mode}")
    emit({"mode": mode, **probe.report()})


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--scale", type=float, default=1.0, help="fraction of the ~1 GiB file")
    parser.add_argument("--keep", help="write the checkpoint here and keep it")
    parser.add_argument("--child", nargs=2, metavar=("MODE", "PATH"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        child(*args.child)
        return
    layers = max(1, round(BASE.layers * args.scale))
    vocab = max(1000, round(BASE.vocab * min(1.0, args.scale * 2)))
    shape = Shape(
        BASE.vocab if args.scale >= 0.5 else vocab, BASE.hidden, BASE.intermediate, layers
    )
    folder = Path(args.keep) if args.keep else Path(tempfile.mkdtemp(prefix="steelyard-bench-"))
    try:
        path = write_checkpoint(folder, shape, "bf16", shard_bytes=2**40, seed=0)
        size = sum(f.stat().st_size for f in shard_files(path))
        largest = shape.largest
        print(f"machine: {machine()}")
        print(
            f"checkpoint: {size / MIB:,.0f} MiB bf16, {shape.parameters:,} parameters, "
            f"largest tensor {largest:,} elements ({mib(2 * largest)} bf16, "
            f"{mib(4 * largest)} float32)"
        )
        bounds = {
            "read": 2 * largest,
            "read_float32": 4 * largest,
            "layer_pass": 4 * largest,
            "mmap": 0,
        }
        print(f"{'mode':<14}{'VmHWM-start':>14}{'RssAnon-start':>15}{'bound':>12}  verdict")
        failed = False
        for mode, bound in bounds.items():
            result = run_child(Path(__file__), [mode, str(path)])
            hwm = result["vm_hwm"] - result["start_rss"]
            anon = result["peak_anon"] - result["start_anon"]
            if mode == "mmap":
                verdict = "reference (file-backed pages count in VmHWM)"
            else:
                ok = hwm <= bound + SLACK
                failed |= not ok
                verdict = "ok" if ok else "OVER"
            print(
                f"{mode:<14}{mib(hwm):>14}{mib(anon):>15}"
                f"{(mib(bound) + ' +64') if bound else '-':>12}  {verdict}"
            )
        if failed:
            sys.exit(1)
    finally:
        if not args.keep:
            shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    main()
