"""The rule catalogue: each rule's name, severity, why, page and thresholds, for
``steelyard rules`` without importing the rules.

Importing every rule module (with numpy, the layer graph and the statistics they are written
against) was most of the 0.67 s that listing the rules took (docs/performance.md, Start-up),
while the listing reads only what each :class:`~steelyard.rules.base.RuleSpec` says about
itself. ``rule_catalogue.json`` holds that, made from the live registry; a missing or broken
file falls back to the registry. tests/test_rule_catalogue.py checks that the committed file
says what the registry says, byte for byte.

Refresh it after changing a rule's page, summary, severity or thresholds:
``python -m steelyard.rule_catalogue``.
"""

from __future__ import annotations

import json
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from steelyard.findings import Severity

if TYPE_CHECKING:
    from steelyard.rules.base import RuleSpec

_PACKAGE = Path(__file__).resolve().parent
CATALOGUE = _PACKAGE / "rule_catalogue.json"


@dataclass(frozen=True)
class RuleCard:
    """What ``steelyard rules`` shows of one rule (the same fields a RuleSpec offers)."""

    name: str
    severity: Severity
    summary: str
    doc: str
    thresholds: dict[str, Any]
    help_uri: str


def card_of(spec: RuleSpec) -> RuleCard:
    """A live rule's card."""
    return RuleCard(
        spec.name, spec.severity, spec.summary, spec.doc, spec.thresholds, spec.help_uri
    )


def _live() -> list[RuleCard]:
    from steelyard.rules import registry

    return [card_of(spec) for spec in registry(None).values()]


def _document(cards: list[RuleCard]) -> dict[str, Any]:
    return {"rules": [{**asdict(card), "severity": card.severity.value} for card in cards]}


def cards() -> list[RuleCard]:
    """Every rule's card, in documentation order: from the catalogue, or from the live
    registry when the file is missing or unreadable."""
    try:
        document = json.loads(CATALOGUE.read_text(encoding="utf-8"))
        return [RuleCard(**{**rule, "severity": Severity(rule["severity"])}) for rule in document["rules"]]
    except (OSError, ValueError, KeyError, TypeError):
        return _live()


def catalogue_text() -> str:
    """The catalogue file's text, made from the live registry."""
    return json.dumps(_document(_live()), indent=1, ensure_ascii=False) + "\n"


if __name__ == "__main__":
    CATALOGUE.write_text(catalogue_text(), encoding="utf-8")
    print(f"wrote {CATALOGUE}")
