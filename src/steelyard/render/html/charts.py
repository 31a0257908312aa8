"""Vega-Lite specifications of the audit report's charts, built from the report alone.

Each chart carries its own data (a few numbers per layer, never per weight) and works with the
chart runtime of :mod:`steelyard.render.html.bundle`. Layers are placed by their position in
the checkpoint (``depth``), so the charts line up with each other and zoom together on the x
axis; names come back in tooltips and in the tables below the charts.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from typing import Any

from steelyard.findings import Finding, Severity
from steelyard.report import CheckpointAudit
from steelyard.stats.spread import PERCENTILES

Spec = dict[str, Any]

#: Our colours for the severities and for "no finding" (chosen for contrast in print too).
SEVERITY_COLOURS = {
    "error": "#b8322a",
    "warning": "#c98a0b",
    "info": "#3d7ea6",
    "none": "#6f7f8c",
}
_ORDER = ["error", "warning", "info", "none"]
_SCHEMA = "https://vega.github.io/schema/vega-lite/v6.json"


def severity_scale() -> dict[str, Any]:
    """The colour encoding every chart uses for a severity field."""
    return {
        "field": "severity",
        "type": "nominal",
        "title": "worst finding",
        "scale": {"domain": _ORDER, "range": [SEVERITY_COLOURS[s] for s in _ORDER]},
        "sort": _ORDER,
    }


def base(spec: Spec, *, height: int) -> Spec:
    """A chart that fills its container's width, in the report's type and colours."""
    return {
        "$schema": _SCHEMA,
        "width": "container",
        "height": height,
        "autosize": {"type": "fit-x", "contains": "padding"},
        "config": {
            "font": "system-ui, sans-serif",
            "axis": {"labelColor": "#28323c", "titleColor": "#28323c", "gridColor": "#e3e8ec"},
            "view": {"stroke": None},
        },
        **spec,
    }


def positive(value: float) -> float | None:
    """A value a log axis can show: finite and above zero, else None (not drawn)."""
    return value if math.isfinite(value) and value > 0 else None


def finite(value: float | None) -> float | None:
    """JSON has no NaN or infinity: those are left out of the chart data."""
    return value if value is not None and math.isfinite(value) else None


def worst_by_layer(findings: Iterable[Finding]) -> dict[str, str]:
    """The worst severity found in each layer."""
    worst: dict[str, Severity] = {}
    for finding in findings:
        if finding.layer is None:
            continue
        seen = worst.get(finding.layer)
        if seen is None or finding.severity.rank < seen.rank:
            worst[finding.layer] = finding.severity
    return {name: severity.value for name, severity in worst.items()}


def depth_zoom() -> list[dict[str, Any]]:
    """Zoom and pan along the depth axis (mouse wheel, drag; double-click resets)."""
    return [{"name": "depth_zoom", "select": {"type": "interval", "encodings": ["x"]}, "bind": "scales"}]


def norm_spread_chart(audit: CheckpointAudit) -> Spec | None:
    """Per layer, the spread of its units' fan-in norms on a log axis: whiskers from the 5th
    to the 95th percentile, a box from the 25th to the 75th, the median as a tick, far-out
    units as diamonds; coloured by the layer's worst finding."""
    worst = worst_by_layer(audit.findings)
    rows: list[dict[str, Any]] = []
    outliers: list[dict[str, Any]] = []
    for depth, health in enumerate(audit.layers):
        name = str(health.layer["name"])
        quantiles = health.norm_percentiles or (math.nan,) * len(PERCENTILES)
        p5, p25, p50, p75, p95 = (positive(v) for v in quantiles)
        low, _, high = health.fan_in_norm
        rows.append({
            "depth": depth, "layer": name, "kind": health.layer.get("kind"),
            "shape": f"{health.layer.get('units')} × {health.layer.get('fan_in')}",
            "p5": p5, "p25": p25, "median": p50, "p75": p75, "p95": p95,
            "min": finite(low), "max": finite(high), "dead": health.dead,
            "severity": worst.get(name, "none"),
        })
        outliers += [
            {"depth": depth, "layer": name, "unit": unit, "norm": positive(norm)}
            for unit, norm in health.norm_outliers
        ]
    if not any(r["median"] is not None for r in rows):
        return None
    x = {"field": "depth", "type": "quantitative", "title": "layer, in checkpoint order",
         "axis": {"tickMinStep": 1, "format": "d"}}
    y = {"type": "quantitative", "scale": {"type": "log"}, "title": "unit fan-in L2 norm"}
    tooltip = [
        {"field": "layer"}, {"field": "kind"}, {"field": "shape"},
        {"field": "p5", "format": ".4g", "title": "5th percentile"},
        {"field": "median", "format": ".4g"},
        {"field": "p95", "format": ".4g", "title": "95th percentile"},
        {"field": "min", "format": ".4g"}, {"field": "max", "format": ".4g"},
        {"field": "dead", "title": "dead units"}, {"field": "severity", "title": "worst finding"},
    ]
    colour = severity_scale()
    layers: list[Spec] = [
        {
            "name": "whiskers",
            "data": {"name": "layers"},
            "params": depth_zoom(),
            "mark": {"type": "rule", "strokeWidth": 1.5},
            "encoding": {"x": x, "y": {**y, "field": "p5"}, "y2": {"field": "p95"},
                         "color": colour, "tooltip": tooltip},
        },
        {
            "name": "boxes",
            "data": {"name": "layers"},
            "transform": [{"calculate": "datum.depth - 0.32", "as": "left"},
                          {"calculate": "datum.depth + 0.32", "as": "right"}],
            "mark": {"type": "bar", "cornerRadius": 1},
            "encoding": {"x": {**x, "field": "left"}, "x2": {"field": "right"},
                         "y": {**y, "field": "p25"}, "y2": {"field": "p75"},
                         "color": colour, "tooltip": tooltip},
        },
        {
            "name": "medians",
            "data": {"name": "layers"},
            "transform": [{"calculate": "datum.depth - 0.32", "as": "left"},
                          {"calculate": "datum.depth + 0.32", "as": "right"}],
            "mark": {"type": "rule", "color": "#ffffff", "strokeWidth": 2},
            "encoding": {"x": {**x, "field": "left"}, "x2": {"field": "right"},
                         "y": {**y, "field": "median"}, "tooltip": tooltip},
        },
    ]
    if outliers:
        layers.append({
            "name": "far_out",
            "data": {"name": "outliers"},
            "mark": {"type": "point", "shape": "diamond", "filled": True, "size": 60,
                     "color": "#5b2a86"},
            "encoding": {"x": x, "y": {**y, "field": "norm"},
                         "tooltip": [{"field": "layer"}, {"field": "unit"},
                                     {"field": "norm", "format": ".4g", "title": "fan-in norm"}]},
        })
    return base({"datasets": {"layers": rows, "outliers": outliers}, "layer": layers}, height=280)


