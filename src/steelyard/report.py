"""The audit report: frozen results that every renderer reads and nothing mutates."""

from __future__ import annotations

import json
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from steelyard.coverage import Coverage
from steelyard.findings import FailOn, Finding, Severity, at_or_above, severity_counts

AUDIT_SCHEMA = "steelyard.audit/1"

CAUTION = (
    "This audit checks weight health only. Passing it does not show that a model is accurate, "
    "fair or safe: validate on held-out data and follow your organisation's model-risk "
    "process and applicable rules before deployment."
)


@dataclass(frozen=True, slots=True)
class LayerHealth:
    """One row of the per-layer health table."""

    layer: Mapping[str, Any]
    """The layer as in ``steelyard.layers/1``."""
    fan_in_norm: tuple[float, float, float]
    """Min, median and max of the units' incoming-weight L2 norms."""
    norm_histogram: tuple[int, ...]
    """Counts of units per log-spaced bin between min and max (for the small bar)."""
    dead: int
    twins: int
    unsupported_share: float | None
    """Share of the layer's weights flagged unsupported; None when no gradient support."""
    norm_percentiles: tuple[float, ...] = ()
    """Fan-in norms at the 5th, 25th, 50th, 75th and 95th percentiles (empty when unknown)."""
    norm_outliers: tuple[tuple[int, float], ...] = ()
    """(unit, norm) of units far outside the layer's spread of log norms, furthest first."""
    measured: Mapping[str, Any] = field(default_factory=dict)
    """What rules measured on this layer for the reports, flagged or not (``rule.quantity``
    keys: per-head circuit norms, per-expert norms, the top singular value against its
    random-matrix edge), see :class:`steelyard.rules.base.RuleMeasurements`."""


@dataclass(frozen=True, slots=True)
class Suppressed:
    """A finding the policy's ``ignore`` entry silenced, with the reason a reviewer gave."""

    finding: Finding
    reason: str
    layers: str
    """The ``ignore`` entry's layer glob that matched."""


@dataclass(frozen=True, slots=True)
class InputError:
    """A checkpoint of the run that could not be read: it has a result of its own, and the
    run never passes (exit 2, or 1 when unreadable inputs fail the gate)."""

    path: str
    reason: str

    @property
    def line(self) -> str:
        """The one line naming the file and the problem."""
        return f"{self.path}: {self.reason}"


@dataclass(frozen=True, slots=True)
class Skipped:
    """A file found in a folder and deliberately not audited, with why."""

    path: str
    reason: str


@dataclass(frozen=True)
class CheckpointAudit:
    """The audit of one checkpoint."""

    checkpoint: Mapping[str, Any]
    """As in ``steelyard.layers/1`` plus ``files`` and the files' digest under the
    algorithm's name: ``blake3`` (the default) or ``sha256`` (see :mod:`steelyard.digest`)."""
    layers: tuple[LayerHealth, ...]
    findings: tuple[Finding, ...]
    """Ranked, ignored ones removed."""
    gradient_source: str | None
    notes: tuple[str, ...] = ()
    ignored: int = 0
    """Findings silenced by the policy's ``ignore`` entries."""
    baselined: tuple[Finding, ...] = ()
    """Findings matched by a baseline (not gated on)."""
    coverage: Coverage | None = None
    """Parameters the layer rules saw (None only for audits built by hand in tests)."""
    suppressed: tuple[Suppressed, ...] = ()
    """The findings counted in ``ignored``, each with its ignore entry."""

    def counts(self) -> dict[str, int]:
        """Findings per severity (baselined ones excluded)."""
        return severity_counts(self.findings)

    def failing(self, fail_on: Severity | None) -> list[Finding]:
        """Findings at or above the gate."""
        return at_or_above(self.findings, fail_on)


@dataclass(frozen=True)
class Report:
    """Everything one run produced, with the tool version and time supplied by the caller."""

    tool_version: str
    created: str
    """ISO-8601 time of the run (renderers never read a clock)."""
    fail_on: str
    policy_source: str
    audits: tuple[CheckpointAudit, ...]
    baseline: Mapping[str, Any] | None = None
    """``{"path", "matched", "fixed": [ids]}`` when a baseline was used."""
    policy: Mapping[str, Any] = field(default_factory=dict)
    errors: tuple[InputError, ...] = ()
    """Checkpoints that could not be read, each a result of its own."""
    skipped: tuple[Skipped, ...] = ()
    """Files found in folders and not audited, with why."""
    notes: tuple[str, ...] = ()
    """What the run wants the user to know beyond one checkpoint (other files found)."""
    policy_notes: tuple[str, ...] = ()
    """Policy entries that applied to nothing in this run (a glob that matched no layer)."""
    unreadable_fails_gate: bool = False
    """An unreadable input fails the gate (exit 1) instead of being an input error (exit 2)."""

    @property
    def gate(self) -> Severity | None:
        """Lowest failing severity, None for ``never``."""
        return FailOn(self.fail_on).threshold

    @property
    def passed(self) -> bool:
        """True when every input was read and audited and no finding (outside the baseline)
        reaches the gate. A run that audited nothing never passes."""
        if self.errors or not self.audits:
            return False
        return not any(audit.failing(self.gate) for audit in self.audits)

    @property
    def exit_code(self) -> int:
        """0 passed, 1 the gate failed, 2 an input could not be read (unless unreadable
        inputs fail the gate, then 1)."""
        if self.errors and not self.unreadable_fails_gate:
            return 2
        return 0 if self.passed else 1

    @property
    def findings(self) -> tuple[Finding, ...]:
        """Every checkpoint's findings (baselined and ignored ones excluded), worst first."""
        from steelyard.ranking import rank

        return tuple(rank([f for audit in self.audits for f in audit.findings]))

    def to_json(self) -> str:
        """The ``steelyard.audit/1`` document."""
        from steelyard.render.json_report import render_json

        return render_json(self)

    def render(self, format: str = "table", *, width: int = 120) -> str:
        """The report as ``steelyard audit --format`` writes it: ``table`` (no colour),
        ``json``, ``markdown``, ``sarif``, ``junit`` or ``html``. Raises ``ValueError`` for another
        name."""
        from steelyard.render.report_formats import render_report

        return render_report(self, format, width=width)

    def __repr__(self) -> str:
        verdict = "passed" if self.passed else "failed"
        return (
            f"<steelyard Report {verdict}: {len(self.audits)} checkpoint(s), "
            f"{len(self.findings)} finding(s), {len(self.errors)} unreadable>"
        )

    def _repr_html_(self) -> str:
        """Notebook display: verdict, counts and the worst findings."""
        from steelyard.render.notebook import render_notebook_html

        return render_notebook_html(self)

    def to_dict(self) -> dict[str, Any]:
        """The document as plain data."""
        return json.loads(self.to_json())
