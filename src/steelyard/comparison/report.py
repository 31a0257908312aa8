"""The comparison report: frozen results that every compare renderer reads and nothing mutates."""

from __future__ import annotations

import json
from collections.abc import Mapping
from dataclasses import dataclass, field
from enum import Enum
from typing import Any

from steelyard.findings import FailOn, Finding, Severity, at_or_above, severity_counts

COMPARE_SCHEMA = "steelyard.compare/1"


class Status(str, Enum):
    """What happened to one layer between OLD and NEW."""

    SAME = "same"
    """Identical, identical up to the rounding of the lower stored precision, or a pure
    permutation of units that leaves the function unchanged."""
    CHANGED = "changed"
    """Same shape, different values."""
    ADDED = "added"
    """Only in NEW."""
    REMOVED = "removed"
    """Only in OLD."""
    RESHAPED = "reshaped"
    """Matched, but its kind or shape (units, fan-in, groups, kernel) differs."""

    @property
    def structural(self) -> bool:
        """The layer's shape changed or it exists on one side only."""
        return self in (Status.ADDED, Status.REMOVED, Status.RESHAPED)


@dataclass(frozen=True, slots=True)
class UnitChange:
    """One unit's change, for the "most changed units" detail."""

    unit: int
    """Row of NEW's canonical view."""
    relative_change: float
    """‖b_j − a_j‖ / ‖a_j‖ over the unit's incoming weights (inf when ‖a_j‖ = 0 < ‖b_j − a_j‖)."""
    old_norm: float
    new_norm: float


@dataclass(frozen=True, slots=True)
class LayerDiff:
    """One layer's row of the comparison."""

    name: str
    """NEW's layer name (OLD's for removed layers)."""
    status: Status
    old_name: str | None
    new_name: str | None
    matched_by: str | None
    """``name`` (same weight tensor name and gate) or ``position`` (graph order, kind, shape)."""
    old_layer: Mapping[str, Any] | None
    """OLD's layer as in ``steelyard.layers/1``."""
    new_layer: Mapping[str, Any] | None
    relative_change: float | None = None
    """‖B − A‖_F / ‖A‖_F of the canonical weights (float64); None when not comparable."""
    cosine: float | None = None
    """Cosine of the flattened weights; None when either side is all zero."""
    bias_relative_change: float | None = None
    fan_in_norm_old: tuple[float, float, float] | None = None
    """Min, median and max of OLD's units' incoming-weight L2 norms."""
    fan_in_norm_new: tuple[float, float, float] | None = None
    units_died: tuple[int, ...] = ()
    """Units (rows of NEW) dead in NEW by the audit's dead-unit tests, alive in OLD."""
    units_revived: tuple[int, ...] = ()
    """Units dead in OLD, alive in NEW."""
    permuted: bool = False
    """The layer's units or inputs were reordered consistently with its neighbours."""
    moved_units: int = 0
    """Units whose position changed under the permutation of this layer's rows."""
    precision_only: bool = False
    """Every difference lies within the rounding of the lower stored precision."""
    precision: str | None = None
    """The stored type whose rounding explains the differences (e.g. ``bf16``, ``i8``)."""
    top_units: tuple[UnitChange, ...] = ()
    moved_elements: int = 0
    """Weight, bias and normalisation elements that differ beyond precision."""
    elements: int = 0
    """Weight, bias and normalisation elements compared."""
    nonfinite_new: int = 0
    """Elements non-finite in NEW that were finite in OLD (weights, bias, normalisation)."""
    nonfinite_units: tuple[int, ...] = ()
    """Units holding those elements."""
    note: str = ""
    """Why a measure is missing or what a permutation check found."""
    structure_from: str | None = None
    """``OLD``, ``NEW`` or ``both``: whose layer structure (activation, links, normalisation,
    kind, groups, constraint) both sides were judged with, when one side took it from the
    other (see :mod:`steelyard.comparison.knowledge`); None when each side used its own."""
    max_abs_change: float | None = None
    """Largest |b − a| of any weight (the quantization error's worst element when NEW is an
    export of OLD); None when not compared value by value or not finite."""
    stored_old: str | None = None
    """What OLD stored the weight as (``Q4_K``, ``gptq-int4``, ``bf16``...)."""
    stored_new: str | None = None
    """What NEW stored the weight as."""
    rows_flattened: tuple[int, ...] = ()
    """Units whose weights are all equal (often all zero) in NEW but not in OLD: rows a
    quantization or an edit destroyed."""
    update_rank: int | None = None
    """Effective rank of the update B − A: the fewest singular directions holding 99 % of
    ‖B − A‖²_F (None when not measured: unchanged layers, embeddings, or a rank above
    :data:`steelyard.comparison.precision.RANK_LIMIT`, see ``update_rank_above``)."""
    update_rank_above: int | None = None
    """Set to the limit when the update needs more directions than it (full-rank noise such
    as quantization error, or a dense fine-tune)."""


