"""``steelyard compare OLD NEW``: what changed between two checkpoints, and is it healthy.

The pipeline: audit both checkpoints (the audit rules, unchanged) → match layers
(:mod:`~steelyard.comparison.matching`) → line each pair up (exact, precision-only, permuted or
changed; :mod:`~steelyard.comparison.diff`) → verify permutations against their consumers →
measure → comparison rules (:mod:`~steelyard.comparison.checks`) → one
:class:`~steelyard.comparison.report.Comparison`. NEW's audit findings are split into those
already present in OLD (reported, not gated on, like a baseline) and new ones (gated on).
"""

from __future__ import annotations

import fnmatch
import math
from collections.abc import Sequence
from dataclasses import replace

import numpy as np

from steelyard.checkpoint_audit import audit_checkpoint
from steelyard.comparison.checks import CompareContext, run
from steelyard.comparison.diff import (
    Alignment,
    Side,
    align,
    aligned_old,
    compare_parts,
    cosine,
    fan_in_summary,
    new_nonfinite,
    relative,
    statistics,
    sums,
    top_units,
)
from steelyard.comparison.knowledge import share_structure
from steelyard.comparison.matching import Pair, match_layers
from steelyard.comparison.precision import converter_rows, precision_measures, scheme_aliases
from steelyard.comparison.report import (
    CompareCoverage,
    CompareReport,
    Comparison,
    LayerDiff,
    Status,
    UnitChange,
)
from steelyard.digest import DEFAULT_DIGEST
from steelyard.findings import Finding, Severity
from steelyard.gradients import optimizer_source
from steelyard.graph import Checkpoint, Layer
from steelyard.inventory import layer_block
from steelyard.policy import Policy
from steelyard.ranking import rank
from steelyard.report import CheckpointAudit

__all__ = [
    "CompareCoverage",
    "CompareReport",
    "Comparison",
    "LayerDiff",
    "Status",
    "UnitChange",
    "compare_checkpoints",
]


def _topological(pairs: Sequence[Pair], side: Side) -> list[Pair]:
    """Same-shape pairs with producers before consumers (NEW's order breaks ties and cycles).

    Iterative depth-first search, so a chain of thousands of layers cannot exhaust the stack.
    """
    chosen = [p for p in pairs if p.same_shape and p.new is not None]
    by_name = {p.new.name: p for p in chosen if p.new is not None}
    state: dict[str, int] = {}  # 1 on the stack, 2 placed
    order: list[Pair] = []
    for pair in chosen:
        assert pair.new is not None
        stack = [(pair.new.name, False)]
        while stack:
            name, expanded = stack.pop()
            if expanded:
                state[name] = 2
                order.append(by_name[name])
                continue
            if state.get(name):
                continue
            state[name] = 1
            stack.append((name, True))
            layer = by_name[name].new
            assert layer is not None
            producers = [p.name for p in side.stats.producers(layer) if p.name in by_name]
            stack.extend((p, False) for p in reversed(producers) if not state.get(p))
    return order


def _align_all(
    pairs: Sequence[Pair], old: Side, new: Side
) -> tuple[dict[str, Alignment], dict[str, str]]:
    """Alignment of every same-shape pair, keyed by NEW's layer name, with the reasons a
    row permutation was rejected. A permutation stands only when every consumer of the layer
    lines up under it; rejecting one can break another, so this repeats until stable."""
    order = _topological(pairs, new)
    allowed = {p.new.name for p in order if p.new is not None}
    conventions = converter_rows(order, old, new)
    rejected: dict[str, str] = {}
    while True:
        perms: dict[str, np.ndarray] = {}
        results: dict[str, Alignment] = {}
        for pair in order:
            assert pair.old is not None and pair.new is not None
            result = align(
                old, pair.old, new, pair.new, perms, pair.new.name in allowed,
                conventions.get(pair.new.name),
            )
            results[pair.new.name] = result
            if result.rows is not None:
                perms[pair.new.name] = result.rows
        bad: dict[str, str] = {}
        for pair in order:
            assert pair.new is not None
            result = results[pair.new.name]
            if result.rows is None:
                continue
            consumers = new.stats.consumers(pair.new)
            if not consumers:
                bad[pair.new.name] = (
                    "its rows are OLD's in another order, but no layer is known to "
                    "read its units, so the reorder may change the outputs"
                )
                continue
            broken = [
                c.name
                for c in consumers
                if c.name not in results or results[c.name].outcome == "changed"
            ]
            if broken:
                bad[pair.new.name] = (
                    f"its rows are OLD's in another order, but {', '.join(broken)} "
                    "does not read them in that order"
                )
        if not bad:
            return results, rejected
        allowed -= set(bad)
        rejected.update(bad)


