"""The one place where the policy meets rule output, for ``audit`` and ``compare`` alike.

A rule measures and reports; the engine decides what is kept: a finding on a layer the rule
is disabled on is dropped, the policy's ``severity`` replaces the rule's choice, the finding
is stamped with the checkpoint it is about, and an ``[[ignore]]`` entry moves it to the
suppressed list with its reason.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable
from dataclasses import replace
from typing import Any

from steelyard.findings import Finding
from steelyard.graph import Layer
from steelyard.policy import Policy
from steelyard.report import Suppressed
from steelyard.rules.base import RuleSettings, RuleSpec


def settings_for(spec: RuleSpec, policy: Policy) -> RuleSettings[Any]:
    """The rule's settings under ``policy`` (resolved per layer on demand)."""
    return RuleSettings(spec, policy)


def apply_policy(
    settings: RuleSettings[Any],
    produced: Iterable[Finding],
    *,
    policy: Policy,
    checkpoint: str,
    locate: Callable[[str], Layer | None],
) -> tuple[list[Finding], list[Suppressed]]:
    """The findings of one rule that the policy keeps, and those its ignore entries silence.

    ``locate`` finds a finding's layer by name (for per-layer ``enabled``, ``severity`` and
    overrides); ``checkpoint`` is the path every kept finding is about.
    """
    kept: list[Finding] = []
    suppressed: list[Suppressed] = []
    for finding in produced:
        layer = locate(finding.layer) if finding.layer else None
        if not settings.enabled(layer):
            continue
        chosen = settings.severity(layer)
        if chosen is not None:
            finding = replace(finding, severity=chosen)
        finding = replace(finding, checkpoint=checkpoint)
        entry = policy.ignored(settings.rule, finding.layer)
        if entry is not None:
            suppressed.append(Suppressed(finding, entry.reason, entry.layers))
            continue
        kept.append(finding)
    return kept, suppressed
