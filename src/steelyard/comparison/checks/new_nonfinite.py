"""``new-nonfinite``: NaN or ±Inf in NEW where OLD held finite values.

**What it checks.** Element by element, NEW's weights, biases and normalisation parameters
against OLD's at the matched position (through a verified permutation of units when
there is one): an element non-finite in NEW and finite in OLD is new. Layers only in NEW
count every non-finite element; reshaped layers count NEW's non-finite elements when OLD's
layer had none. Floating tensors that belong to no layer are matched by name.

**Why it matters.** A non-finite weight makes every output that depends on it non-finite
(IEEE 754 arithmetic propagates NaN through sums and products). Non-finite values that
appeared between two checkpoints place the divergence in that stretch of training.

**Severity and score.** Error. Score = ``scoring.score(share, 1e6)`` with share the fraction
of the layer's compared elements that became non-finite.

**What to do.** Do not ship NEW. Find the step between the two checkpoints where the loss
became NaN (learning rate, mixed-precision overflow, division by a zero variance).
"""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np

from steelyard.comparison.checks import CompareContext, compare_rule
from steelyard.findings import Finding, Severity
from steelyard.graph import TensorRole
from steelyard.numbers import plural
from steelyard.rules.base import NoSettings, RuleSettings
from steelyard.rules.scoring import score


def _loose_nonfinite(ctx: CompareContext) -> Iterator[Finding]:
    """New non-finite values in NEW's floating tensors that belong to no layer, by name."""
    covered: set[str] = set()
    for layer in ctx.new.layers:
        covered.update(n for n in (layer.weight, layer.bias) if n)
        if layer.norm is not None:
            covered.update(
                n
                for n in (layer.norm.scale, layer.norm.shift, layer.norm.mean, layer.norm.var)
                if n
            )
    for name, tensor in ctx.new.tensors.items():
        if name in covered or tensor.role is not TensorRole.PARAMETER:
            continue
        values = tensor.read_float32()
        bad = ~np.isfinite(values)
        if not bad.any():
            continue
        before = ctx.old.tensors.get(name)
        if before is not None and before.shape == tensor.shape:
            bad &= np.isfinite(before.read_float32())
        elif before is not None and not np.all(np.isfinite(before.read_float32())):
            continue  # reshaped and already non-finite in OLD: not new
        count = int(bad.sum())
        if count:
            yield Finding(
                rule="new-nonfinite",
                severity=Severity.ERROR,
                layer=None,
                tensor=name,
                units=(),
                score=score(count / max(1, bad.size), 1e6),
                message=f"tensor {name!r} holds {plural(count, 'non-finite value')} "
                "that were finite in OLD",
                hint="do not ship NEW; find the training step between the two checkpoints where "
                "values diverged",
                evidence={
                    "new_nonfinite": count,
                    "elements": int(bad.size),
                    "first_positions": [list(map(int, p)) for p in np.argwhere(bad)[:5]],
                },
            )


def new_nonfinite(ctx: CompareContext, settings: RuleSettings[NoSettings]) -> Iterator[Finding]:
    """The rule's findings over every compared layer and every tensor in no layer."""
    for diff in ctx.diffs:
        if not diff.nonfinite_new:
            continue
        elements = diff.elements or diff.nonfinite_new
        yield ctx.finding(
            "new-nonfinite",
            diff,
            severity=Severity.ERROR,
            units=diff.nonfinite_units,
            score=score(diff.nonfinite_new / max(1, elements), 1e6),
            message=f"{plural(diff.nonfinite_new, 'non-finite value')} "
            "in NEW where OLD was finite"
            + (f" (layer {diff.status.value} in NEW)" if diff.status.structural else ""),
            hint="do not ship NEW; find the training step between the two checkpoints where "
            "values diverged",
            evidence={
                "new_nonfinite": diff.nonfinite_new,
                "elements": elements,
                "status": diff.status.value,
            },
        )
    yield from _loose_nonfinite(ctx)


RULE = compare_rule(
    name="new-nonfinite",
    severity=Severity.ERROR,
    summary="NaN or ±Inf that appeared since OLD breaks every output depending on it",
    check=new_nonfinite,
)