def _removed(layer: Layer, side: Side) -> LayerDiff:
    return LayerDiff(
        name=layer.name,
        status=Status.REMOVED,
        old_name=layer.name,
        new_name=None,
        matched_by=None,
        old_layer=layer_block(layer),
        new_layer=None,
        fan_in_norm_old=fan_in_summary(side.stats.row_norms(layer)),
    )


def _structural(pair: Pair, old: Side, new: Side) -> LayerDiff:
    """An added layer, or a matched one whose shape changed."""
    layer = pair.new
    assert layer is not None
    parts: list[tuple[np.ndarray | None, np.ndarray]] = [(None, new.matrix(layer))]
    parts += [(None, values) for values, _ in new.vectors(layer).values()]
    found = new_nonfinite(parts)
    elements = sum(p[1].size for p in parts)
    if pair.old is None:
        return LayerDiff(
            name=layer.name,
            status=Status.ADDED,
            old_name=None,
            new_name=layer.name,
            matched_by=None,
            old_layer=None,
            new_layer=layer_block(layer),
            fan_in_norm_new=fan_in_summary(new.stats.row_norms(layer)),
            nonfinite_new=found.count,
            nonfinite_units=found.units,
            elements=elements,
        )
    before = pair.old
    old_parts = [old.matrix(before), *(v for v, _ in old.vectors(before).values())]
    already = any(not np.all(np.isfinite(p)) for p in old_parts)
    note = (
        f"{before.kind.value} {before.units}×{before.fan_in} (groups {before.groups}) → "
        f"{layer.kind.value} {layer.units}×{layer.fan_in} (groups {layer.groups})"
    )
    return LayerDiff(
        name=layer.name,
        status=Status.RESHAPED,
        old_name=before.name,
        new_name=layer.name,
        matched_by=pair.matched_by,
        old_layer=layer_block(before),
        new_layer=layer_block(layer),
        fan_in_norm_old=fan_in_summary(old.stats.row_norms(before)),
        fan_in_norm_new=fan_in_summary(new.stats.row_norms(layer)),
        nonfinite_new=0 if already else found.count,
        nonfinite_units=() if already else found.units,
        elements=elements,
        note=note,
    )


