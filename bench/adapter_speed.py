"""An adapter read on its own: the audit against a plain read of the adapter's file.

Run from the repository root::

    python bench/adapter_speed.py                       # every family, 3 rounds
    python bench/adapter_speed.py --layers 8 --rounds 5 --families trained,outlier-input

An adapter's updates ΔW = s·B·A hold ``units·fan_in`` entries for ``r·(units + fan_in)``
stored numbers: at rank 16 on a 4096-wide model a few thousand times more. An audit that
passed over every entry of ΔW would cost as much as a model thousands of times the file
(before the fourteenth session: 35.5 s for the 80 MB adapter below). The adapters are invented
here, in peft's naming (``base_model.model.<module>.lora_A.weight``, ``….lora_B.weight``,
``adapter_config.json``), LoRA of rank ``--rank`` on every linear layer of a
llama-shaped model (4096 wide, 11,008-wide MLP, ``--layers`` blocks), bf16, in families:

* ``trained``: A uniform in ±1/√in (peft's kaiming-uniform start), B Gaussian (trained away
  from peft's zero start);
* ``outlier-input``: the same with one input column of each A 400 × the others (an outlier
  input feature), so that ``essential-weight`` cannot settle ΔW from its factors and streams
  the product;
* ``untrained``: B all zero (peft's initial state: ΔW = 0).

Each round runs, each in a fresh child process, (1) the baseline: ``safetensors.numpy
.load_file`` of the adapter file and (2) ``steelyard.api.audit`` of the adapter folder, each
after one untimed warm-up call (imports, page cache). The ratio is audit / baseline, medians
of the rounds. Target (issue 18, by analogy with the ~20M case): the audit of an adapter costs
what its stored numbers cost, not what ΔW's entries would (no fixed ratio; the
``entries / stored`` column says how far apart those are).
"""

from __future__ import annotations

import argparse
import json
import shutil
import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from _common import emit, machine, run_child

FAMILIES = ("trained", "outlier-input", "untrained")
WIDTH, FEED_FORWARD = 4096, 11008
MODULES = {
    "self_attn.q_proj": (WIDTH, WIDTH),
    "self_attn.k_proj": (WIDTH, WIDTH),
    "self_attn.v_proj": (WIDTH, WIDTH),
    "self_attn.o_proj": (WIDTH, WIDTH),
    "mlp.gate_proj": (FEED_FORWARD, WIDTH),
    "mlp.up_proj": (FEED_FORWARD, WIDTH),
    "mlp.down_proj": (WIDTH, FEED_FORWARD),
}


def write_adapter(folder: Path, family: str, layers: int, rank: int, seed: int = 0) -> dict[str, int]:
    """An invented LoRA adapter (see the module); returns its stored numbers and ΔW entries."""
    import ml_dtypes
    from safetensors.numpy import save_file

    rng = np.random.default_rng(seed)
    folder.mkdir(parents=True, exist_ok=True)
    tensors: dict[str, np.ndarray] = {}
    entries = 0
    for block in range(layers):
        for module, (out, inp) in MODULES.items():
            a = rng.uniform(-1, 1, (rank, inp)) / np.sqrt(inp)
            if family == "outlier-input":
                a[:, inp // 3] *= 400.0
            b = np.zeros((out, rank)) if family == "untrained" else rng.standard_normal((out, rank)) * 2e-3
            name = f"base_model.model.model.layers.{block}.{module}"
            tensors[f"{name}.lora_A.weight"] = a.astype(ml_dtypes.bfloat16)
            tensors[f"{name}.lora_B.weight"] = b.astype(ml_dtypes.bfloat16)
            entries += out * inp
    save_file(tensors, str(folder / "adapter_model.safetensors"), metadata={"format": "pt"})
    targets = sorted({m.rsplit(".", 1)[-1] for m in MODULES})
    config = {"peft_type": "LORA", "r": rank, "lora_alpha": 2 * rank, "target_modules": targets}
    (folder / "adapter_config.json").write_text(json.dumps(config))
    return {"stored": sum(t.size for t in tensors.values()), "entries": entries}


def _child(step: str, folder: str) -> None:
    path = Path(folder)
    if step == "baseline":
        import ml_dtypes  # noqa: F401  (registers bfloat16 for safetensors.numpy)
        from safetensors.numpy import load_file

        def work() -> object:
            return load_file(str(path / "adapter_model.safetensors"))

    else:
        from steelyard.api import audit

        def work() -> object:
            return audit(path)

    result = work()  # warm-up: imports, page cache
    start = time.perf_counter()
    result = work()
    seconds = time.perf_counter() - start
    findings = len(getattr(result, "findings", ()))
    emit({"seconds": seconds, "findings": findings})


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--child", nargs=2, help=argparse.SUPPRESS)
    parser.add_argument("--layers", type=int, default=32)
    parser.add_argument("--rank", type=int, default=16)
    parser.add_argument("--rounds", type=int, default=3)
    parser.add_argument("--families", default=",".join(FAMILIES))
    args = parser.parse_args()
    if args.child:
        _child(*args.child)
        return
    families = [f for f in args.families.split(",") if f]
    unknown = set(families) - set(FAMILIES)
    if unknown:
        parser.error(f"unknown families: {sorted(unknown)}")
    print(f"machine: {machine()}")
    script = Path(__file__).resolve()
    work = Path(tempfile.mkdtemp(prefix="steelyard-adapter-bench-"))
    try:
        print("| family | stored numbers | ΔW entries | entries / stored | load_file | audit | ratio | findings |")
        print("| --- | ---: | ---: | ---: | ---: | ---: | ---: | ---: |")
        for family in families:
            folder = work / family
            sizes = write_adapter(folder, family, args.layers, args.rank)
            times: dict[str, list[float]] = {"baseline": [], "audit": []}
            found = 0
            for _ in range(args.rounds):
                for step in times:
                    outcome = run_child(script, [step, str(folder)])
                    times[step].append(outcome["seconds"])
                    found = outcome["findings"] if step == "audit" else found
            base, audited = statistics.median(times["baseline"]), statistics.median(times["audit"])
            print(
                f"| {family} | {sizes['stored']:,} | {sizes['entries']:,} | "
                f"{sizes['entries'] / sizes['stored']:,.0f} | {base * 1e3:.1f} ms | "
                f"{audited * 1e3:.0f} ms | {audited / base:.1f} | {found} |",
                flush=True,
            )
    finally:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    sys.exit(main())