def findings_chart(audit: CheckpointAudit) -> Spec | None:
    """Each finding at its layer's depth, one row per rule, sized by its ranking score."""
    depth = {str(h.layer["name"]): i for i, h in enumerate(audit.layers)}
    rows = [
        {
            "depth": depth[f.layer], "layer": f.layer, "rule": f.rule,
            "severity": f.severity.value, "score": finite(f.score) or 0.0,
            "message": f.message, "where": f.part or _units(f.units),
        }
        for f in audit.findings
        if f.layer is not None and f.layer in depth
    ]
    if not rows:
        return None
    shown = {
        "name": "severity_shown",
        "value": "all",
        "bind": {"input": "select", "options": ["all", "error", "warning", "info"],
                 "name": "show severity "},
    }
    spec: Spec = {
        "data": {"values": rows},
        "params": [shown, *depth_zoom()],
        "transform": [{"filter": "severity_shown == 'all' || datum.severity == severity_shown"}],
        "mark": {"type": "point", "filled": True, "opacity": 0.85},
        "encoding": {
            "x": {"field": "depth", "type": "quantitative", "title": "layer, in checkpoint order",
                  "scale": {"domain": [-0.5, max(len(audit.layers) - 0.5, 0.5)]},
                  "axis": {"tickMinStep": 1, "format": "d"}},
            "y": {"field": "rule", "type": "nominal", "title": None},
            "color": severity_scale(),
            "size": {"field": "score", "type": "quantitative", "title": "score",
                     "scale": {"range": [30, 320]}},
            "tooltip": [{"field": "rule"}, {"field": "severity"}, {"field": "layer"},
                        {"field": "where", "title": "units"}, {"field": "message"}],
        },
    }
    rules = len({r["rule"] for r in rows})
    return base(spec, height=max(60, 34 * rules))


#: The smallest share of a block's median the heads-and-experts map colours apart (log scale).
SHARE_FLOOR = 1e-3


