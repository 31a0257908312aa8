"""The comparison rules: what ``steelyard compare`` gates on besides the audit of NEW.

One module per rule, each exporting ``RULE`` (a :class:`~steelyard.rules.RuleSpec` serving
``Command.COMPARE``, listed in the one registry :func:`steelyard.rules.registry`). They are
whole-comparison rules: their check reads the per-layer comparison
(:class:`~steelyard.comparison.report.LayerDiff`) through :class:`CompareContext` and, for
``new-nonfinite``, the tensors that belong to no layer. Policy tables, ``[[override]]`` globs,
``[[ignore]]`` entries and ``severity`` apply exactly as for the audit rules, in the same place
(:func:`steelyard.rules.engine.apply_policy`).
"""

from __future__ import annotations

import sys
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from steelyard.comparison.report import LayerDiff
from steelyard.findings import Finding, Severity
from steelyard.graph import Checkpoint, Layer
from steelyard.numbers import measured
from steelyard.policy import Policy
from steelyard.report import Suppressed
from steelyard.rules.base import Command, NoSettings, RuleSettings, RuleSpec, WholeCheck
from steelyard.rules.engine import apply_policy


@dataclass(frozen=True)
class CompareContext:
    """Everything a comparison rule may read."""

    old: Checkpoint
    new: Checkpoint
    policy: Policy
    diffs: tuple[LayerDiff, ...]

    def layer(self, diff: LayerDiff) -> Layer | None:
        """NEW's layer of a row (OLD's for a removed layer), for per-layer settings."""
        if diff.new_name is not None:
            return self.new.layer(diff.new_name)
        return self.old.layer(diff.old_name) if diff.old_name else None

    def locate(self, name: str) -> Layer | None:
        """A finding's layer by name: NEW's, else OLD's (a removed layer)."""
        return self.new.layer(name) or self.old.layer(name)

    def finding(
        self,
        rule: str,
        diff: LayerDiff,
        *,
        severity: Severity,
        score: float,
        message: str,
        hint: str,
        evidence: Mapping[str, Any],
        units: tuple[int, ...] = (),
    ) -> Finding:
        """A finding on one compared layer: at the row's name, its weight tensor and gate."""
        return Finding(
            rule=rule,
            severity=severity,
            layer=diff.name,
            tensor=self.weight(diff),
            units=units,
            score=score,
            message=message,
            hint=hint,
            evidence=evidence,
            part=self.part(diff),
        )

    def weight(self, diff: LayerDiff) -> str | None:
        """The stored weight tensor a row's finding is about."""
        block = diff.new_layer or diff.old_layer
        return str(block["weight"]) if block else None

    def part(self, diff: LayerDiff) -> str:
        """The recurrent gate a row's units index, else empty."""
        layer = self.layer(diff)
        return layer.gate or "" if layer is not None else ""


def number(value: float | None) -> str:
    """A measured value in a message (``—`` when not measured), in the one number format."""
    return measured(value)


def compare_rule(
    *, name: str, severity: Severity, summary: str, check: WholeCheck, settings: type[Any] = NoSettings
) -> RuleSpec:
    """The spec of a comparison rule: its ``check`` reads the whole comparison, it serves
    ``steelyard compare`` only, and its page is the docstring of the module ``check`` is in."""
    return RuleSpec(
        name=name,
        severity=severity,
        summary=summary,
        doc=sys.modules[check.__module__].__doc__ or "",
        settings=settings,
        whole=check,
        commands=(Command.COMPARE,),
    )


def compare_rules() -> dict[str, RuleSpec]:
    """Comparison rule name → spec (the one registry's ``compare`` part)."""
    from steelyard.rules import registry

    return registry(Command.COMPARE)


def run(ctx: CompareContext) -> tuple[list[Finding], list[Suppressed]]:
    """Every comparison rule's findings that the policy keeps, and those it ignores."""
    findings: list[Finding] = []
    suppressed: list[Suppressed] = []
    for spec in compare_rules().values():
        settings: RuleSettings[Any] = RuleSettings(spec, ctx.policy)
        if not settings.enabled_anywhere():
            continue
        kept, silenced = apply_policy(
            settings,
            spec.check(ctx, settings),
            policy=ctx.policy,
            checkpoint=ctx.new.path,
            locate=ctx.locate,
        )
        findings += kept
        suppressed += silenced
    return findings, suppressed