def _matched(
    pair: Pair, result: Alignment, rejected: str, old: Side, new: Side
) -> tuple[LayerDiff, float, float]:
    """A same-shape pair, measured after undoing any verified permutation; also returns
    Σ(B−A)² and ΣA² for the overall change."""
    before, layer = pair.old, pair.new
    assert before is not None and layer is not None
    columns = result.columns
    # A converter's row order is undone like a verified permutation, but is not one.
    rows = result.rows if result.rows is not None else result.convention
    checks = result.checks
    if result.rows is not None:
        checks, _ = compare_parts(old, before, new, layer, columns, rows)
    moved = sum(c.moved for c in checks.values())
    same = result.outcome in ("exact", "precision", "permuted")
    a = aligned_old(old, before, columns, rows)
    b = new.matrix(layer)
    measured = sums(a, b)
    old_vectors, new_vectors = old.vectors(before), new.vectors(layer)
    bias_change = None
    if "bias" in old_vectors and "bias" in new_vectors:
        old_bias = old_vectors["bias"][0] if rows is None else old_vectors["bias"][0][rows]
        # inf - inf is NaN (no change measurable); new-nonfinite reports such biases.
        with np.errstate(invalid="ignore", over="ignore"):
            delta = new_vectors["bias"][0].astype(np.float64) - old_bias.astype(np.float64)
            bias_change = relative(
                float(np.dot(delta, delta)), float(np.dot(old_bias.astype(np.float64), old_bias))
            )
    parts: list[tuple[np.ndarray | None, np.ndarray]] = [(a, b)]
    for key, (values, _) in new_vectors.items():
        previous = old_vectors.get(key)
        if previous is None:
            parts.append((None, values))
        else:
            parts.append((previous[0] if rows is None else previous[0][rows], values))
    found = new_nonfinite(parts)
    dead_new = new.dead(layer)
    dead_old = old.dead(before)
    if rows is not None:
        dead_old = frozenset(i for i, r in enumerate(rows.tolist()) if r in dead_old)
    change = relative(measured.diff_sq, measured.old_sq)
    notes = [n for n in (result.note, rejected) if n]
    if result.convention is not None:
        notes.append("rows of each head reordered by the GGUF converter for rotary embeddings (undone)")
    if result.columns is not None and not same:
        notes.append("compared after undoing the permutation of its inputs")
    if not same and "weight" in checks and checks["weight"].within:
        others = sorted(k for k, c in checks.items() if not c.within)
        notes.append(
            f"weights {'identical' if checks['weight'].exact else 'within precision'}; "
            f"{', '.join(others)} changed"
        )
    if measured.old_sq == 0 and measured.diff_sq > 0:
        notes.append("OLD's weights are all zero, so the relative change is infinite")
    diff = LayerDiff(
        name=layer.name,
        status=Status.SAME if same else Status.CHANGED,
        old_name=before.name,
        new_name=layer.name,
        matched_by=pair.matched_by,
        old_layer=layer_block(before),
        new_layer=layer_block(layer),
        relative_change=None if math.isnan(change) else change,
        cosine=cosine(measured),
        bias_relative_change=None
        if bias_change is None or math.isnan(bias_change)
        else bias_change,
        fan_in_norm_old=fan_in_summary(old.stats.row_norms(before)),
        fan_in_norm_new=fan_in_summary(new.stats.row_norms(layer)),
        units_died=tuple(sorted(dead_new - dead_old)),
        units_revived=tuple(sorted(dead_old - dead_new)),
        permuted=same and (result.rows is not None or columns is not None),
        moved_units=0 if result.rows is None else int(np.count_nonzero(result.rows != np.arange(result.rows.size))),
        precision_only=result.outcome == "precision",
        precision=result.lower if result.outcome == "precision" else None,
        top_units=() if same else top_units(measured, b),
        moved_elements=0 if same else moved,
        elements=result.elements,
        nonfinite_new=found.count,
        nonfinite_units=found.units,
        note="; ".join(notes),
        **precision_measures(measured, a, b, old, before, new, layer, same),
    )
    finite = math.isfinite(measured.diff_sq) and math.isfinite(measured.old_sq)
    return diff, measured.diff_sq if finite else 0.0, measured.old_sq if finite else 0.0


def _rank_key(diff: LayerDiff) -> tuple[int, float, str]:
    if diff.status.structural:
        group = {Status.RESHAPED: 0, Status.REMOVED: 1, Status.ADDED: 2}[diff.status]
        return (0, float(group), diff.name)
    value = diff.relative_change
    magnitude = math.inf if value is None else value
    return (1 if diff.status is Status.CHANGED else 2, -magnitude, diff.name)


