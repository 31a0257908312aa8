"""One checkpoint's contribution to the timeline: what its audit measured per layer, and which
findings it holds. Nothing here re-implements a rule: the numbers come from the audit's own
layer-health rows (:mod:`steelyard.checkpoint_audit`) and the statistics the audit read through."""

from __future__ import annotations

import math
from dataclasses import dataclass

from steelyard.findings import Finding
from steelyard.graph import Checkpoint
from steelyard.report import CheckpointAudit
from steelyard.run_timeline.result import LayerPoint
from steelyard.stats import LayerStats

#: A finding's identity across checkpoints: (rule, layer, tensor for findings on no layer).
FindingKey = tuple[str, str | None, str | None]


def finding_key(finding: Finding) -> FindingKey:
    """Layer findings are followed by (rule, layer) whatever their units, so a finding that
    grows from 3 to 5 dead units stays one finding; others by (rule, tensor)."""
    if finding.layer is not None:
        return finding.rule, finding.layer, None
    return finding.rule, None, finding.tensor


@dataclass(frozen=True, slots=True)
class Snapshot:
    """One checkpoint reduced to what the timeline keeps (drift is added by the engine)."""

    points: dict[str, LayerPoint]
    """Layer name → its point, drift not yet measured."""
    findings: dict[FindingKey, list[Finding]]


def _finite(value: float) -> float | None:
    return value if math.isfinite(value) else None


def nonfinite_elements(checkpoint: Checkpoint, stats: LayerStats, names: tuple[str, ...]) -> int:
    """NaN and ±Inf elements over the named tensors. The audit's weight passes and the
    ``nonfinite`` rule's scan already counted every parameter tensor, so this reads nothing
    new (the counts are memoised in ``stats``)."""
    total = 0
    for name in names:
        tensor = checkpoint.tensors.get(name)
        if tensor is not None:
            total += sum(stats.nonfinite(tensor))
    return total


def snapshot(checkpoint: Checkpoint, audit: CheckpointAudit, stats: LayerStats) -> Snapshot:
    """The per-layer summaries and findings of one audited checkpoint."""
    by_layer: dict[str, set[str]] = {}
    findings: dict[FindingKey, list[Finding]] = {}
    for finding in audit.findings:
        findings.setdefault(finding_key(finding), []).append(finding)
        if finding.layer is not None:
            by_layer.setdefault(finding.layer, set()).add(finding.rule)
    points: dict[str, LayerPoint] = {}
    for health in audit.layers:
        name = str(health.layer["name"])
        layer = checkpoint.layer(name)
        assert layer is not None, "the audit's rows are the checkpoint's layers"
        _low, median, high = health.fan_in_norm
        points[name] = LayerPoint(
            fan_in_norm_median=_finite(median),
            fan_in_norm_max=_finite(high),
            dead=health.dead,
            nonfinite=nonfinite_elements(checkpoint, stats, layer.tensor_names),
            from_previous=None,
            from_first=None,
            findings=tuple(sorted(by_layer.get(name, ()))),
        )
    return Snapshot(points, findings)
