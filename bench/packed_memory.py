"""E: peak memory while auditing a GPTQ-packed safetensors model (4-bit, ~90 MB).

Writes, with the ``safetensors`` package, a seeded llama-shaped checkpoint whose linear layers
are GPTQ 4-bit (random packed words, act-order ``g_idx``, positive float16 scales, groups of
128; a ``config.json`` declaring them) and whose embedding and head stay float16, as GPTQ
exports keep them. Each mode runs in a fresh child process (see ``_common.py``):

* ``layer_pass``: ``LayerStats.row_norms`` of every layer and the non-finite scan of every
  tensor, the one pass each layer gets (packed layers decoded row block by row block);
* ``audit-1``, ``audit-2``: the whole ``steelyard.api.audit`` with 1 and 2 jobs;
* ``floats-audit-1``, ``floats-audit-2`` (baseline): the same audits of a file holding only
  the float16 embedding, head and norm, so that the packed layers' own cost is the difference;
* ``plain_read`` (baseline): ``safetensors.numpy.load_file`` of the file, every stored byte in
  memory at once and nothing decoded;
* ``dequantize_all`` (reference): every packed layer decoded to float32 and kept, what a
  loader that unpacks the whole model up front would hold.

Targets (peak resident set minus the child's start), as for GGUF (``gguf_memory.py``): layer
pass within one row block (``streaming.CHUNK_BYTES``) + the largest float32 matrix the audit
keeps assembled (``stats.STREAM_BYTES`` bounds it) + 64 MiB; what the packed layers add to the
full audit (audit minus the floats-only audit with as many jobs), per job, within twice that
matrix and two row blocks + 64 MiB. Neither depends on the model's total size.
"""

from __future__ import annotations

import argparse
import json
import shutil
import sys
import tempfile
from pathlib import Path

import numpy as np
from _common import MIB, MemoryProbe, emit, machine, mib, run_child

SLACK = 64 * MIB
VOCAB, HIDDEN, FF, LAYERS, KV, GROUP = 32000, 2048, 5632, 6, 512, 128


def _linears() -> list[tuple[str, tuple[int, int]]]:
    out = []
    for i in range(LAYERS):
        p = f"model.layers.{i}"
        for name, rows, cols in (("self_attn.q_proj", HIDDEN, HIDDEN),
                                 ("self_attn.k_proj", KV, HIDDEN),
                                 ("self_attn.v_proj", KV, HIDDEN),
                                 ("self_attn.o_proj", HIDDEN, HIDDEN),
                                 ("mlp.gate_proj", FF, HIDDEN), ("mlp.up_proj", FF, HIDDEN),
                                 ("mlp.down_proj", HIDDEN, FF)):
            out.append((f"{p}.{name}", (rows, cols)))
    return out


def write(folder: Path, packed: bool = True) -> Path:
    """The checkpoint (``packed=False``: only its float16 embedding, head and norm)."""
    from safetensors.numpy import save_file

    rng = np.random.default_rng(0)
    tensors: dict[str, np.ndarray] = {
        "model.embed_tokens.weight": (rng.standard_normal((VOCAB, HIDDEN), np.float32) * 0.02
                                      ).astype(np.float16),
        "lm_head.weight": (rng.standard_normal((VOCAB, HIDDEN), np.float32) * 0.02
                           ).astype(np.float16),
        "model.norm.weight": np.ones(HIDDEN, np.float16),
    }
    for name, (n_out, n_in) in _linears() if packed else []:
        groups = n_in // GROUP
        tensors[f"{name}.qweight"] = rng.integers(-2**31, 2**31, (n_in // 8, n_out),
                                                  dtype=np.int64).astype(np.int32)
        tensors[f"{name}.qzeros"] = rng.integers(-2**31, 2**31, (groups, n_out // 8),
                                                 dtype=np.int64).astype(np.int32)
        tensors[f"{name}.scales"] = rng.uniform(0.001, 0.01, (groups, n_out)).astype(np.float16)
        tensors[f"{name}.g_idx"] = rng.permutation(np.arange(n_in) // GROUP).astype(np.int32)
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "model.safetensors"
    save_file(tensors, str(path))
    config = {"model_type": "llama", "num_attention_heads": 16, "num_key_value_heads": 4,
              "quantization_config": {"quant_method": "gptq", "bits": 4, "group_size": GROUP,
                                      "desc_act": True}}
    (folder / "config.json").write_text(json.dumps(config))
    return path


def child(mode: str, path: str) -> None:
    from steelyard import api
    from steelyard.stats import LayerStats

    if mode == "plain_read":
        from safetensors.numpy import load_file

        with MemoryProbe() as probe:
            tensors = load_file(path)
            probe.sample()
            del tensors
        emit({"mode": mode, **probe.report()})
        return
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
        elif "audit-" in mode:
            report = api.audit(path, jobs=int(mode.split("-")[-1]))
            probe.sample()
            assert report is not None
        elif mode == "dequantize_all":
            kept = [t.read() for t in checkpoint.tensors.values() if t.stored_type]
            probe.sample()
            del kept
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
        path = write(folder / "packed")
        floats = write(folder / "floats", packed=False)
        shapes = [s for _, s in _linears()] + [(VOCAB, HIDDEN), (VOCAB, HIDDEN)]
        kept = max((4 * r * c for r, c in shapes if 4 * r * c <= STREAM_BYTES), default=0)
        per_job = 2 * kept + 2 * CHUNK_BYTES
        bounds = {"layer_pass": kept + CHUNK_BYTES, "audit-1": per_job, "audit-2": 2 * per_job}
        logical = sum(r * c for _, (r, c) in _linears())
        print(f"machine: {machine()}")
        print(f"checkpoint: {path.stat().st_size / MIB:,.0f} MiB, {logical:,} GPTQ 4-bit weights "
              f"({mib(4 * logical)} as float32) + 2 float16 matrices of {VOCAB}x{HIDDEN}; "
              f"largest assembled matrix {mib(kept)}, row block {mib(CHUNK_BYTES)}")
        peaks: dict[str, int] = {}
        for mode in ("floats-audit-1", "floats-audit-2", "layer_pass", "audit-1", "audit-2",
                     "plain_read", "dequantize_all"):
            result = run_child(Path(__file__), [mode, str(floats if "floats" in mode else path)])
            peaks[mode] = result["vm_hwm"] - result["start_rss"]
        print(f"{'mode':<16}{'VmHWM-start':>14}{'packed share':>14}{'bound':>14}  verdict")
        failed = False
        for mode, peak in peaks.items():
            if mode in bounds:
                extra = peak - peaks.get(f"floats-{mode}", 0)
                ok = extra <= bounds[mode] + SLACK
                failed |= not ok
                row = (mib(extra), f"{mib(bounds[mode])} +64", "ok" if ok else "OVER")
            else:
                row = ("-", "-", "baseline" if mode.startswith(("floats", "plain")) else
                       "reference")
            print(f"{mode:<16}{mib(peak):>14}{row[0]:>14}{row[1]:>14}  {row[2]}")
        print(f"audit-1 / plain_read {peaks['audit-1'] / peaks['plain_read']:.2f}, "
              f"audit-1 / dequantize_all {peaks['audit-1'] / peaks['dequantize_all']:.2f}")
        if failed:
            sys.exit(1)
    finally:
        shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    main()