@dataclass(frozen=True, slots=True)
class CompareCoverage:
    """What the comparison lined up: matched layers and the parameters they hold."""

    layers_old: int
    layers_new: int
    matched: int
    """Layers present on both sides (same shape or reshaped)."""
    compared: int
    """Matched layers of the same shape, compared value by value."""
    parameters_old: int
    parameters_new: int
    """Every counted parameter of the checkpoint (as the audit counts them)."""
    matched_parameters_new: int
    """NEW's parameters read by matched layers."""
    compared_parameters_old: int
    compared_parameters_new: int
    """Parameters read by the layers compared value by value."""

    @property
    def share_new(self) -> float:
        """Share of NEW's parameters compared value by value with OLD (0 when it has none)."""
        return self.compared_parameters_new / self.parameters_new if self.parameters_new else 0.0

    @property
    def share_old(self) -> float:
        """Share of OLD's parameters compared value by value with NEW (0 when it has none)."""
        return self.compared_parameters_old / self.parameters_old if self.parameters_old else 0.0


@dataclass(frozen=True)
class Comparison:
    """What changed between two checkpoints, and what the rules found."""

    old: Mapping[str, Any]
    """OLD's ``checkpoint`` block, with its files' digest under the algorithm's name
    (``blake3`` or ``sha256``)."""
    new: Mapping[str, Any]
    layers: tuple[LayerDiff, ...]
    """Ranked: structural changes first, then by relative change, largest first."""
    findings: tuple[Finding, ...]
    """Findings of the comparison rules, ranked."""
    audit_new: tuple[Finding, ...] = ()
    """Findings of the audit of NEW that OLD did not have."""
    audit_present: tuple[Finding, ...] = ()
    """Findings of the audit of NEW already present in OLD (reported, not gated on)."""
    overall_relative_change: float | None = None
    """sqrt(Σ‖B−A‖²) / sqrt(Σ‖A‖²) over every layer compared value by value."""
    notes: tuple[str, ...] = ()
    ignored: int = 0
    """Comparison findings silenced by the policy's ``ignore`` entries."""
    coverage: CompareCoverage | None = None
    """Matched layers and parameters (None only for comparisons built by hand in tests)."""

    @property
    def gated(self) -> tuple[Finding, ...]:
        """Findings the gate looks at: the comparison's and the new audit findings."""
        return (*self.findings, *self.audit_new)

    def counts(self) -> dict[str, int]:
        """Gated findings per severity."""
        return severity_counts(self.gated)

    def failing(self, fail_on: Severity | None) -> list[Finding]:
        """Gated findings at or above the gate."""
        return at_or_above(self.gated, fail_on)

    def statuses(self) -> dict[str, int]:
        """Layers per status."""
        out = {s.value: 0 for s in Status}
        for layer in self.layers:
            out[layer.status.value] += 1
        return out


@dataclass(frozen=True)
class CompareReport:
    """Everything one ``steelyard compare`` run produced."""

    tool_version: str
    created: str
    """ISO-8601 time of the run (renderers never read a clock)."""
    fail_on: str
    policy_source: str
    comparison: Comparison
    frozen: tuple[str, ...] = field(default=())
    """The policy's frozen-layer globs, for the report header."""

    @property
    def gate(self) -> Severity | None:
        """Lowest failing severity, None for ``never``."""
        return FailOn(self.fail_on).threshold

    @property
    def passed(self) -> bool:
        """True when no comparison finding and no new audit finding reaches the gate."""
        return not self.comparison.failing(self.gate)

    def to_json(self) -> str:
        """The ``steelyard.compare/1`` document."""
        from steelyard.render.compare_json import render_compare_json

        return render_compare_json(self)

    def to_dict(self) -> dict[str, Any]:
        """The document as plain data."""
        return json.loads(self.to_json())  # type: ignore[no-any-return, unused-ignore]

    def render(self, format: str = "table", *, width: int = 120) -> str:
        """The report as ``steelyard compare --format`` writes it: ``table`` (no colour),
        ``json``, ``markdown``, ``sarif``, ``junit`` or ``html``. Raises ``ValueError`` for
        another name."""
        from steelyard.render.compare_formats import render_comparison

        return render_comparison(self, format, width=width)