def parts_chart(audit: CheckpointAudit) -> Spec | None:
    """Heads × blocks and experts × blocks: every head's output-value circuit norm and every
    expert's weight norm as a share of its block's median (what the rules measured, flagged
    or not), with the heads and experts that have findings outlined."""
    flagged: dict[tuple[str, str, int], str] = {}
    for finding in audit.findings:
        if "block" not in finding.evidence:
            continue
        for kind in ("head", "expert"):
            # One head or expert (idle, dominant), or several (a cluster of twins).
            one, several = finding.evidence.get(kind), finding.evidence.get(kind + "s")
            members = [one] if isinstance(one, int) else several if isinstance(several, list) else []
            for index in members:
                if isinstance(index, int):
                    flagged.setdefault((kind, str(finding.evidence["block"]), index), finding.message)
    rows: list[dict[str, Any]] = []
    blocks: list[str] = []
    for health in audit.layers:
        for key, kind, field in (("head-circuits.heads", "head", "ov_norm"), ("moe-experts.experts", "expert", "weight_norm")):
            measured = health.measured.get(key)
            if not isinstance(measured, dict) or not isinstance(measured.get(field), list):
                continue
            values = [float(v) for v in measured[field]]
            block = str(measured.get("block", health.layer["name"]))
            middle = sorted(values)[len(values) // 2] if values else 0.0
            blocks.append(block)
            for index, value in enumerate(values):
                note = flagged.get((kind, block, index))
                share = finite(value / middle) if middle > 0 else None
                rows.append({
                    "kind": kind, "block": block, "index": index, "value": finite(value),
                    "share": share,
                    # The colour scale is logarithmic: an all-zero head (idle) would stop the
                    # chart from drawing, so its colour is the floor's (its tooltip says 0).
                    "shade": max(share or 0.0, SHARE_FLOOR) if middle > 0 else None,
                    "finding": note or "", "flagged": note is not None,
                })
    if not rows:
        return None
    order = list(dict.fromkeys(blocks))
    spec: Spec = {
        "data": {"values": rows},
        "facet": {"column": {"field": "kind", "type": "nominal", "title": None,
                             "header": {"labelExpr": "datum.value + 's'"}}},
        "resolve": {"scale": {"x": "independent"}},
        "spec": {
            "width": 320,
            "height": max(40, 18 * len(order)),
            "mark": {"type": "rect"},
            "encoding": {
                "x": {"field": "index", "type": "ordinal", "title": "index in its block"},
                "y": {"field": "block", "type": "ordinal", "sort": order, "title": None,
                      "axis": {"labelLimit": 320}},
                "color": {"field": "shade", "type": "quantitative", "title": "× block median",
                          "scale": {"type": "log", "scheme": "blues", "domainMid": 1},
                          "legend": {"format": ".2~g"}},
                "stroke": {"condition": {"test": "datum.flagged", "value": SEVERITY_COLOURS["error"]},
                           "value": None},
                "strokeWidth": {"condition": {"test": "datum.flagged", "value": 2.5}, "value": 0},
                "tooltip": [{"field": "block"}, {"field": "kind"}, {"field": "index"},
                            {"field": "value", "format": ".4g", "title": "norm"},
                            {"field": "share", "format": ".3g", "title": "× block median"},
                            {"field": "finding"}],
            },
        },
    }
    chart = base(spec, height=0)
    del chart["height"], chart["width"], chart["autosize"]
    return chart


def spectrum_chart(audit: CheckpointAudit) -> Spec | None:
    """Every layer the untrained-layer rule tested (its weights matched an initializer's
    distribution): the top singular value against the Marchenko–Pastur edge of a random
    matrix of its shape and scale and the Tracy–Widom allowance above it. A layer whose top
    value stays inside is flagged as untrained; a trained layer grows directions beyond it."""
    flagged = {f.layer for f in audit.findings if f.rule == "untrained-layer"}
    rows = []
    for health in audit.layers:
        measured = health.measured.get("untrained-layer.spectrum")
        if not isinstance(measured, dict):
            continue
        top, edge, allowed = (_number(measured.get(k)) for k in ("top_singular", "mp_edge", "allowed"))
        if top is None or edge is None or allowed is None:
            continue
        name = str(health.layer["name"])
        rows.append({"layer": name, "top": top, "edge": edge, "allowed": allowed,
                     "initializer": measured.get("initializer"),
                     "verdict": "looks untrained" if name in flagged else "trained direction beyond the edge"})
    if not rows:
        return None
    y = {"field": "layer", "type": "nominal", "title": None, "sort": None}
    tooltip = [{"field": "layer"}, {"field": "verdict"}, {"field": "initializer"},
               {"field": "top", "format": ".4g", "title": "top singular value"},
               {"field": "edge", "format": ".4g", "title": "Marchenko–Pastur edge"},
               {"field": "allowed", "format": ".4g", "title": "edge + allowed fluctuations"}]
    x = {"type": "quantitative", "title": "singular value", "scale": {"zero": True}}
    layers: list[Spec] = [
        {"mark": {"type": "rule", "color": "#9aa7b1", "strokeWidth": 6},
         "encoding": {"y": y, "x": {**x, "field": "edge"}, "x2": {"field": "allowed"}, "tooltip": tooltip}},
        {"mark": {"type": "tick", "color": "#28323c", "thickness": 2},
         "encoding": {"y": y, "x": {**x, "field": "edge"}, "tooltip": tooltip}},
        {"mark": {"type": "point", "filled": True, "size": 90},
         "encoding": {"y": y, "x": {**x, "field": "top"}, "tooltip": tooltip,
                      "color": {"field": "verdict", "type": "nominal", "title": None,
                                "scale": {"domain": ["looks untrained", "trained direction beyond the edge"],
                                          "range": [SEVERITY_COLOURS["warning"], SEVERITY_COLOURS["info"]]}}}},
    ]
    return base({"data": {"values": rows}, "layer": layers}, height=max(40, 26 * len(rows)))


def _number(value: object) -> float | None:
    """A finite number from a finding's evidence, else None."""
    if isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value):
        return float(value)
    return None


def _in_order(names: Iterable[str]) -> list[str]:
    """Distinct names in first-seen order (the checkpoint's order of blocks)."""
    return list(dict.fromkeys(names))


def _units(units: Sequence[int]) -> str:
    from steelyard.findings import compact_units

    return compact_units(tuple(units), 8)