def _unit_map(
    pairs: Sequence[Pair], alignments: dict[str, Alignment]
) -> dict[str, tuple[str, np.ndarray | None]]:
    out: dict[str, tuple[str, np.ndarray | None]] = {}
    for pair in pairs:
        if pair.old is not None and pair.new is not None:
            result = alignments.get(pair.new.name)
            out[pair.new.name] = (pair.old.name, result.rows if result is not None else None)
    return out


def split_audit(
    old_audit: CheckpointAudit,
    new_audit: CheckpointAudit,
    pairs: Sequence[Pair],
    alignments: dict[str, Alignment],
) -> tuple[list[Finding], list[Finding]]:
    """NEW's audit findings split into (new, already present in OLD).

    A finding is present in OLD when OLD has one with the same id (rule, tensor, part, units),
    or, for files whose tensor names differ, the same rule, part and units on the matched layer
    (units mapped through a verified permutation). A finding on a layer's weight whose units
    are a subset of those OLD's finding of the same rule named on the matched layer's weight,
    at the same severity or worse, is present too: nothing in it is new (units that revived
    are no news).
    """
    old_ids = {f.id for f in old_audit.findings}
    old_keys = {(f.rule, f.layer, f.part, f.units) for f in old_audit.findings if f.layer}
    old_weights = {p.old.name: p.old.weight for p in pairs if p.old is not None}
    new_weights = {p.new.name: p.new.weight for p in pairs if p.new is not None}
    wider: dict[tuple[str, str, str], list[tuple[set[int], Severity]]] = {}
    for f in old_audit.findings:
        if f.layer and f.units and f.tensor == old_weights.get(f.layer):
            wider.setdefault((f.rule, f.layer, f.part), []).append((set(f.units), f.severity))
    mapping = _unit_map(pairs, alignments)
    fresh: list[Finding] = []
    present: list[Finding] = []
    for finding in new_audit.findings:
        known = finding.id in old_ids
        if not known and finding.layer in mapping:
            old_name, rows = mapping[finding.layer]
            units = finding.units
            if rows is not None and all(u < rows.size for u in units):
                units = tuple(sorted(int(rows[u]) for u in units))
            known = (finding.rule, old_name, finding.part, units) in old_keys
            if not known and units and finding.tensor == new_weights.get(finding.layer):
                known = any(
                    set(units) <= before and before_severity.at_least(finding.severity)
                    for before, before_severity in wider.get(
                        (finding.rule, old_name, finding.part), []
                    )
                )
        (present if known else fresh).append(finding)
    return fresh, present


#: Audit rule → the comparison rule that reports the same problem as new since OLD.
DUPLICATES = {"dead-unit": "units-died", "nonfinite": "new-nonfinite"}


def _old_units(
    old_audit: CheckpointAudit, rule: str, old_name: str, rows: np.ndarray | None, units: int
) -> set[int]:
    """Units (in NEW's numbering) that OLD's audit already reported for ``rule`` on the layer
    matched to ``old_name``, ignored findings included: they are facts about OLD all the same."""
    found = {
        u
        for f in (
            *old_audit.findings,
            *old_audit.baselined,
            *(s.finding for s in old_audit.suppressed),
        )
        if f.rule == rule and f.layer == old_name
        for u in f.units
    }
    if rows is None:
        return {u for u in found if u < units}
    return {i for i, r in enumerate(rows.tolist()) if r in found}


def _covers(kept: Finding, audit: Finding, old_units: set[int], old_reported: bool) -> bool:
    """Whether the comparison finding ``kept`` reports everything new in ``audit``: every unit
    the audit names is in ``kept`` or was already reported in OLD."""
    if audit.layer is None:  # a tensor in no layer: the same tensor, non-finite only since OLD
        return kept.layer is None and kept.tensor == audit.tensor
    if kept.layer != audit.layer:
        return False
    if audit.rule == "dead-unit" and kept.part != audit.part:
        return False
    if not audit.units:
        # units unknown: covered only when OLD had nothing of the kind on this layer, so all of
        # it is new and ``kept`` reports the layer
        return not old_reported
    return set(audit.units) <= set(kept.units) | old_units


