"""The comparison rules: what ``steelyard compare`` gates on besides the audit of NEW.

Each rule is a :class:`CompareRuleSpec` like the audit's :class:`~steelyard.rules.RuleSpec`:
a name (its ID in reports and policy files), a default severity, default thresholds (policy
keys), a one-line why, and a check whose docstring is the rule's documentation page. The
checks read only the per-layer comparison (:class:`~steelyard.compare.report.LayerDiff`) and,
for ``new-nonfinite``, the tensors that belong to no layer. Policy tables, ``[[override]]``
globs, ``[[ignore]]`` entries and ``severity`` work exactly as for the audit rules.
"""

from __future__ import annotations

import fnmatch
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from steelyard.compare.report import LayerDiff, Status
from steelyard.findings import Finding, Severity
from steelyard.graph import Checkpoint, Layer, TensorRole
from steelyard.policy import Policy
from steelyard.rules.base import RuleSettings
from steelyard.rules.scoring import score

DOCS_URL = "https://steelyard.readthedocs.io/en/latest/compare/"


@dataclass(frozen=True)
class CompareContext:
    """Everything a comparison rule may read."""

    old: Checkpoint
    new: Checkpoint
    policy: Policy
    diffs: tuple[LayerDiff, ...]

    def layer(self, diff: LayerDiff) -> Layer | None:
        """NEW's layer of a row (OLD's for a removed layer), for per-layer settings."""
        if diff.new_name is not None:
            return self.new.layer(diff.new_name)
        return self.old.layer(diff.old_name) if diff.old_name else None


@dataclass(frozen=True)
class CompareRuleSpec:
    """A comparison rule's metadata and its check."""

    name: str
    severity: Severity
    thresholds: Mapping[str, Any]
    summary: str
    check: Callable[[CompareContext, RuleSettings], Iterator[Finding]]
    doc: str

    @property
    def help_uri(self) -> str:
        """Where the rule's page is published."""
        return f"{DOCS_URL}#{self.name}"


def _weight(diff: LayerDiff) -> str | None:
    block = diff.new_layer or diff.old_layer
    return str(block["weight"]) if block else None


def _part(ctx: CompareContext, diff: LayerDiff) -> str:
    layer = ctx.layer(diff)
    return layer.gate or "" if layer is not None else ""


def _number(value: float | None) -> str:
    return "—" if value is None else f"{value:.3g}"


def layer_drift(ctx: CompareContext, settings: RuleSettings) -> Iterator[Finding]:
    """``layer-drift``: a layer's weights moved far from OLD's.

    **What it checks.** For every layer present in both checkpoints with the same shape and
    status ``changed``, the relative change r = ‖B − A‖_F / ‖A‖_F of the canonical weights
    (A in OLD, B in NEW, float64 sums) against ``limit`` (default 0.5). Layers that are the same
    up to the rounding of a lower stored precision, or a pure permutation of units, are not
    changed and never drift.

    **Why 0.5.** Two independent draws of the same initialiser have r ≈ √2 (‖B − A‖² =
    ‖A‖² + ‖B‖² − 2A·B with A·B ≈ 0), so r near or above 1 means the layer was effectively
    replaced or diverged. Fine-tuning and consecutive training checkpoints usually move a
    layer by a few percent to a few tenths of its norm (common practice, no source). 0.5 sits
    between the two: the difference is half as large as the weights themselves.

    **Severity and score.** Warning. Score = ``scoring.score(1, r / limit)``: the whole layer is
    implicated, log-scaled by how far past the limit it moved.

    **What to do.** If the layer was not meant to train this much, check the learning rate, the
    optimizer state that was restored, and whether the layer was re-initialised. Layers that
    are meant to move (a new head) get a higher limit with an override:
    ``[[override]] layers = "head.*"`` and ``layer-drift = { limit = 2.0 }``.
    """
    for diff in ctx.diffs:
        if diff.status is not Status.CHANGED or diff.relative_change is None:
            continue
        layer = ctx.layer(diff)
        limit = float(settings.get(layer, "limit"))
        change = diff.relative_change
        if not change > limit:  # NaN (non-finite weights) is new-nonfinite's business
            continue
        excess = change / limit if limit > 0 else float("inf")
        yield Finding(
            rule="layer-drift",
            severity=Severity.WARNING,
            layer=diff.name,
            tensor=_weight(diff),
            units=(),
            score=score(1.0, excess),
            message=f"weights moved by {_number(change)} of their norm (limit {limit:g}); "
            f"cosine to OLD {_number(diff.cosine)}",
            hint="check the learning rate and whether the layer was re-initialised; if it is "
            "meant to move, raise layer-drift's limit for it with an [[override]]",
            evidence={
                "relative_change": change,
                "limit": limit,
                "cosine": diff.cosine,
                "top_units": [u.unit for u in diff.top_units],
            },
            part=_part(ctx, diff),
        )


