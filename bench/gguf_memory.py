"""D: peak memory while auditing a block-quantized GGUF model (Q4_K, ~250 MB).

Writes a seeded llama-shaped GGUF with the ``gguf`` package's writer (random but valid Q4_K
blocks: random 4-bit codes and 6-bit scales, finite f16 super-block scales), then runs, each in
a fresh child process (see ``_common.py``):

* ``layer_pass``: ``LayerStats.row_norms`` of every layer and the non-finite scan of every
  tensor, the one pass each layer gets;
* ``audit-1``, ``audit-2``: the whole ``steelyard.api.audit`` (every rule) with 1 and 2 jobs;
* ``dequantize_all`` (reference): ``gguf.quants.dequantize`` of the largest tensor at once,
  what a reader that dequantizes whole tensors would need.

Targets (peak resident set minus the child's start). Layer pass: one dequantized row block
(``streaming.CHUNK_BYTES`` of float32) + the largest float32 matrix the audit keeps assembled
(``stats.STREAM_BYTES`` bounds it; larger ones, here the 250 MiB embedding and head, are only
streamed) + 64 MiB. Full audit: per job, twice that matrix (the rules' working copies) and two
row blocks (the block read and its float32 copy), + 64 MiB. Neither grows with the largest
tensor; the reference mode shows what one whole dequantized tensor costs.
"""

from __future__ import annotations

import argparse
import shutil
import sys
import tempfile
from pathlib import Path

import numpy as np
from _common import MIB, MemoryProbe, emit, machine, mib, run_child

SLACK = 64 * MIB
VOCAB, HIDDEN, FF, LAYERS, KV = 32000, 2048, 5632, 6, 512


def _shapes() -> list[tuple[str, tuple[int, int]]]:
    out = [("token_embd.weight", (VOCAB, HIDDEN))]
    for i in range(LAYERS):
        out += [
            (f"blk.{i}.attn_q.weight", (HIDDEN, HIDDEN)),
            (f"blk.{i}.attn_k.weight", (KV, HIDDEN)),
            (f"blk.{i}.attn_v.weight", (KV, HIDDEN)),
            (f"blk.{i}.attn_output.weight", (HIDDEN, HIDDEN)),
            (f"blk.{i}.ffn_gate.weight", (FF, HIDDEN)),
            (f"blk.{i}.ffn_up.weight", (FF, HIDDEN)),
            (f"blk.{i}.ffn_down.weight", (HIDDEN, FF)),
        ]
    return [*out, ("output.weight", (VOCAB, HIDDEN))]


def write(path: Path) -> None:
    import gguf
    from gguf import GGMLQuantizationType as T
    from gguf.constants import GGML_QUANT_SIZES

    block, size = GGML_QUANT_SIZES[T.Q4_K]
    rng = np.random.default_rng(0)
    writer = gguf.GGUFWriter(path, "llama")
    writer.add_block_count(LAYERS)
    writer.add_embedding_length(HIDDEN)
    writer.add_feed_forward_length(FF)
    writer.add_head_count(16)
    writer.add_head_count_kv(4)
    writer.add_file_type(gguf.LlamaFileType.MOSTLY_Q4_K_M)
    for name, (rows, cols) in _shapes():
        raw = rng.integers(0, 256, (rows * cols // block, size), dtype=np.uint8)
        # d and dmin (the first two f16 of a Q4_K block, gguf quants.py): finite, modest.
        raw[:, 0:4].view(np.float16)[:, 0] = np.float16(0.002)
        raw[:, 0:4].view(np.float16)[:, 1] = np.float16(0.001)
        writer.add_tensor(name, raw.reshape(rows, -1), raw_dtype=T.Q4_K)
    for i in range(LAYERS):
        writer.add_tensor(f"blk.{i}.attn_norm.weight", np.ones(HIDDEN, np.float32))
        writer.add_tensor(f"blk.{i}.ffn_norm.weight", np.ones(HIDDEN, np.float32))
    writer.add_tensor("output_norm.weight", np.ones(HIDDEN, np.float32))
    writer.write_header_to_file()
    writer.write_kv_data_to_file()
    writer.write_tensors_to_file()
    writer.close()


def child(mode: str, path: str) -> None:
    from steelyard import api
    from steelyard.stats import LayerStats

    checkpoint = api.load(path)
    with MemoryProbe() as probe:
        if mode == "layer_pass":
            stats = LayerStats(checkpoint)
            for layer in checkpoint.layers:
                stats.row_norms(layer)
                probe.sample()
                stats.release(layer)
            for tensor in stats.scan_targets():
                stats.nonfinite(tensor)
        elif mode.startswith("audit-"):
            report = api.audit(path, jobs=int(mode.split("-")[1]))
            probe.sample()
            assert report is not None
        elif mode == "dequantize_all":
            import gguf

            for tensor in gguf.GGUFReader(path).tensors:
                if tensor.name == "token_embd.weight":
                    values = gguf.quants.dequantize(tensor.data, tensor.tensor_type)
                    probe.sample()
                    del values
        else:
            raise SystemExit(f"unknown mode {mode}")
    emit({"mode": mode, **probe.report()})


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--child", nargs=2, metavar=("MODE", "PATH"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        child(*args.child)
        return
    from steelyard.stats import STREAM_BYTES
    from steelyard.streaming import CHUNK_BYTES

    folder = Path(tempfile.mkdtemp(prefix="steelyard-bench-"))
    try:
        path = folder / "bench-q4k.gguf"
        write(path)
        largest = max(r * c for _, (r, c) in _shapes())
        kept = max((4 * r * c for _, (r, c) in _shapes() if 4 * r * c <= STREAM_BYTES), default=0)
        bounds = {
            "layer_pass": kept + CHUNK_BYTES,
            "audit-1": 2 * kept + 2 * CHUNK_BYTES,
            "audit-2": 2 * (2 * kept + 2 * CHUNK_BYTES),
        }
        print(f"machine: {machine()}")
        print(
            f"checkpoint: {path.stat().st_size / MIB:,.0f} MiB Q4_K, "
            f"{sum(r * c for _, (r, c) in _shapes()):,} weights; largest tensor {largest:,} "
            f"elements ({mib(4 * largest)} float32); largest assembled matrix {mib(kept)}, "
            f"row block {mib(CHUNK_BYTES)}"
        )
        print(f"{'mode':<16}{'VmHWM-start':>14}{'RssAnon-start':>15}{'bound':>14}  verdict")
        failed = False
        for mode in ("layer_pass", "audit-1", "audit-2", "dequantize_all"):
            result = run_child(Path(__file__), [mode, str(path)])
            hwm = result["vm_hwm"] - result["start_rss"]
            anon = result["peak_anon"] - result["start_anon"]
            if mode == "dequantize_all":
                verdict, shown = "reference (whole tensor at once)", "-"
            else:
                ok = hwm <= bounds[mode] + SLACK
                failed |= not ok
                verdict, shown = ("ok" if ok else "OVER"), f"{mib(bounds[mode])} +64"
            print(f"{mode:<16}{mib(hwm):>14}{mib(anon):>15}{shown:>14}  {verdict}")
        if failed:
            sys.exit(1)
    finally:
        shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    main()
