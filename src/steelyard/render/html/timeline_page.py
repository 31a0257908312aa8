"""A training run's timeline as one HTML page: a line chart per measure, findings over time,
and the tables behind them."""

from __future__ import annotations

from typing import Any

from steelyard.render.html.page import masthead, render_page
from steelyard.render.html.timeline_charts import measure_charts, positions, presence_chart
from steelyard.run_timeline.result import Timeline


def render_timeline_html(timeline: Timeline) -> str:
    """The timeline as a self-contained HTML document."""
    specs: list[tuple[str, dict[str, Any]]] = []
    charts = []
    for key, title, spec in measure_charts(timeline):
        specs.append((f"measure-{key}", spec))
        charts.append((f"measure-{key}", title))
    presence = presence_chart(timeline)
    if presence is not None:
        specs.append(("presence", presence))
    xs, x_title = positions(timeline)
    by_place = x_title.startswith("checkpoint")

    def label(index: int) -> str:
        return f"#{index}" if by_place else f"{x_title} {xs[index]:,.0f}"

    last = len(timeline.checkpoints) - 1
    layers = []
    for series in timeline.layers:
        first_point = next((p for p in series.points if p is not None), None)
        end = series.points[last] if series.points else None
        layers.append({
            "name": series.name, "kind": series.kind, "shape": f"{series.units:,} × {series.fan_in:,}",
            "median_first": first_point.fan_in_norm_median if first_point else None,
            "median_last": end.fan_in_norm_median if end else None,
            "dead_last": end.dead if end else None, "nonfinite_last": end.nonfinite if end else None,
            "drift_first": end.from_first.relative_change if end and end.from_first else None,
            "present_at_end": end is not None,
        })
    findings = [
        {
            "rule": f.rule, "where": f.layer or f.tensor or "(checkpoint)", "severity": f.severity.value,
            "appeared": label(f.appeared),
            "went_away": "—" if f.disappeared is None else label(f.disappeared),
            "at_end": f.last_severity.value if f.last_severity is not None else "gone",
        }
        for f in timeline.findings
    ]
    return render_page(
        "timeline.html.j2",
        specs,
        **masthead(timeline, gate_off=timeline.gate is None),
        checkpoints=[
            {"label": label(c.index), "path": c.path, "source": c.position.source or "order given",
             "findings": c.findings, "digest": c.digest[1]}
            for c in timeline.checkpoints
        ],
        # One algorithm for the whole run; named as in the JSON ("blake3" or "sha256").
        digest_label="/".join(dict.fromkeys(c.digest[0] for c in timeline.checkpoints)) or "digest",
        order=timeline.order,
        measure_charts=charts,
        presence="presence" if presence is not None else None,
        layers=layers,
        findings=findings,
        notes=timeline.notes,
    )