def frozen_layer_moved(ctx: CompareContext, settings: RuleSettings) -> Iterator[Finding]:
    """``frozen-layer-moved``: a layer the policy declares frozen is not identical.

    **What it checks.** Layers whose name in OLD or NEW matches one of the policy's ``frozen``
    globs (``frozen = ["encoder.*"]``, fnmatch syntax) must be identical in NEW: weights, bias
    and normalisation parameters (running statistics included), equal element by element or
    within the rounding of the lower stored precision (``same``, possibly
    ``precision_only``). A frozen layer that changed, was removed or reshaped, or whose units
    were reordered (even consistently with its neighbours, which keeps the function but
    still rewrites the stored weights) is reported.

    **Why it matters.** Freezing is how fine-tuning protects a component that other systems
    rely on (a shared encoder, an embedding table, a safety classifier). A frozen layer that
    moved means the freeze did not hold: an optimizer that still held its parameters, batch
    normalisation left in training mode (running statistics move), or weight decay applied to
    frozen weights.

    **Severity and score.** Error. Score = ``scoring.score(moved share, 1e6)`` where the share
    is the fraction of the layer's elements beyond precision (1 for removed, reshaped and
    permuted layers).

    **What to do.** Check which parameters the optimizer received, put normalisation layers of
    frozen parts in evaluation mode, exclude them from weight decay, or take the frozen layers
    from OLD unchanged.
    """
    globs = ctx.policy.frozen
    if not globs:
        return
    for diff in ctx.diffs:
        names = [n for n in (diff.old_name, diff.new_name) if n]
        if diff.status is Status.ADDED or not any(
            fnmatch.fnmatchcase(n, g) for n in names for g in globs
        ):
            continue
        if diff.status is Status.SAME and not diff.permuted:
            continue
        if diff.status is Status.CHANGED:
            share = diff.moved_elements / diff.elements if diff.elements else 1.0
            what = (
                f"changed: {diff.moved_elements} of {diff.elements} elements differ beyond the "
                f"stored precision (relative change {_number(diff.relative_change)})"
            )
        elif diff.status is Status.SAME:
            share = 1.0
            what = "was permuted: its units or inputs were reordered (the function is unchanged)"
        else:
            share = 1.0
            what = f"was {diff.status.value}"
        glob = next(g for g in globs for n in names if fnmatch.fnmatchcase(n, g))
        yield Finding(
            rule="frozen-layer-moved",
            severity=Severity.ERROR,
            layer=diff.name,
            tensor=_weight(diff),
            units=(),
            score=score(share, 1e6),
            message=f"frozen layer (policy glob {glob!r}) {what}",
            hint="check which parameters the optimizer received and keep normalisation of frozen "
            "parts in evaluation mode, or restore this layer from OLD",
            evidence={
                "status": diff.status.value,
                "glob": glob,
                "relative_change": diff.relative_change,
                "moved_elements": diff.moved_elements,
                "elements": diff.elements,
                "permuted": diff.permuted,
            },
            part=_part(ctx, diff),
        )


def units_died(ctx: CompareContext, settings: RuleSettings) -> Iterator[Finding]:
    """``units-died``: units alive in OLD are dead in NEW.

    **What it checks.** For every layer present in both checkpoints with the same shape, the
    audit's ``dead-unit`` tests (constant, unused, never active, silenced; with the policy's
    ``dead-unit`` thresholds and ``input-range``) run on each side. Units dead in NEW but not
    in OLD are reported; when NEW's units are a verified permutation of OLD's, OLD's units are
    mapped through it first. Units dead in OLD and alive in NEW are listed as revived in the
    layer table, not reported.

    **Why it matters.** Units that die between two checkpoints are capacity lost in that stretch
    of training, usually to a learning rate too high for ReLU units, an L1 penalty or weight
    decay driving rows to zero, or a normalisation scale decaying to zero. Catching it between
    checkpoints points at the run that did it.

    **Severity and score.** Warning. Score = ``scoring.score(died / units, 1 + died)``.

    **What to do.** Compare the training settings of the two runs (learning rate, penalty,
    warm-up); ``steelyard audit NEW`` names which dead-unit test each unit fails.
    """
    for diff in ctx.diffs:
        if not diff.units_died:
            continue
        total = int((diff.new_layer or {}).get("units", 0)) or len(diff.units_died)
        died = len(diff.units_died)
        yield Finding(
            rule="units-died",
            severity=Severity.WARNING,
            layer=diff.name,
            tensor=_weight(diff),
            units=diff.units_died,
            score=score(died / total, 1 + died),
            message=f"{died} of {total} units alive in OLD are dead in NEW"
            + (f" ({len(diff.units_revived)} revived)" if diff.units_revived else ""),
            hint="compare the two runs' learning rate, penalties and warm-up; `steelyard audit NEW` "
            "names the dead-unit test each unit fails",
            evidence={
                "died": died,
                "units_total": total,
                "units_revived": list(diff.units_revived),
            },
            part=_part(ctx, diff),
        )


