"""The ``steelyard.audit/1`` JSON document (and ``steelyard.audit-set/1`` for several files)."""

from __future__ import annotations

import json
import math
from typing import Any

from steelyard.coverage import coverage_document
from steelyard.findings import Finding
from steelyard.report import AUDIT_SCHEMA, CheckpointAudit, Report
from steelyard.stats.spread import PERCENTILES

SET_SCHEMA = "steelyard.audit-set/1"


def _clean(value: Any) -> Any:
    """JSON has no NaN or Infinity: write them as null (strings where they are the point)."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {str(k): _clean(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_clean(v) for v in value]
    return value


def finding_block(finding: Finding) -> dict[str, Any]:
    """One entry of ``findings``."""
    return {
        "id": finding.id,
        "rule": finding.rule,
        "severity": finding.severity.value,
        "layer": finding.layer,
        "tensor": finding.tensor,
        "units": list(finding.units),
        "score": finding.score,
        "message": finding.message,
        "hint": finding.hint,
        "evidence": dict(finding.evidence),
    }


def audit_block(report: Report, audit: CheckpointAudit) -> dict[str, Any]:
    """The document of one checkpoint."""
    layers = []
    for health in audit.layers:
        low, mid, high = health.fan_in_norm
        spread: dict[str, Any] = {"min": low, "median": mid, "max": high}
        if health.norm_percentiles:
            spread["percentiles"] = {
                f"p{q:g}": v for q, v in zip(PERCENTILES, health.norm_percentiles, strict=True)
            }
            spread["outliers"] = [{"unit": u, "norm": v} for u, v in health.norm_outliers]
        entry = {**health.layer, "fan_in_norm": spread}
        if health.measured:
            entry["measured"] = dict(health.measured)
        layers.append(entry)
    document: dict[str, Any] = {
        "schema": AUDIT_SCHEMA,
        "tool": {"name": "steelyard", "version": report.tool_version},
        "checkpoint": dict(audit.checkpoint),
        "layers": layers,
        "findings": [finding_block(f) for f in audit.findings],
        "summary": audit.counts(),
        "gate": {"fail_on": report.fail_on, "passed": not audit.failing(report.gate)},
        "coverage": None if audit.coverage is None else coverage_document(audit.coverage),
        "gradient_source": audit.gradient_source,
        "notes": list(audit.notes),
        "created": report.created,
        "policy": {"source": report.policy_source, **dict(report.policy)},
    }
    if report.baseline is not None:
        document["baseline"] = {
            **dict(report.baseline),
            "baselined": [finding_block(f) for f in audit.baselined],
        }
    if audit.ignored:
        document["summary"]["ignored"] = audit.ignored
        document["suppressed"] = [
            {**finding_block(s.finding), "reason": s.reason, "ignore_layers": s.layers}
            for s in audit.suppressed
        ]
    return document


def _run_block(report: Report) -> dict[str, Any]:
    """What the run as a whole found beyond each checkpoint."""
    return {
        "errors": [{"path": e.path, "reason": e.reason} for e in report.errors],
        "skipped": [{"path": s.path, "reason": s.reason} for s in report.skipped],
        "notes": list(report.notes),
        "policy_notes": list(report.policy_notes),
    }


def render_json(report: Report) -> str:
    """The JSON text, findings in rank order."""
    if len(report.audits) == 1 and not report.errors and not report.skipped:
        document = audit_block(report, report.audits[0])
        document["notes"] += [*report.notes, *report.policy_notes]
    else:
        totals = {"error": 0, "warning": 0, "info": 0}
        for audit in report.audits:
            for key, value in audit.counts().items():
                totals[key] += value
        document = {
            "schema": SET_SCHEMA,
            "tool": {"name": "steelyard", "version": report.tool_version},
            "audits": [audit_block(report, a) for a in report.audits],
            **_run_block(report),
            "summary": {**totals, "checkpoints": len(report.audits), "unreadable": len(report.errors)},
            "gate": {
                "fail_on": report.fail_on,
                "passed": report.passed,
                "unreadable": "gate-failure" if report.unreadable_fails_gate else "input-error",
            },
        }
    return json.dumps(_clean(document), indent=2, ensure_ascii=False) + "\n"
