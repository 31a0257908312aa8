"""The audit as one HTML page: the run, then each checkpoint with its charts and tables."""

from __future__ import annotations

from dataclasses import replace
from typing import Any

from steelyard.coverage import describe
from steelyard.digest import digest_shown
from steelyard.render.html.charts import (
    findings_chart,
    norm_spread_chart,
    parts_chart,
    spectrum_chart,
)
from steelyard.render.html.order import along_model
from steelyard.render.html.page import masthead, render_page, verdict
from steelyard.report import CheckpointAudit, Report


def render_audit_html(report: Report) -> str:
    """The whole report as a self-contained HTML document."""
    specs: list[tuple[str, dict[str, Any]]] = []
    checkpoints = [_checkpoint(report, i, audit, specs) for i, audit in enumerate(report.audits)]
    paths = [str(a.checkpoint.get("path", "")) for a in report.audits] or [e.path for e in report.errors]
    title = paths[0] if len(paths) == 1 else f"{len(paths):,} checkpoints"
    return render_page(
        "audit.html.j2",
        specs,
        title=title,
        **masthead(report, gate_off=report.gate is None and not report.errors),
        checkpoints=checkpoints,
        errors=report.errors,
        skipped=report.skipped,
        notes=report.notes,
        policy_notes=report.policy_notes,
    )


def _checkpoint(
    report: Report, index: int, audit: CheckpointAudit, specs: list[tuple[str, dict[str, Any]]]
) -> dict[str, Any]:
    anchor = f"cp{index}"
    # Charts and the layer table go along the model, not in stored (name-sorted) order.
    order = along_model([h.layer for h in audit.layers])
    audit = replace(audit, layers=tuple(audit.layers[i] for i in order))
    charts: dict[str, str | None] = {}
    builders = (
        ("spread", norm_spread_chart), ("findings", findings_chart), ("parts", parts_chart),
        ("spectrum", spectrum_chart),
    )
    for key, build in builders:
        spec = build(audit)
        charts[key] = None
        if spec is not None:
            spec_id = f"{anchor}-chart-{key}"
            charts[key] = spec_id
            specs.append((spec_id, spec))
    per_layer: dict[str, int] = {}
    for finding in audit.findings:
        if finding.layer is not None:
            per_layer[finding.layer] = per_layer.get(finding.layer, 0) + 1
    layers = []
    layer_anchor: dict[str, str] = {}
    for depth, health in enumerate(audit.layers):
        name = str(health.layer["name"])
        layer_anchor[name] = f"{anchor}-layer-{depth}"
        low, median, high = health.fan_in_norm
        layers.append({
            "anchor": layer_anchor[name], "name": name, "kind": health.layer.get("kind"),
            "units": health.layer.get("units"), "fan_in": health.layer.get("fan_in"),
            "low": low, "median": median, "high": high, "histogram": health.norm_histogram,
            "dead": health.dead, "twins": health.twins,
            "unsupported": "—" if health.unsupported_share is None else f"{health.unsupported_share:.1%}",
            "findings": per_layer.get(name, 0),
        })
    block = audit.checkpoint
    gate_off = report.gate is None
    return {
        "anchor": anchor,
        "path": str(block.get("path", "")),
        "format": block.get("format", ""),
        "parameters": block.get("parameters"),
        **dict(zip(("digest_label", "digest"), digest_shown(block), strict=True)),
        "layer_count": len(audit.layers),
        "verdict": verdict(gate_off, bool(audit.failing(report.gate))),
        "counts": audit.counts(),
        "coverage": describe(audit.coverage) if audit.coverage is not None else "not measured",
        "gradient_source": audit.gradient_source,
        "ignored": audit.ignored,
        "baselined": len(audit.baselined),
        "notes": audit.notes,
        "charts": charts,
        "findings": audit.findings,
        "layers": layers,
        "layer_anchor": layer_anchor,
        "suppressed": audit.suppressed,
    }