def fold_duplicates(
    findings: Sequence[Finding],
    fresh: Sequence[Finding],
    old_audit: CheckpointAudit,
    pairs: Sequence[Pair],
    alignments: dict[str, Alignment],
) -> tuple[list[Finding], list[Finding]]:
    """One problem, one finding: an audit finding of NEW (``dead-unit``, ``nonfinite``) whose
    news a comparison finding (``units-died``, ``new-nonfinite``) already reports is folded
    into it: dropped from the audit's new findings and listed in the kept finding's evidence
    and message. The kept finding takes the worse severity of the two, so the gate fails
    exactly when it did with both. Audit findings the comparison does not fully cover (a unit
    the comparison does not name) stay as they are.
    """
    mapping = _unit_map(pairs, alignments)
    units_of = {p.new.name: p.new.units for p in pairs if p.new is not None}
    kept = list(findings)
    folded: dict[int, list[Finding]] = {}
    rest: list[Finding] = []
    for finding in fresh:
        target = DUPLICATES.get(finding.rule)
        if finding.rule == "nonfinite" and finding.evidence.get("source", "model") != "model":
            target = None  # optimizer state: no comparison rule looks at it
        old_units: set[int] = set()
        old_reported = False
        if target is not None and finding.layer in mapping:
            old_name, rows = mapping[finding.layer]
            old_units = _old_units(
                old_audit, finding.rule, old_name, rows, units_of.get(finding.layer, 0)
            )
            old_reported = any(
                f.rule == finding.rule and f.layer == old_name
                for f in (*old_audit.findings, *old_audit.baselined)
            )
        index = next(
            (
                i
                for i, k in enumerate(kept)
                if target is not None
                and k.rule == target
                and _covers(k, finding, old_units, old_reported)
            ),
            None,
        )
        if index is None:
            rest.append(finding)
        else:
            folded.setdefault(index, []).append(finding)
    for index, audits in folded.items():
        finding = kept[index]
        worst = min((finding.severity, *(a.severity for a in audits)), key=lambda s: s.rank)
        kept[index] = replace(
            finding,
            severity=worst,
            message=finding.message
            + "".join(f"; audit of NEW ({a.rule}): {a.message}" for a in audits),
            evidence={
                **finding.evidence,
                "audit_findings": [
                    {
                        "rule": a.rule,
                        "id": a.id,
                        "severity": a.severity.value,
                        "tensor": a.tensor,
                        "units": list(a.units),
                    }
                    for a in audits
                ],
            },
        )
    return kept, rest


def _gradient_notes(old: bool, new: bool) -> list[str]:
    """Gradient support is data of one checkpoint (its optimizer state), not structure, so it
    cannot be shared; say so when only one side has it."""
    if old == new:
        return []
    if new:
        return [
            "only NEW stores optimizer state (gradient support): unsupported-weight could not "
            "be judged in OLD, so NEW's unsupported-weight findings count as new"
        ]
    return [
        "only OLD stores optimizer state (gradient support): unsupported-weight could not be "
        "judged in NEW"
    ]


def coverage_of_comparison(
    old: Checkpoint, new: Checkpoint, pairs: Sequence[Pair]
) -> CompareCoverage:
    """How much of each checkpoint the comparison lined up with the other."""

    def parameters(side: Checkpoint, layers: Sequence[Layer]) -> int:
        names = {n for layer in layers for n in layer.tensor_names}
        return sum(t.size for t in side.counted if t.name in names)

    matched = [p for p in pairs if p.old is not None and p.new is not None]
    compared = [p for p in matched if p.same_shape]
    return CompareCoverage(
        layers_old=len(old.layers),
        layers_new=len(new.layers),
        matched=len(matched),
        compared=len(compared),
        parameters_old=old.parameters,
        parameters_new=new.parameters,
        matched_parameters_new=parameters(new, [p.new for p in matched if p.new is not None]),
        compared_parameters_old=parameters(old, [p.old for p in compared if p.old is not None]),
        compared_parameters_new=parameters(new, [p.new for p in compared if p.new is not None]),
    )


