"""Vega-Lite specifications of the timeline page: one line per layer across the run's
checkpoints for each measure, and when each finding was present."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from steelyard.render.html.charts import SEVERITY_COLOURS, Spec, base, finite, positive
from steelyard.run_timeline.result import LayerPoint, Timeline

#: Lines get a legend up to this many layers; beyond, the tooltip names the layer.
LEGEND_LAYERS = 16


def positions(timeline: Timeline) -> tuple[list[float], str]:
    """The x value of each checkpoint and the axis title: the training step (or epoch) when
    every checkpoint has one of the same unit, else the checkpoint's place in the order."""
    known = [c.position for c in timeline.checkpoints]
    units = {p.unit for p in known}
    if all(p.value is not None for p in known) and len(units) == 1:
        return [float(p.value or 0) for p in known], str(units.pop())
    return [float(c.index) for c in timeline.checkpoints], "checkpoint, in run order"


#: (key, title, value of a point, log axis) for each drawn measure.
MEASURES: tuple[tuple[str, str, Callable[[LayerPoint], float | None], bool], ...] = (
    ("median", "fan-in norm, median of the units", lambda p: positive(p.fan_in_norm_median or 0.0), True),
    ("max", "fan-in norm, largest unit", lambda p: positive(p.fan_in_norm_max or 0.0), True),
    ("dead", "dead units", lambda p: float(p.dead), False),
    ("nonfinite", "NaN and ±Inf values in the layer", lambda p: float(p.nonfinite), False),
    ("drift_previous", "relative change from the previous checkpoint",
     lambda p: positive(p.from_previous.relative_change or 0.0) if p.from_previous else None, True),
    ("drift_first", "relative change from the first checkpoint",
     lambda p: positive(p.from_first.relative_change or 0.0) if p.from_first else None, True),
)


def measure_charts(timeline: Timeline) -> list[tuple[str, str, Spec]]:
    """(key, title, chart) for every measure that has a value somewhere in the run."""
    xs, x_title = positions(timeline)
    charts = []
    for key, title, value_of, log in MEASURES:
        rows = []
        for series in timeline.layers:
            for index, point in enumerate(series.points):
                if point is None:
                    continue
                value = value_of(point)
                rows.append({
                    "x": xs[index], "checkpoint": timeline.checkpoints[index].path,
                    "layer": series.name, "value": finite(value),
                })
        if not any(r["value"] for r in rows):
            continue
        charts.append((key, title, _lines(rows, x_title, title, log, len(timeline.layers))))
    return charts


def _lines(rows: list[dict[str, Any]], x_title: str, title: str, log: bool, layers: int) -> Spec:
    hover = {"name": "picked_layer", "select": {"type": "point", "fields": ["layer"], "on": "pointerover",
                                               "clear": "pointerout"}}
    colour: dict[str, Any] = {"field": "layer", "type": "nominal", "title": "layer"}
    if layers > LEGEND_LAYERS:
        colour["legend"] = None
    y: dict[str, Any] = {"field": "value", "type": "quantitative", "title": title}
    if log:
        y["scale"] = {"type": "log"}
    return base({
        "data": {"values": rows},
        "params": [hover],
        "mark": {"type": "line", "point": True, "strokeWidth": 2},
        "encoding": {
            "x": {"field": "x", "type": "quantitative", "title": x_title, "axis": {"format": ","}},
            "y": y,
            "color": colour,
            "opacity": {"condition": {"param": "picked_layer", "empty": True, "value": 1}, "value": 0.2},
            "tooltip": [{"field": "layer"}, {"field": "x", "title": x_title},
                        {"field": "value", "format": ".4g", "title": title}, {"field": "checkpoint"}],
        },
    }, height=200)


def presence_chart(timeline: Timeline) -> Spec | None:
    """A finding per row, a cell per checkpoint where it was present, coloured by severity."""
    xs, x_title = positions(timeline)
    rows = []
    for finding in timeline.findings:
        where = finding.layer or finding.tensor or "(checkpoint)"
        label = f"{finding.rule} · {where}"
        for first, last in finding.spans:
            for index in range(first, last + 1):
                rows.append({"finding": label, "x": xs[index], "severity": finding.severity.value,
                             "checkpoint": timeline.checkpoints[index].path})
    if not rows:
        return None
    labels = list(dict.fromkeys(r["finding"] for r in rows))
    order = ["error", "warning", "info"]
    return base({
        "data": {"values": rows},
        "mark": {"type": "square", "size": 140, "filled": True},
        "encoding": {
            "x": {"field": "x", "type": "quantitative", "title": x_title, "axis": {"format": ","}},
            "y": {"field": "finding", "type": "nominal", "sort": labels, "title": None},
            "color": {"field": "severity", "type": "nominal", "title": "severity",
                      "scale": {"domain": order, "range": [SEVERITY_COLOURS[s] for s in order]}},
            "tooltip": [{"field": "finding"}, {"field": "x", "title": x_title}, {"field": "severity"},
                        {"field": "checkpoint"}],
        },
    }, height=max(40, 22 * len(labels)))
