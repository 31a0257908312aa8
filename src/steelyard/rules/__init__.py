"""The rule registry: every rule module, indexed by rule name."""

from __future__ import annotations

import importlib

from steelyard.rules.base import AuditContext, RuleSettings, RuleSpec

_MODULES = (
    "nonfinite",
    "dead_unit",
    "fan_in_norm",
    "twin_units",
    "unsupported_weight",
    "untrained_layer",
    "constraint_breach",
    "uncovered_weights",
)


def registry() -> dict[str, RuleSpec]:
    """Rule name → spec, in documentation order. Duplicate names are a programming error."""
    specs: dict[str, RuleSpec] = {}
    for module_name in _MODULES:
        try:
            module = importlib.import_module(f"steelyard.rules.{module_name}")
        except ModuleNotFoundError as exc:  # pragma: no cover - only while a rule is being written
            if exc.name == f"steelyard.rules.{module_name}":
                continue
            raise
        spec: RuleSpec = module.RULE
        if spec.name in specs:
            raise RuntimeError(f"two rules are named {spec.name!r}")
        specs[spec.name] = spec
    return specs


__all__ = ["AuditContext", "RuleSettings", "RuleSpec", "registry"]
