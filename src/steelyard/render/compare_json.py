"""The ``steelyard.compare/1`` JSON document."""

from __future__ import annotations

import json
from typing import Any

from steelyard.comparison.report import COMPARE_SCHEMA, CompareCoverage, CompareReport, LayerDiff
from steelyard.findings import Finding
from steelyard.ranking import rank
from steelyard.render.json_report import _clean, finding_block


def _norms(values: tuple[float, float, float] | None) -> dict[str, float] | None:
    if values is None:
        return None
    low, mid, high = values
    return {"min": low, "median": mid, "max": high}


def layer_entry(diff: LayerDiff) -> dict[str, Any]:
    """One entry of ``layers``: the fixed keys first, then the detail."""
    entry: dict[str, Any] = {
        "name": diff.name,
        "status": diff.status.value,
        "relative_change": diff.relative_change,
        "cosine": diff.cosine,
        "units_died": list(diff.units_died),
        "units_revived": list(diff.units_revived),
        "permuted": diff.permuted,
        "precision_only": diff.precision_only,
        "precision": diff.precision,
        "matched_by": diff.matched_by,
        "old_name": diff.old_name,
        "new_name": diff.new_name,
        "kind": (diff.new_layer or diff.old_layer or {}).get("kind"),
        "bias_relative_change": diff.bias_relative_change,
        "fan_in_norm_old": _norms(diff.fan_in_norm_old),
        "fan_in_norm_new": _norms(diff.fan_in_norm_new),
        "moved_units": diff.moved_units,
        "moved_elements": diff.moved_elements,
        "elements": diff.elements,
        "nonfinite_new": diff.nonfinite_new,
        "max_abs_change": diff.max_abs_change,
        "stored_old": diff.stored_old,
        "stored_new": diff.stored_new,
        "rows_flattened": list(diff.rows_flattened),
        "update_rank": diff.update_rank,
        "update_rank_above": diff.update_rank_above,
        "top_units": [
            {
                "unit": u.unit,
                "relative_change": u.relative_change,
                "old_norm": u.old_norm,
                "new_norm": u.new_norm,
            }
            for u in diff.top_units
        ],
    }
    if diff.status.structural:
        entry["old_layer"] = dict(diff.old_layer) if diff.old_layer else None
        entry["new_layer"] = dict(diff.new_layer) if diff.new_layer else None
    if diff.note:
        entry["note"] = diff.note
    if diff.structure_from:
        entry["structure_from"] = diff.structure_from
    return entry


def coverage_entry(coverage: CompareCoverage | None) -> dict[str, Any] | None:
    """The ``coverage`` object: matched layers and the parameters compared on each side."""
    if coverage is None:
        return None
    return {
        "layers_old": coverage.layers_old,
        "layers_new": coverage.layers_new,
        "matched_layers": coverage.matched,
        "compared_layers": coverage.compared,
        "parameters_old": coverage.parameters_old,
        "parameters_new": coverage.parameters_new,
        "matched_parameters_new": coverage.matched_parameters_new,
        "compared_parameters_old": coverage.compared_parameters_old,
        "compared_parameters_new": coverage.compared_parameters_new,
        "compared_share_old": coverage.share_old,
        "compared_share_new": coverage.share_new,
    }


def _finding(finding: Finding, origin: str, present: bool) -> dict[str, Any]:
    return {**finding_block(finding), "origin": origin, "present_in_old": present}


def compare_document(report: CompareReport) -> dict[str, Any]:
    """The document as plain data (before NaN/Inf are written as null)."""
    comparison = report.comparison
    own = {f.rule for f in comparison.findings}
    findings = [
        _finding(f, "compare" if f.rule in own else "audit", False) for f in rank(comparison.gated)
    ]
    findings += [_finding(f, "audit", True) for f in comparison.audit_present]
    summary: dict[str, Any] = {
        **comparison.counts(),
        "layers": comparison.statuses(),
        "permuted": sum(1 for d in comparison.layers if d.permuted),
        "precision_only": sum(1 for d in comparison.layers if d.precision_only),
        "units_died": sum(len(d.units_died) for d in comparison.layers),
        "units_revived": sum(len(d.units_revived) for d in comparison.layers),
        "overall_relative_change": comparison.overall_relative_change,
        "present_in_old": len(comparison.audit_present),
        "ignored": comparison.ignored,
    }
    return {
        "schema": COMPARE_SCHEMA,
        "old": dict(comparison.old),
        "new": dict(comparison.new),
        "coverage": coverage_entry(comparison.coverage),
        "layers": [layer_entry(d) for d in comparison.layers],
        "findings": findings,
        "summary": summary,
        "gate": {"fail_on": report.fail_on, "passed": report.passed},
        "tool": {"name": "steelyard", "version": report.tool_version},
        "created": report.created,
        "policy": {"source": report.policy_source, "frozen": list(report.frozen)},
        "notes": list(comparison.notes),
    }


def render_compare_json(report: CompareReport) -> str:
    """The JSON text: layers in rank order, gated findings in rank order, then those already
    present in OLD."""
    return json.dumps(_clean(compare_document(report)), indent=2, ensure_ascii=False) + "\n"
