"""The timeline's result: frozen records that every timeline renderer reads (table, JSON, and
later HTML), and that nothing mutates. Renderers never compute: every number is here."""

from __future__ import annotations

import json
from dataclasses import dataclass
from typing import Any

from steelyard.findings import FailOn, Severity

TIMELINE_SCHEMA = "steelyard.timeline/1"


@dataclass(frozen=True, slots=True)
class Position:
    """Where a checkpoint sits in training, and what said so."""

    value: int | None
    """The step (or epoch) number; None when no source names one."""
    unit: str | None
    """``step`` or ``epoch``; None with ``value``."""
    source: str | None
    """``trainer_state`` (``global_step``), ``metadata`` (the file's own) or ``name``."""


@dataclass(frozen=True, slots=True)
class CheckpointEntry:
    """One checkpoint of the run, in timeline order."""

    index: int
    path: str
    format: str
    digest: tuple[str, str]
    """(algorithm, hex digest) of the checkpoint's files in order: ``blake3`` by default,
    ``sha256`` when asked for; one algorithm for the whole run."""
    parameters: int
    position: Position
    findings: int
    """Findings the audit kept for this checkpoint (policy applied)."""


@dataclass(frozen=True, slots=True)
class Drift:
    """How far a layer's canonical weights moved against a reference checkpoint's."""

    relative_change: float | None
    """‖W − W_ref‖_F / ‖W_ref‖_F; None when either side holds NaN/±Inf, or W_ref is all
    zero while W is not."""
    cosine: float | None
    """⟨W, W_ref⟩ / (‖W‖_F ‖W_ref‖_F) of the flattened weights; None when either side is all
    zero or not finite."""


@dataclass(frozen=True, slots=True)
class LayerPoint:
    """One layer in one checkpoint."""

    fan_in_norm_median: float | None
    """Median of the units' incoming-weight L2 norms (finite ones; None when none is)."""
    fan_in_norm_max: float | None
    dead: int
    """Units the audit's ``dead-unit`` rule calls dead."""
    nonfinite: int
    """NaN and ±Inf elements in the layer's tensors (weight, bias, normalisation, aux)."""
    from_previous: Drift | None
    """Against the previous checkpoint; None when it had no such layer of the same shape."""
    from_first: Drift | None
    """Against the first checkpoint; None when it had no such layer of the same shape."""
    findings: tuple[str, ...]
    """Rules with a finding on this layer here, sorted."""


@dataclass(frozen=True, slots=True)
class LayerSeries:
    """One layer across the run (matched by name)."""

    name: str
    kind: str
    units: int
    fan_in: int
    points: tuple[LayerPoint | None, ...]
    """One per checkpoint, in timeline order; None where the checkpoint has no such layer."""


@dataclass(frozen=True, slots=True)
class FindingSpan:
    """One finding (a rule on a layer, or on a tensor outside layers) across the run."""

    rule: str
    layer: str | None
    tensor: str | None
    """The tensor, for findings on no layer; None for layer findings."""
    severity: Severity
    """The worst severity it had in any checkpoint."""
    last_severity: Severity | None
    """Its severity in the last checkpoint; None when it is gone by then."""
    appeared: int
    """Index of the first checkpoint where it is present."""
    disappeared: int | None
    """Index of the first checkpoint after ``appeared`` where it is absent (None: never)."""
    spans: tuple[tuple[int, int], ...]
    """Runs of checkpoint indexes where it is present, each ``(first, last)`` inclusive."""
    units_first: tuple[int, ...]
    """Units concerned when it appeared (empty when the finding names no units)."""
    units_last: tuple[int, ...]
    """Units concerned the last time it was present."""

    @property
    def present_at_end(self) -> bool:
        """Present in the last checkpoint of the run."""
        return self.last_severity is not None


@dataclass(frozen=True)
class Timeline:
    """Everything one ``steelyard timeline`` run produced (version and time from the caller)."""

    tool_version: str
    created: str
    order: str
    """``step``, ``name`` or ``given``."""
    fail_on: str
    policy_source: str
    checkpoints: tuple[CheckpointEntry, ...]
    layers: tuple[LayerSeries, ...]
    """In the order the layers first appear (first checkpoint's order, new ones after)."""
    findings: tuple[FindingSpan, ...]
    """By first appearance, then rule, then place."""
    notes: tuple[str, ...] = ()
    """Ordering ties and disagreements, loader notes, what could not be measured."""

    @property
    def gate(self) -> Severity | None:
        """Lowest failing severity, None for ``never``."""
        return FailOn(self.fail_on).threshold

    def failing(self) -> list[FindingSpan]:
        """Findings present in the last checkpoint at or above the gate."""
        gate = self.gate
        if gate is None:
            return []
        return [
            f
            for f in self.findings
            if f.last_severity is not None and f.last_severity.at_least(gate)
        ]

    @property
    def passed(self) -> bool:
        """True when no finding of the last checkpoint reaches the gate: the run ends healthy
        (findings that came and went are history, not a failure)."""
        return not self.failing()

    @property
    def exit_code(self) -> int:
        """0 passed, 1 the gate failed."""
        return 0 if self.passed else 1

    def to_json(self) -> str:
        """The ``steelyard.timeline/1`` document."""
        from steelyard.render.timeline_json import render_timeline_json

        return render_timeline_json(self)

    def to_dict(self) -> dict[str, Any]:
        """The document as plain data."""
        return json.loads(self.to_json())

    def render(self, format: str = "table", *, width: int = 120, color: bool = False) -> str:
        """``table`` (ANSI styles only with ``color``), ``json`` or ``html``, as ``steelyard
        timeline --format`` writes them; ``ValueError`` for another name."""
        if format == "json":
            return self.to_json()
        if format == "table":
            from steelyard.render.timeline_table import render_timeline_table

            return render_timeline_table(self, width=width, color=color)
        if format == "html":
            from steelyard.render.report_formats import html_renderers

            return html_renderers().render_timeline_html(self)
        raise ValueError(f"unknown timeline format {format!r}; use table, json or html")

    def __repr__(self) -> str:
        verdict = "passed" if self.passed else "failed"
        return (
            f"<steelyard Timeline {verdict}: {len(self.checkpoints)} checkpoint(s), "
            f"{len(self.layers)} layer(s), {len(self.findings)} finding(s) over the run>"
        )
