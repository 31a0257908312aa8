"""The rule registry: every rule present, named uniquely, documented, and docs current."""

from __future__ import annotations

import importlib.util
from pathlib import Path

from steelyard.rules import _MODULES, registry

EXPECTED = {
    "nonfinite", "dead-unit", "fan-in-norm", "twin-units",
    "unsupported-weight", "untrained-layer", "constraint-breach", "uncovered-weights",
}
DOCS = Path(__file__).resolve().parents[2] / "docs"


def test_every_rule_module_is_present_and_named_uniquely() -> None:
    specs = registry()
    assert len(specs) == len(_MODULES)  # no module skipped, no duplicate name
    assert set(specs) == EXPECTED


def test_every_rule_has_a_doc_page_with_why_and_what_to_do() -> None:
    for spec in registry().values():
        doc = spec.doc
        assert len(doc) > 400, spec.name
        assert "**Why it matters.**" in doc, spec.name
        assert "**What to do.**" in doc, spec.name
        assert spec.summary and spec.help_uri.endswith(spec.name)


def test_docs_rules_md_is_current() -> None:
    spec = importlib.util.spec_from_file_location("gen_rules", DOCS / "gen_rules.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    assert (DOCS / "rules.md").read_text(encoding="utf-8") == module.render(), "run python docs/gen_rules.py"
    assert (DOCS / "policy.md").read_text(encoding="utf-8") == module.render_policy(), "run python docs/gen_rules.py"
