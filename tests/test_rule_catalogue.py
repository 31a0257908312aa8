"""The rule catalogue (``src/steelyard/rule_catalogue.json``) that ``steelyard rules`` reads
instead of importing every rule: it must say what the live registry says, to the byte, and a
catalogue made from other rule modules than those on disk must never be read.

The reference is the registry itself (:func:`steelyard.rules.registry`): the catalogue is a
copy of it for start-up time (docs/performance.md, Start-up).
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from steelyard import rule_catalogue
from steelyard.render.rules_text import render_rule, render_rules
from steelyard.rule_catalogue import card_of, cards, catalogue_text
from steelyard.rules import registry

REFRESH = "stale: run `python -m steelyard.rule_catalogue` and commit src/steelyard/rule_catalogue.json"


def test_the_committed_catalogue_is_the_registry() -> None:
    assert rule_catalogue.CATALOGUE.read_text(encoding="utf-8") == catalogue_text(), REFRESH


def test_cards_are_read_from_the_catalogue_and_equal_the_live_rules() -> None:
    live = [card_of(spec) for spec in registry(None).values()]
    read = cards()
    assert [c.name for c in read] == [c.name for c in live]  # documentation order
    for card, want in zip(read, live, strict=True):
        assert card == want
        # 1 == 1.0 and True == 1 in Python: the thresholds must also print the same.
        assert repr(card.thresholds) == repr(want.thresholds)


@pytest.mark.parametrize("width", [60, 80, 120, 200])
@pytest.mark.parametrize("color", [False, True])
def test_list_and_pages_from_cards_are_the_registrys(width: int, color: bool) -> None:
    specs = registry(None)
    read = {card.name: card for card in cards()}
    assert render_rules(read, color=color, width=width) == render_rules(specs, color=color, width=width)
    for name, spec in specs.items():
        assert render_rule(read[name], color=color, width=width) == render_rule(spec, color=color, width=width)


def _planted(tmp_path: Path, monkeypatch: pytest.MonkeyPatch, sources: str) -> str:
    """A catalogue whose first rule says what the registry does not; returns that rule."""
    document = json.loads(catalogue_text())
    document["sources"] = sources
    document["rules"][0]["summary"] = "planted summary"
    planted = tmp_path / "rule_catalogue.json"
    planted.write_text(json.dumps(document), encoding="utf-8")
    monkeypatch.setattr(rule_catalogue, "CATALOGUE", planted)
    return str(document["rules"][0]["name"])


def test_the_listing_shows_what_the_catalogue_says(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # The checks above can fail: made from the modules on disk, the file's words are shown.
    name = _planted(tmp_path, monkeypatch, rule_catalogue.sources_digest())
    assert {c.name: c.summary for c in cards()}[name] == "planted summary"


@pytest.mark.parametrize("sources", ["0" * 64, ""])
def test_a_catalogue_of_other_rule_sources_is_not_read(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, sources: str
) -> None:
    # A rule edited since the catalogue was made: the live registry speaks, never stale text.
    name = _planted(tmp_path, monkeypatch, sources)
    assert {c.name: c.summary for c in cards()}[name] == registry(None)[name].summary


def test_the_digest_covers_the_rule_modules_and_the_severities() -> None:
    # A check that the digest reads what the cards are made of (rule modules, findings.py),
    # so an edited rule is noticed.
    rule_files = {p.name for p in rule_catalogue._SOURCES[0].glob("*.py")}
    assert {"dead_unit.py", "base.py", "__init__.py"} <= rule_files
    assert rule_catalogue._SEVERITIES.name == "findings.py" and rule_catalogue._SEVERITIES.is_file()
    assert len(rule_catalogue.sources_digest()) == 64


def test_a_missing_or_broken_catalogue_falls_back_to_the_registry(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    live = [card_of(spec) for spec in registry(None).values()]
    monkeypatch.setattr(rule_catalogue, "CATALOGUE", tmp_path / "absent.json")
    assert cards() == live
    digest = rule_catalogue.sources_digest()
    for text in ("{not json", '{"rules": []}', f'{{"sources": "{digest}", "rules": [{{"name": "x"}}]}}'):
        broken = tmp_path / "broken.json"
        broken.write_text(text, encoding="utf-8")
        monkeypatch.setattr(rule_catalogue, "CATALOGUE", broken)
        assert cards() == live


def test_listing_the_rules_imports_no_rule_and_no_numpy() -> None:
    # The point of the catalogue: `steelyard rules` and a rule's page without numpy (0.1 s)
    # and the rule modules (0.2 s more, python -X importtime).
    probe = (
        "import sys\n"
        "from steelyard.cli import main\n"
        "for argv in (['rules'], ['rules', 'dead-unit']):\n"
        "    sys.argv = ['steelyard', *argv]\n"
        "    try:\n        main()\n    except SystemExit as exit:\n        assert not exit.code, exit.code\n"
        "heavy = sorted(m for m in sys.modules if m == 'numpy' or m.startswith('steelyard.rules'))\n"
        "print('imported:' + ','.join(heavy), file=sys.stderr)\n"
    )
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    (line,) = [x for x in done.stderr.splitlines() if x.startswith("imported:")]
    assert line == "imported:", REFRESH if "steelyard.rules" in line else line


def test_the_audits_rules_are_read_without_the_comparison_rules() -> None:
    # registry(AUDIT) skips the modules under steelyard.comparison (an audit does not import
    # them); that is only right while none of them serves the audit.
    from steelyard.rules import _MODULES, Command, _all

    every = {spec.name: module for spec, module in zip(_all(), _MODULES, strict=True)}
    audit = registry(Command.AUDIT)
    assert set(audit) == {s.name for s in _all() if s.serves(Command.AUDIT)}
    assert all(not every[name].startswith("steelyard.comparison.") for name in audit)
    assert {every[s.name] for s in _all() if s.serves(Command.COMPARE)} >= {
        m for m in _MODULES if m.startswith("steelyard.comparison.")
    }
    probe = (
        "import sys\nfrom steelyard.rules import registry\nregistry()\n"
        "print(sorted(m for m in sys.modules if m.startswith('steelyard.comparison')))\n"
    )
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, check=True)
    assert done.stdout.strip() == "[]"
