"""The effective policy: which rules run, at what severity, with which thresholds, where.

This module holds the in-memory policy and how settings resolve for one rule on one layer.
Reading and validating a policy file lives in :mod:`steelyard.policy_file`.
"""

from __future__ import annotations

import fnmatch
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Protocol

from steelyard.budget import Budget
from steelyard.findings import FailOn, Severity


@dataclass(frozen=True, slots=True)
class LayerOverride:
    """Settings applied to layers whose name matches a glob, in the order given."""

    layers: str
    """fnmatch-style glob over layer names."""
    rules: Mapping[str, Mapping[str, Any]]
    """Rule name → settings (``enabled``, ``severity``, thresholds)."""


@dataclass(frozen=True, slots=True)
class Ignore:
    """A rule silenced on some layers, with the reason a reviewer accepted."""

    rule: str
    layers: str
    reason: str


@dataclass(frozen=True)
class Policy:
    """Everything a policy can set; the defaults live with each rule."""

    fail_on: str = "error"
    """``error``, ``warning``, ``info`` or ``never``."""
    rules: Mapping[str, Mapping[str, Any]] = field(default_factory=dict)
    """Rule name → settings that replace the rule's defaults everywhere."""
    overrides: tuple[LayerOverride, ...] = ()
    ignore: tuple[Ignore, ...] = ()
    input_range: tuple[float, float] | None = None
    """Declared range of every model input, for interval bound propagation."""
    weight_decay: float | None = None
    """L2 coefficient in the PyTorch convention (wd·w added to the gradient)."""
    frozen: tuple[str, ...] = ()
    """Globs of layers that must not change between two checkpoints (``compare``)."""
    source: str = "built-in defaults"
    """Where the policy came from, for the report header."""
    budget: Budget | None = None
    """Resource budgets from the ``[budget]`` table (None: the defaults of
    :class:`~steelyard.budget.Budget`)."""

    def settings(self, rule: str, defaults: Mapping[str, Any], layer: str | None) -> dict[str, Any]:
        """Effective settings of ``rule`` on ``layer``: defaults, then policy, then overrides."""
        merged = dict(defaults)
        merged.update(self.rules.get(rule, {}))
        if layer is not None:
            for override in self.overrides:
                if fnmatch.fnmatchcase(layer, override.layers) and rule in override.rules:
                    merged.update(override.rules[rule])
        return merged

    def ignored(self, rule: str, layer: str | None) -> Ignore | None:
        """The ignore entry that silences ``rule`` on ``layer``, if any."""
        for entry in self.ignore:
            if entry.rule == rule and fnmatch.fnmatchcase(layer or "", entry.layers):
                return entry
        return None

    def gate_severity(self) -> Severity | None:
        """Lowest severity that fails the gate; None for ``never``."""
        return FailOn(self.fail_on).threshold


def unmatched_globs(policy: Policy, audits: Sequence[CheckpointAuditLike]) -> list[str]:
    """One line per ``override`` or ``ignore`` glob that matched no layer of any audited
    checkpoint: a typo there silently keeps a threshold or a silence from applying."""
    names = [str(h.layer["name"]) for audit in audits for h in audit.layers]
    used_ignores = {
        (s.finding.rule, s.layers) for audit in audits for s in audit.suppressed
    }
    lines: list[str] = []
    if not audits:
        return lines
    for override in policy.overrides:
        if not any(fnmatch.fnmatchcase(n, override.layers) for n in names):
            lines.append(
                f"policy override for layers {override.layers!r} matched no layer of any "
                "checkpoint audited; its settings were not applied"
            )
    for entry in policy.ignore:
        hit = (entry.rule, entry.layers) in used_ignores or any(
            fnmatch.fnmatchcase(n, entry.layers) for n in names
        )
        if not hit:
            lines.append(
                f"policy ignore of {entry.rule} on layers {entry.layers!r} matched no layer of "
                "any checkpoint audited; it silenced nothing"
            )
    return lines


class CheckpointAuditLike(Protocol):
    """What :func:`unmatched_globs` reads of an audit (kept structural: the report module
    builds on this one)."""

    @property
    def layers(self) -> Sequence[Any]: ...

    @property
    def suppressed(self) -> Sequence[Any]: ...
