"""Running the rules over one checkpoint: loaders → graph → rules → findings → ranking."""

from __future__ import annotations

import hashlib
import math
from collections.abc import Iterable
from dataclasses import replace

import numpy as np

from steelyard.findings import Finding, Severity
from steelyard.gradients import GradientSource
from steelyard.graph import Checkpoint, Layer
from steelyard.inventory import checkpoint_block, layer_block
from steelyard.policy import Policy
from steelyard.ranking import rank
from steelyard.report import CheckpointAudit, LayerHealth
from steelyard.rules import AuditContext, RuleSettings, RuleSpec, registry
from steelyard.stats import LayerStats

_HASH_CHUNK = 8 * 2**20


def sha256_of(files: Iterable[str]) -> str:
    """SHA-256 over the bytes of every file of the checkpoint, in order."""
    digest = hashlib.sha256()
    for name in files:
        with open(name, "rb") as handle:
            while chunk := handle.read(_HASH_CHUNK):
                digest.update(chunk)
    return digest.hexdigest()


def run_rules(
    checkpoint: Checkpoint,
    policy: Policy,
    gradients: GradientSource | None,
    rules: dict[str, RuleSpec] | None = None,
) -> tuple[list[Finding], int, LayerStats]:
    """Every enabled rule's findings (policy severities applied, ignores removed)."""
    stats = LayerStats(checkpoint)
    context = AuditContext(checkpoint=checkpoint, stats=stats, policy=policy, gradients=gradients)
    findings: list[Finding] = []
    ignored = 0
    for spec in (rules or registry()).values():
        settings = RuleSettings(spec.name, spec.thresholds, policy)
        for finding in spec.check(context, settings):
            layer = checkpoint.layer(finding.layer) if finding.layer else None
            if not settings.enabled(layer):
                continue
            if policy.ignored(spec.name, finding.layer) is not None:
                ignored += 1
                continue
            chosen = settings.for_layer(layer).get("severity")
            if chosen:
                finding = replace(finding, severity=Severity(chosen))
            findings.append(replace(finding, checkpoint=checkpoint.path))
    return findings, ignored, stats


def _health(layer: Layer, stats: LayerStats, findings: list[Finding], graded: bool) -> LayerHealth:
    norms = stats.row_norms(layer)
    finite = norms[np.isfinite(norms)]
    if finite.size:
        low, mid, high = float(finite.min()), float(np.median(finite)), float(finite.max())
    else:
        low = mid = high = math.nan
    histogram: tuple[int, ...] = ()
    if finite.size and high > 0:
        floor = max(low, high * 1e-6)
        edges = np.geomspace(floor, high * (1 + 1e-9), 9)
        histogram = tuple(int(c) for c in np.histogram(np.clip(finite, floor, None), bins=edges)[0])
    mine = [f for f in findings if f.layer == layer.name]
    dead = {u for f in mine if f.rule == "dead-unit" for u in f.units}
    twins = {u for f in mine if f.rule == "twin-units" for u in f.units}
    share = None
    if graded:
        flagged = [f for f in mine if f.rule == "unsupported-weight" and "flagged" in f.evidence]
        share = sum(int(f.evidence["flagged"]) for f in flagged) / max(
            1, layer.units * layer.fan_in
        )
    return LayerHealth(
        layer=layer_block(layer),
        fan_in_norm=(low, mid, high),
        norm_histogram=histogram,
        dead=len(dead),
        twins=len(twins),
        unsupported_share=share,
    )


def audit_checkpoint(
    checkpoint: Checkpoint,
    policy: Policy,
    gradients: GradientSource | None,
    rules: dict[str, RuleSpec] | None = None,
) -> CheckpointAudit:
    """Audit one loaded checkpoint."""
    findings, ignored, stats = run_rules(checkpoint, policy, gradients, rules)
    ranked = rank(findings)
    block = dict(checkpoint_block(checkpoint))
    block["sha256"] = sha256_of(checkpoint.files or (checkpoint.path,))
    health = tuple(
        _health(layer, stats, findings, gradients is not None) for layer in checkpoint.layers
    )
    return CheckpointAudit(
        checkpoint=block,
        layers=health,
        findings=ranked,
        gradient_source=gradients.description if gradients else None,
        notes=checkpoint.notes,
        ignored=ignored,
    )
