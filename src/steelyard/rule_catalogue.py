"""The rule catalogue: each rule's name, severity, why, page and thresholds, for
``steelyard rules`` without importing the rules.

Importing every rule module (with numpy, the layer graph and the statistics they are written
against) was most of the 0.67 s that listing the rules took (docs/performance.md, Start-up),
while the listing reads only what each :class:`~steelyard.rules.base.RuleSpec` says about
itself. ``rule_catalogue.json`` holds that, made from the live registry, with a SHA-256 of the
rule modules it was made from: when they differ on disk (a rule edited since), or the file is
missing or broken, the cards come from the live registry instead, so the listing is never
stale, only slower. tests/test_rule_catalogue.py checks that the committed file is current.

Refresh it after changing a rule: ``python -m steelyard.rule_catalogue``.
"""

from __future__ import annotations

import hashlib
import json
import sys
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from steelyard.findings import Severity

if TYPE_CHECKING:
    from steelyard.rules.base import RuleSpec

_PACKAGE = Path(__file__).resolve().parent
CATALOGUE = _PACKAGE / "rule_catalogue.json"
#: Where the rules' metadata is written: the rule modules with their base and registry (not
#: the private measurement helpers, ``_*.py``) and the severities.
_SOURCES = (_PACKAGE / "rules", _PACKAGE / "comparison" / "checks")
_SEVERITIES = _PACKAGE / "findings.py"


@dataclass(frozen=True)
class RuleCard:
    """What ``steelyard rules`` shows of one rule (the same fields a RuleSpec offers)."""

    name: str
    severity: Severity
    summary: str
    doc: str
    thresholds: dict[str, Any]
    help_uri: str


def sources_digest() -> str:
    """SHA-256 of the rule modules' text (about 4 ms); empty when one cannot be read."""
    files = [_SEVERITIES]
    for folder in _SOURCES:
        files += (p for p in folder.glob("*.py") if p.name == "__init__.py" or not p.name.startswith("_"))
    digest = hashlib.sha256()
    try:
        for path in sorted(files):
            digest.update(f"{path.relative_to(_PACKAGE).as_posix()}\0".encode())
            digest.update(path.read_bytes())
    except (OSError, ValueError):
        return ""
    return digest.hexdigest()


def card_of(spec: RuleSpec) -> RuleCard:
    """A live rule's card."""
    return RuleCard(
        spec.name, spec.severity, spec.summary, spec.doc, spec.thresholds, spec.help_uri
    )


def _live() -> list[RuleCard]:
    from steelyard.rules import registry

    return [card_of(spec) for spec in registry(None).values()]


def _document(cards: list[RuleCard]) -> dict[str, Any]:
    from steelyard.rules import _MODULES

    rules = [{**asdict(card), "severity": card.severity.value} for card in cards]
    return {"sources": sources_digest(), "modules": list(_MODULES), "rules": rules}


def cards() -> list[RuleCard]:
    """Every rule's card, in documentation order: from the catalogue when it was made from
    the rule modules on disk, else from the live registry. A process that has imported the
    registry already and registered other modules than the catalogue lists (a program or
    test that adds a rule of its own) gets the live rules too."""
    try:
        document = json.loads(CATALOGUE.read_text(encoding="utf-8"))
        if not document["sources"] or document["sources"] != sources_digest():
            return _live()
        loaded = sys.modules.get("steelyard.rules")
        if loaded is not None and list(getattr(loaded, "_MODULES", ())) != document["modules"]:
            return _live()
        return [RuleCard(**{**rule, "severity": Severity(rule["severity"])}) for rule in document["rules"]]
    except (OSError, ValueError, KeyError, TypeError):
        return _live()


def catalogue_text() -> str:
    """The catalogue file's text, made from the live registry."""
    return json.dumps(_document(_live()), indent=1, ensure_ascii=False) + "\n"


if __name__ == "__main__":
    CATALOGUE.write_text(catalogue_text(), encoding="utf-8")
    print(f"wrote {CATALOGUE}")