def _frozen_notes(policy: Policy, old: Checkpoint) -> list[str]:
    names = [layer.name for layer in old.layers]
    return [
        f"frozen glob {glob!r} matches no layer of OLD"
        for glob in policy.frozen
        if not any(fnmatch.fnmatchcase(n, glob) for n in names)
    ]


def compare_checkpoints(
    old: Checkpoint, new: Checkpoint, policy: Policy, digest: str = DEFAULT_DIGEST.value
) -> Comparison:
    """Compare two loaded checkpoints under one policy; each side's checkpoint block carries
    its files' ``digest`` (``blake3`` or ``sha256``) under that algorithm's name."""
    as_stored = match_layers(old.layers, new.layers, scheme_aliases(old, new))
    # Both sides are judged with the richer side's structure (activation, links, norm, ...),
    # so a difference in what the files describe is never reported as a change of the model.
    shared = share_structure(old, new, as_stored)
    old, new, pairs = shared.old, shared.new, shared.pairs
    old_grads, new_grads = optimizer_source(old), optimizer_source(new)
    old_side = Side(old, policy, statistics(old))
    new_side = Side(new, policy, statistics(new))
    # Each audit reads through its side's statistics, which keep what they read: the
    # measures below reuse it instead of reading every layer a second time.
    old_audit = audit_checkpoint(old, policy, old_grads, stats=old_side.stats, digest=digest)
    new_audit = audit_checkpoint(new, policy, new_grads, stats=new_side.stats, digest=digest)
    alignments, rejected = _align_all(pairs, old_side, new_side)
    diffs: list[LayerDiff] = []
    total_diff = total_base = 0.0
    for pair, stored in zip(pairs, as_stored, strict=True):
        if pair.new is None:
            assert pair.old is not None
            diff = _removed(pair.old, old_side)
        elif not pair.same_shape:
            diff = _structural(pair, old_side, new_side)
        else:
            name = pair.new.name
            diff, diff_sq, base_sq = _matched(
                pair, alignments[name], rejected.get(name, ""), old_side, new_side
            )
            total_diff += diff_sq
            total_base += base_sq
        # The layer blocks say what each file describes; ``structure_from`` says what was judged.
        diffs.append(
            replace(
                diff,
                old_layer=layer_block(stored.old) if stored.old is not None else None,
                new_layer=layer_block(stored.new) if stored.new is not None else None,
                structure_from=shared.taken_from.get(pair.new.name) if pair.new else None,
            )
        )
    ranked = tuple(sorted(diffs, key=_rank_key))
    context = CompareContext(old=old, new=new, policy=policy, diffs=ranked)
    findings, silenced = run(context)
    fresh, present = split_audit(old_audit, new_audit, pairs, alignments)
    findings, fresh = fold_duplicates(findings, fresh, old_audit, pairs, alignments)
    notes = [
        *_frozen_notes(policy, old),
        *shared.notes,
        *_gradient_notes(old_grads is not None, new_grads is not None),
        *(f"OLD: {n}" for n in old.notes),
        *(f"NEW: {n}" for n in new.notes),
    ]
    overall = relative(total_diff, total_base) if total_base > 0 or total_diff > 0 else None
    return Comparison(
        old=old_audit.checkpoint,
        new=new_audit.checkpoint,
        layers=ranked,
        findings=rank(findings),
        audit_new=rank(fresh),
        audit_present=rank(present),
        overall_relative_change=None if overall is None or math.isnan(overall) else overall,
        notes=tuple(notes),
        ignored=len(silenced) + new_audit.ignored,
        coverage=coverage_of_comparison(old, new, pairs),
    )
