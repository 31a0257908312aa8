"""The one rule registry: every rule module of every command, indexed by rule name.

Audit rules live in this package, the comparison rules in :mod:`steelyard.comparison.checks`;
both are :class:`RuleSpec` records listed in :data:`_MODULES`, in documentation order.
"""

from __future__ import annotations

import importlib
from functools import cache
from typing import Any

from steelyard.rules.base import (
    AuditContext,
    Command,
    RuleSettings,
    RuleSpec,
    Scope,
    SettingSchema,
)

_MODULES = (
    "steelyard.rules.nonfinite",
    "steelyard.rules.dead_unit",
    "steelyard.rules.fan_in_norm",
    "steelyard.rules.twin_units",
    "steelyard.rules.unsupported_weight",
    "steelyard.rules.untrained_layer",
    "steelyard.rules.constraint_breach",
    "steelyard.rules.uncovered_weights",
    "steelyard.rules.adapter_update",
    "steelyard.rules.untrained_token",
    "steelyard.rules.essential_weight",
    "steelyard.rules.quantization_error",
    "steelyard.rules.head_circuits",
    "steelyard.rules.moe_experts",
    "steelyard.comparison.checks.new_nonfinite",
    "steelyard.comparison.checks.frozen_layer_moved",
    "steelyard.comparison.checks.units_died",
    "steelyard.comparison.checks.layer_drift",
)


#: Where the comparison rules live: an audit does not import them (nor that package).
_COMPARISON = "steelyard.comparison."


@cache
def _loaded(modules: tuple[str, ...]) -> tuple[RuleSpec, ...]:
    specs: dict[str, RuleSpec] = {}
    for module_name in modules:
        spec: RuleSpec = importlib.import_module(module_name).RULE
        if spec.name in specs:
            raise RuntimeError(f"two rules are named {spec.name!r}")
        specs[spec.name] = spec
    return tuple(specs.values())


@cache
def _all() -> tuple[RuleSpec, ...]:
    return _loaded(_MODULES)


def registry(command: Command | None = Command.AUDIT) -> dict[str, RuleSpec]:
    """Rule name → spec, in documentation order: the rules ``command`` runs (the default is
    the audit's), or every rule with ``None``. Names are unique across all commands, because
    one policy file configures them all."""
    if command is Command.AUDIT:
        # No comparison rule serves the audit (tests/test_rule_catalogue.py), so an audit
        # imports neither them nor the comparison package (docs/performance.md, Start-up).
        chosen = _loaded(tuple(m for m in _MODULES if not m.startswith(_COMPARISON)))
    else:
        chosen = _all()
    return {s.name: s for s in chosen if command is None or s.serves(command)}


def settings_schema() -> dict[str, dict[str, SettingSchema]]:
    """Rule name → policy key → what a policy value must be (type, range, default), for
    every rule of every command. ``enabled`` (bool) and ``severity`` (a severity name) are
    accepted for every rule besides these."""
    return {spec.name: {s.key: s for s in spec.schema} for spec in _all()}


def sarif_rule(spec: RuleSpec) -> dict[str, Any]:
    """The rule's entry in a SARIF ``tool.driver.rules`` table (SARIF 2.1.0 §3.49
    ``reportingDescriptor``); rules of commands other than ``audit`` say which."""
    doc = spec.doc.strip()
    properties: dict[str, Any] = {"thresholds": dict(spec.thresholds)}
    if not spec.serves(Command.AUDIT):
        properties["command"] = spec.commands[0].value
    levels = {"error": "error", "warning": "warning", "info": "note"}
    return {
        "id": spec.name,
        "name": "".join(part.capitalize() for part in spec.name.split("-")),
        "shortDescription": {"text": spec.summary},
        "fullDescription": {"text": doc.split("\n\n")[0]},
        "help": {"text": doc, "markdown": doc},
        "helpUri": spec.help_uri,
        "defaultConfiguration": {"level": levels[spec.severity.value]},
        "properties": properties,
    }


def sarif_rules(command: Command) -> tuple[list[dict[str, Any]], dict[str, int]]:
    """The SARIF rules table of a run of ``command`` and each rule's index in it: the audit's
    rules, then (for ``compare``, whose SARIF holds NEW's audit too) the comparison rules."""
    chosen = [
        s for s in _all() if s.serves(Command.AUDIT) or (command is not Command.AUDIT and s.serves(command))
    ]
    return [sarif_rule(s) for s in chosen], {s.name: i for i, s in enumerate(chosen)}


__all__ = [
    "AuditContext",
    "Command",
    "RuleSettings",
    "RuleSpec",
    "Scope",
    "SettingSchema",
    "registry",
    "sarif_rule",
    "sarif_rules",
    "settings_schema",
]
