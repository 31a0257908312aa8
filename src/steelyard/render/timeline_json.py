"""The ``steelyard.timeline/1`` JSON document (fields documented in docs/timeline.md, schema in
docs/schemas/steelyard.timeline-1.schema.json).

Per layer, each measure is one array aligned with ``checkpoints`` (null where the checkpoint
has no such layer or the value is undefined), so a chart reads a series without reshaping.
"""

from __future__ import annotations

import json
from collections.abc import Callable
from typing import Any

from steelyard.render.json_report import _clean
from steelyard.report import CAUTION
from steelyard.run_timeline.result import (
    TIMELINE_SCHEMA,
    CheckpointEntry,
    Drift,
    FindingSpan,
    LayerPoint,
    LayerSeries,
    Timeline,
)

#: Series of every layer, in this order: name → value of one point.
_SERIES: dict[str, Callable[[LayerPoint], Any]] = {
    "fan_in_norm_median": lambda p: p.fan_in_norm_median,
    "fan_in_norm_max": lambda p: p.fan_in_norm_max,
    "dead_units": lambda p: p.dead,
    "nonfinite": lambda p: p.nonfinite,
    "relative_change_from_previous": lambda p: _change(p.from_previous),
    "cosine_from_previous": lambda p: _cosine(p.from_previous),
    "relative_change_from_first": lambda p: _change(p.from_first),
    "cosine_from_first": lambda p: _cosine(p.from_first),
}


def _change(drift: Drift | None) -> float | None:
    return None if drift is None else drift.relative_change


def _cosine(drift: Drift | None) -> float | None:
    return None if drift is None else drift.cosine


def _checkpoint(entry: CheckpointEntry) -> dict[str, Any]:
    return {
        "index": entry.index,
        "path": entry.path,
        "format": entry.format,
        # Under the algorithm's name, as in the audit's and the comparison's checkpoint blocks.
        entry.digest[0]: entry.digest[1],
        "parameters": entry.parameters,
        "step": entry.position.value,
        "step_unit": entry.position.unit,
        "step_source": entry.position.source,
        "findings": entry.findings,
    }


def _layer(series: LayerSeries) -> dict[str, Any]:
    points = series.points
    return {
        "name": series.name,
        "kind": series.kind,
        "units": series.units,
        "fan_in": series.fan_in,
        "present": [p is not None for p in points],
        "series": {
            key: [None if p is None else value(p) for p in points] for key, value in _SERIES.items()
        },
        "findings": [None if p is None else list(p.findings) for p in points],
    }


def _step(timeline: Timeline, index: int | None) -> int | None:
    return None if index is None else timeline.checkpoints[index].position.value


def _finding(timeline: Timeline, span: FindingSpan) -> dict[str, Any]:
    return {
        "rule": span.rule,
        "layer": span.layer,
        "tensor": span.tensor,
        "severity": span.severity.value,
        "last_severity": None if span.last_severity is None else span.last_severity.value,
        "appeared": span.appeared,
        "appeared_step": _step(timeline, span.appeared),
        "disappeared": span.disappeared,
        "disappeared_step": _step(timeline, span.disappeared),
        "present_at_end": span.present_at_end,
        "spans": [list(s) for s in span.spans],
        "units_first": list(span.units_first),
        "units_last": list(span.units_last),
    }


def timeline_document(timeline: Timeline) -> dict[str, Any]:
    """The document as plain data (NaN and infinities not yet written as null)."""
    failing = timeline.failing()
    return {
        "schema": TIMELINE_SCHEMA,
        "tool": {"name": "steelyard", "version": timeline.tool_version},
        "created": timeline.created,
        "order": timeline.order,
        "policy": {"source": timeline.policy_source},
        "checkpoints": [_checkpoint(c) for c in timeline.checkpoints],
        "layers": [_layer(s) for s in timeline.layers],
        "findings": [_finding(timeline, s) for s in timeline.findings],
        "summary": {
            "checkpoints": len(timeline.checkpoints),
            "layers": len(timeline.layers),
            "findings": len(timeline.findings),
            "present_at_end": sum(1 for s in timeline.findings if s.present_at_end),
        },
        "gate": {
            "fail_on": timeline.fail_on,
            "passed": timeline.passed,
            "failing": [_finding(timeline, s) for s in failing],
        },
        "notes": list(timeline.notes),
        "caution": CAUTION,
    }


def render_timeline_json(timeline: Timeline) -> str:
    """The JSON text."""
    return json.dumps(_clean(timeline_document(timeline)), indent=2, ensure_ascii=False) + "\n"