def _loose_nonfinite(ctx: CompareContext) -> Iterator[Finding]:
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
                message=f"tensor {name!r} holds {count} non-finite value{'s' if count != 1 else ''} "
                "that were finite in OLD",
                hint="do not ship NEW; find the training step between the two checkpoints where "
                "values diverged",
                evidence={
                    "new_nonfinite": count,
                    "elements": int(bad.size),
                    "first_positions": [list(map(int, p)) for p in np.argwhere(bad)[:5]],
                },
            )


def new_nonfinite(ctx: CompareContext, settings: RuleSettings) -> Iterator[Finding]:
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
    for diff in ctx.diffs:
        if not diff.nonfinite_new:
            continue
        elements = diff.elements or diff.nonfinite_new
        yield Finding(
            rule="new-nonfinite",
            severity=Severity.ERROR,
            layer=diff.name,
            tensor=_weight(diff),
            units=diff.nonfinite_units,
            score=score(diff.nonfinite_new / max(1, elements), 1e6),
            message=f"{diff.nonfinite_new} non-finite value{'s' if diff.nonfinite_new != 1 else ''} "
            "in NEW where OLD was finite"
            + (f" (layer {diff.status.value} in NEW)" if diff.status.structural else ""),
            hint="do not ship NEW; find the training step between the two checkpoints where "
            "values diverged",
            evidence={
                "new_nonfinite": diff.nonfinite_new,
                "elements": elements,
                "status": diff.status.value,
            },
            part=_part(ctx, diff),
        )
    yield from _loose_nonfinite(ctx)


def _spec(
    name: str,
    severity: Severity,
    thresholds: Mapping[str, Any],
    summary: str,
    check: Callable[[CompareContext, RuleSettings], Iterator[Finding]],
) -> CompareRuleSpec:
    return CompareRuleSpec(
        name, severity, thresholds, summary, check, (check.__doc__ or "").strip()
    )


SPECS: tuple[CompareRuleSpec, ...] = (
    _spec(
        "new-nonfinite",
        Severity.ERROR,
        {},
        "NaN or ±Inf that appeared since OLD breaks every output depending on it",
        new_nonfinite,
    ),
    _spec(
        "frozen-layer-moved",
        Severity.ERROR,
        {},
        "a layer the policy declares frozen changed, so the freeze did not hold",
        frozen_layer_moved,
    ),
    _spec(
        "units-died",
        Severity.WARNING,
        {},
        "units that died since OLD are capacity lost in that stretch of training",
        units_died,
    ),
    _spec(
        "layer-drift",
        Severity.WARNING,
        {"limit": 0.5},
        "a layer that moved by more than half its norm was replaced, diverged or over-trained",
        layer_drift,
    ),
)


def compare_registry() -> dict[str, CompareRuleSpec]:
    """Comparison rule name → spec. Names must differ from each other and the audit rules'."""
    from steelyard.rules import registry

    audit_names = set(registry())
    specs: dict[str, CompareRuleSpec] = {}
    for spec in SPECS:
        if spec.name in specs or spec.name in audit_names:
            raise RuntimeError(f"two rules are named {spec.name!r}")
        specs[spec.name] = spec
    return specs


def run_compare_rules(ctx: CompareContext) -> tuple[list[Finding], int]:
    """Every enabled comparison rule's findings (policy severities applied, ignores removed)."""
    findings: list[Finding] = []
    ignored = 0
    policy = ctx.policy
    for spec in compare_registry().values():
        settings = RuleSettings(spec.name, spec.thresholds, policy)
        for finding in spec.check(ctx, settings):
            layer = None
            if finding.layer:
                layer = ctx.new.layer(finding.layer) or ctx.old.layer(finding.layer)
            if not settings.enabled(layer):
                continue
            if policy.ignored(spec.name, finding.layer) is not None:
                ignored += 1
                continue
            chosen = settings.for_layer(layer).get("severity")
            if chosen:
                finding = replace(finding, severity=Severity(chosen))
            findings.append(replace(finding, checkpoint=ctx.new.path))
    return findings, ignored
