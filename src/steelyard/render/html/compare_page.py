"""The comparison as one HTML page: what changed along the model, the findings, every layer."""

from __future__ import annotations

from typing import Any

from steelyard.comparison.report import CompareReport
from steelyard.digest import digest_shown
from steelyard.ranking import rank
from steelyard.render.compare_table import rank_cell
from steelyard.render.html.compare_charts import change_charts, in_depth_order
from steelyard.render.html.page import masthead, number, render_page

_CAPTIONS = (
    "Relative change ‖NEW − OLD‖ / ‖OLD‖ of each layer's weights, in checkpoint order (log "
    "scale; identical layers have no bar). Scroll to zoom, drag to pan, double-click to reset.",
    "Cosine between each layer's OLD and NEW weights (1 = same direction).",
    "Units that died or came back in NEW, per layer (larger marks: more units).",
)


def render_compare_html(report: CompareReport) -> str:
    """The comparison as a self-contained HTML document."""
    comparison = report.comparison
    specs: list[tuple[str, dict[str, Any]]] = []
    charts = []
    for i, spec in enumerate(change_charts(comparison)):
        specs.append((f"change-{i}", spec))
        charts.append((f"change-{i}", _CAPTIONS[i]))
    by_depth = in_depth_order(comparison)
    layer_anchor = {d.name: f"layer-{i}" for i, d in enumerate(by_depth)}
    layers = [
        {
            "anchor": layer_anchor[d.name], "depth": depth, "name": d.name,
            "old_name": d.old_name,
            "status": "same up to precision" if d.precision_only else d.status.value,
            "change": d.relative_change, "cosine": d.cosine,
            "died": len(d.units_died), "revived": len(d.units_revived),
            "died_units": ", ".join(map(str, d.units_died[:50])),
            "revived_units": ", ".join(map(str, d.units_revived[:50])),
            "note": d.note,
            "stored": f"{d.stored_old or '—'} → {d.stored_new or '—'}",
            "max_abs": d.max_abs_change,
            "rank": rank_cell(d),
            "flattened": ", ".join(map(str, d.rows_flattened[:20])) or "—",
        }
        for depth, d in enumerate(by_depth)
    ]
    coverage = comparison.coverage
    covered = (
        "not measured"
        if coverage is None
        else f"{coverage.compared:,} of {coverage.matched:,} matched layers compared value by value: "
        f"{coverage.share_new:.1%} of NEW's {coverage.parameters_new:,} parameters"
    )
    overall = comparison.overall_relative_change
    return render_page(
        "compare.html.j2",
        specs,
        **masthead(report, gate_off=report.gate is None),
        old=_side(comparison.old),
        new=_side(comparison.new),
        coverage=covered,
        overall="not measured" if overall is None else f"{number(overall)} (relative, over every layer compared)",
        statuses=[(k, v) for k, v in comparison.statuses().items() if v],
        frozen=report.frozen,
        counts=comparison.counts(),
        ignored=comparison.ignored,
        notes=comparison.notes,
        change_charts=charts,
        findings=rank(comparison.gated),
        present=rank(comparison.audit_present),
        layer_anchor=layer_anchor,
        layers=layers,
        precision_columns=any(d.stored_old != d.stored_new for d in by_depth),
        rank_column=any(d.update_rank is not None or d.update_rank_above for d in by_depth),
    )


def _side(block: Any) -> dict[str, Any]:
    return {
        "path": str(block.get("path", "")),
        "format": block.get("format", ""),
        "parameters": block.get("parameters"),
        **dict(zip(("digest_label", "digest"), digest_shown(block), strict=True)),
    }
