"""Vega-Lite specifications of the comparison report's chart: what changed along the model."""

from __future__ import annotations

from typing import Any

from steelyard.comparison.report import Comparison, LayerDiff
from steelyard.render.html.charts import Spec, base, depth_zoom, finite, positive
from steelyard.render.html.order import along_model

#: Our colours for the layer statuses (precision-only layers count as unchanged in value).
STATUS_COLOURS = {
    "changed": "#2f6f8f",
    "same": "#9aa7b1",
    "precision-only": "#7a9a3a",
    "reshaped": "#8a4f9e",
    "added": "#2e8b57",
    "removed": "#b8322a",
}


def in_depth_order(comparison: Comparison) -> list[LayerDiff]:
    """The comparison's layers along the model (they are stored ranked by change)."""
    blocks = [
        {**(d.new_layer or d.old_layer or {}), "name": d.name} for d in comparison.layers
    ]
    return [comparison.layers[i] for i in along_model(blocks)]


def _status(diff: Any) -> str:
    return "precision-only" if diff.precision_only else str(diff.status.value)


def change_charts(comparison: Comparison) -> list[Spec]:
    """Per layer along the model: the relative change ‖B−A‖/‖A‖ (log axis), the cosine of
    the weights, and the units that died or came back: one chart each, on the same x axis."""
    rows = []
    for depth, diff in enumerate(in_depth_order(comparison)):
        rows.append({
            "depth": depth, "layer": diff.name, "status": _status(diff),
            "change": positive(diff.relative_change if diff.relative_change is not None else 0.0),
            "cosine": finite(diff.cosine),
            "died": len(diff.units_died), "revived": len(diff.units_revived),
            "note": diff.note,
        })
    if not rows:
        return []
    x = {"field": "depth", "type": "quantitative", "title": "layer, in checkpoint order",
         "scale": {"domain": [-0.5, len(rows) - 0.5]},
         "axis": {"tickMinStep": 1, "format": "d"}}
    order = list(STATUS_COLOURS)
    colour = {"field": "status", "type": "nominal", "title": "layer",
              "scale": {"domain": order, "range": [STATUS_COLOURS[s] for s in order]}}
    tooltip = [{"field": "layer"}, {"field": "status"},
               {"field": "change", "format": ".3g", "title": "relative change"},
               {"field": "cosine", "format": ".6f"},
               {"field": "died", "title": "units died"}, {"field": "revived", "title": "units revived"},
               {"field": "note"}]
    change: Spec = {
        "height": 170,
        "params": depth_zoom(),
        "transform": [{"calculate": "datum.depth - 0.35", "as": "left"},
                      {"calculate": "datum.depth + 0.35", "as": "right"}],
        "mark": {"type": "bar"},
        "encoding": {
            "x": {**x, "field": "left"}, "x2": {"field": "right"},
            "y": {"field": "change", "type": "quantitative", "scale": {"type": "log"},
                  "title": "relative change"},
            "color": colour, "tooltip": tooltip,
        },
    }
    cos: Spec = {
        "height": 110,
        "mark": {"type": "line", "point": True, "color": "#28323c"},
        "encoding": {
            "x": x,
            "y": {"field": "cosine", "type": "quantitative", "scale": {"zero": False},
                  "title": "cosine"},
            "tooltip": tooltip,
        },
    }
    units: Spec = {
        "height": 90,
        "transform": [{"fold": ["died", "revived"], "as": ["event", "count"]},
                      {"filter": "datum.count > 0"}],
        "mark": {"type": "point", "filled": True, "size": 80},
        "encoding": {
            "x": x,
            "y": {"field": "event", "type": "nominal", "title": None},
            "size": {"field": "count", "type": "quantitative", "title": "units"},
            "color": {"field": "event", "type": "nominal", "title": "units",
                      "scale": {"domain": ["died", "revived"], "range": ["#b8322a", "#2e8b57"]}},
            "tooltip": [{"field": "layer"}, {"field": "event"}, {"field": "count"}],
        },
    }
    panels = [change, cos]
    if any(r["died"] or r["revived"] for r in rows):
        panels.append(units)
    return [
        base({"data": {"values": rows}, **{k: v for k, v in p.items() if k != "height"}},
             height=int(p["height"]))
        for p in panels
    ]
