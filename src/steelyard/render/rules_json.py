"""``steelyard rules --format json``: the rule registry as a document (``steelyard.rules/1``)
for tools that build policy editors or documentation from it.

Each rule: its name, the commands it serves, whether it runs per layer or on the whole
checkpoint, default severity, summary, help address, and every policy key with its type,
range and default (the same schema the policy file is validated against).
"""

from __future__ import annotations

import json
import math
from collections.abc import Sequence
from typing import Any

from steelyard.rules import settings_schema
from steelyard.rules.base import RuleSpec

RULES_SCHEMA = "steelyard.rules/1"


def _number(value: float | None) -> float | None:
    return None if value is None or math.isinf(value) else value


def rule_block(spec: RuleSpec) -> dict[str, Any]:
    """One rule's entry."""
    keys = settings_schema()[spec.name]
    return {
        "name": spec.name,
        "commands": [command.value for command in spec.commands],
        "scope": "per-layer" if spec.per_layer is not None else "whole",
        "severity": spec.severity.value,
        "summary": spec.summary,
        "help_uri": spec.help_uri,
        "settings": {
            key: {
                "type": schema.kind.__name__,
                "optional": schema.optional,
                "min": _number(schema.low),
                "max": _number(schema.high),
                "default": schema.default,
            }
            for key, schema in keys.items()
        },
    }


def render_rules_json(specs: Sequence[RuleSpec]) -> str:
    """The document as text."""
    document = {"schema": RULES_SCHEMA, "rules": [rule_block(spec) for spec in specs]}
    return json.dumps(document, indent=2, ensure_ascii=False) + "\n"
