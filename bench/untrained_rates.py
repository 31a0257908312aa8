"""False-positive and detection rates of ``untrained-layer`` on small layers.

Reads the calibration set written by ``fixtures/gen_untrained_calibration.py`` (small CNNs and
MLPs trained with SGD or Adam on invented synthetic tasks; the same models never trained, drawn
by torch's and Keras's own initializers; trained models with one layer re-created), audits
every checkpoint with only ``untrained-layer`` and prints, per size bucket of the layers:

* the false-positive rate: trained layers reported as untrained;
* the detection rate: never-trained layers reported, and those the rule could not judge
  (skipped as too small for the test to tell; see the rule's documentation).

    KERAS_BACKEND=torch /opt/fixgen/bin/python fixtures/gen_untrained_calibration.py /tmp/calib
    python bench/untrained_rates.py /tmp/calib [--max-fp 0.0] [--min-tp 0.9]

Exits non-zero when the false-positive rate over all layers exceeds ``--max-fp`` or the
detection rate on layers of at least ``--tp-from`` weights falls below ``--min-tp``.

The calibration layers are small (at most 5,000 weights), so their spectrum is searched whole.
``--planted`` measures the large layers instead, whose spectrum is searched on a row
subsample: fresh PyTorch-default draws (U(±1/√n)) of several shapes, each alone in a file, plus
one delocalised learned direction θ·u·vᵀ of strength θ = c·σ(mn)^{1/4} (c = 0: never trained;
σ(mn)^{1/4} is the threshold below which no test can see it), and prints how often each
is reported as untrained (no folder needed: the draws are made here, seeded)::

    python bench/untrained_rates.py --planted [--draws 10] [--set spectrum-stride=1]
    python bench/untrained_rates.py --planted --shapes 8192x4096,4096x11008 --draws 5 \
        [--set spectrum-entries=0]
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from steelyard.checkpoint_audit import run_rules
from steelyard.loaders import load
from steelyard.policy import Policy
from steelyard.rules.untrained_layer import RULE

BUCKETS = ((0, 256), (256, 512), (512, 1024), (1024, 2048), (2048, 5001))


PLANTED_SHAPES = ((1024, 1024), (2816, 1024), (1024, 2816), (512, 512))
PLANTED_STRENGTHS = (0.0, 1.5, 2.0, 2.5, 3.0, 4.0)


def planted(draws: int, policy: Policy, shapes: tuple[tuple[int, int], ...] = PLANTED_SHAPES) -> None:
    """Print, per shape and strength c, how many of ``draws`` layers were reported."""
    import math
    import tempfile

    import numpy as np
    from safetensors.numpy import save_file

    rng = np.random.default_rng(0)
    print("shape".ljust(14) + "".join(f"c={c:g}".rjust(9) for c in PLANTED_STRENGTHS))
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "layer.safetensors"
        for m, n in shapes:
            bound = 1.0 / math.sqrt(n)  # PyTorch's Linear default, U(±1/√fan_in)
            sigma = bound / math.sqrt(3.0)
            row = f"{m}x{n}".ljust(14)
            for strength in PLANTED_STRENGTHS:
                reported = 0
                for _ in range(draws):
                    weight = rng.uniform(-bound, bound, (m, n))
                    u, v = rng.standard_normal(m), rng.standard_normal(n)
                    theta = strength * sigma * (m * n) ** 0.25
                    weight += theta * np.outer(u / np.linalg.norm(u), v / np.linalg.norm(v))
                    save_file({"fc.weight": weight.astype(np.float32)}, str(path))
                    findings, _, _ = run_rules(load(path), policy, None, rules={RULE.name: RULE})
                    reported += bool(findings)
                row += f"{reported}/{draws}".rjust(9)
            print(row, flush=True)


def main() -> int:
    """Measure and print the rates; non-zero exit when a target is missed."""
    parser = argparse.ArgumentParser()
    parser.add_argument("folder", type=Path, nargs="?")
    parser.add_argument("--planted", action="store_true", help="large layers with a planted direction")
    parser.add_argument("--draws", type=int, default=10)
    parser.add_argument(
        "--shapes", default="", metavar="MxN,...",
        help="--planted shapes (default 1024x1024,2816x1024,1024x2816,512x512; 8192x4096 and "
        "4096x11008 reach the subsample's entry cap, spectrum-entries)",
    )
    parser.add_argument(
        "--set", action="append", default=[], metavar="KEY=VALUE", help="a rule threshold"
    )
    parser.add_argument("--max-fp", type=float, default=0.0)
    parser.add_argument("--min-tp", type=float, default=0.9)
    parser.add_argument("--tp-from", type=int, default=1024)
    parser.add_argument("--show", action="store_true", help="list every false positive")
    args = parser.parse_args()
    overrides = {key: float(value) for key, value in (item.split("=", 1) for item in args.set)}
    policy = Policy(rules={RULE.name: overrides}) if overrides else Policy()
    if args.planted:
        shapes = tuple(
            (int(m), int(n)) for m, n in (item.split("x") for item in args.shapes.split(",") if item)
        )
        planted(args.draws, policy, shapes or PLANTED_SHAPES)
        return 0
    if args.folder is None:
        parser.error("the calibration folder is needed (or --planted)")
    labels = json.loads((args.folder / "labels.json").read_text())
    # (kind, bucket) -> [layers, flagged]
    counts: dict[tuple[str, int], list[int]] = {}
    misses: list[str] = []
    for name in sorted(labels):
        findings, _, _ = run_rules(load(args.folder / name), policy, None, rules={RULE.name: RULE})
        flagged = {f.layer: f for f in findings}
        for layer, info in labels[name].items():
            kind = f"{name.split('-')[0]}:{info['label']}"
            bucket = next(i for i, (lo, hi) in enumerate(BUCKETS) if lo <= info["weights"] < hi)
            cell = counts.setdefault((kind, bucket), [0, 0])
            cell[0] += 1
            if layer in flagged:
                cell[1] += 1
                if info["label"] == "trained" and args.show:
                    e = flagged[layer].evidence
                    misses.append(
                        f"  FP {name} {layer} ({info['weights']} weights, moved "
                        f"{info['moved']:.2f}): {e['initializer']} ks {e['ks']} "
                        f"p {e.get('p_value', '-')}"
                    )
    kinds = sorted({k for k, _ in counts})
    header = "kind".ljust(20) + "".join(f"{lo}-{hi - 1}".rjust(14) for lo, hi in BUCKETS) + "all".rjust(18)
    print(header)
    totals: dict[str, list[int]] = {}
    for kind in kinds:
        row = kind.ljust(20)
        total = [0, 0]
        for b in range(len(BUCKETS)):
            n, hit = counts.get((kind, b), [0, 0])
            total[0] += n
            total[1] += hit
            row += (f"{hit}/{n}" if n else "-").rjust(14)
        row += f"{total[1]}/{total[0]} ({total[1] / max(1, total[0]):.1%})".rjust(18)
        totals[kind] = total
        print(row)
    print("\n".join(misses))
    trained = [sum(v[i] for k, v in totals.items() if k.endswith(":trained")) for i in (0, 1)]
    fp = trained[1] / max(1, trained[0])
    big = [
        sum(v[i] for (k, b), v in counts.items() if k.endswith(":untrained") and BUCKETS[b][0] >= args.tp_from)
        for i in (0, 1)
    ]
    tp = big[1] / max(1, big[0])
    print(f"false-positive rate {fp:.2%} ({trained[1]}/{trained[0]} trained layers)")
    print(f"detection rate from {args.tp_from} weights {tp:.2%} ({big[1]}/{big[0]} untrained layers)")
    return 0 if fp <= args.max_fp and tp >= args.min_tp else 1


if __name__ == "__main__":
    sys.exit(main())
