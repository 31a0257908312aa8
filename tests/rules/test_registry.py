"""The one rule registry: every rule of every command present, named uniquely, declared once,
documented, with typed settings the policy file is validated against; docs current."""

from __future__ import annotations

import dataclasses
import importlib.util
import json
from collections.abc import Iterator
from pathlib import Path
from types import SimpleNamespace
from typing import Any, cast

import pytest

from steelyard.errors import PolicyError
from steelyard.findings import Finding, Severity
from steelyard.graph import Layer
from steelyard.policy import LayerOverride, Policy
from steelyard.policy_file import parse_policy
from steelyard.report import LayerHealth
from steelyard.rules import (
    _MODULES,
    Command,
    RuleSettings,
    RuleSpec,
    Scope,
    registry,
    sarif_rules,
    settings_schema,
)
from steelyard.rules.base import threshold
from steelyard.rules.dead_unit import RULE as DEAD_UNIT
from steelyard.rules.dead_unit import DeadUnitSettings

AUDIT = {
    "nonfinite", "dead-unit", "fan-in-norm", "twin-units",
    "unsupported-weight", "untrained-layer", "constraint-breach", "uncovered-weights",
    "adapter-update", "untrained-token", "essential-weight", "quantization-error",
    "head-circuits", "moe-experts",
}
COMPARE = {"layer-drift", "frozen-layer-moved", "units-died", "new-nonfinite"}
REPO = Path(__file__).resolve().parents[2]
DOCS = REPO / "docs"


def test_every_rule_module_is_present_and_named_uniquely() -> None:
    every = registry(None)
    assert len(every) == len(_MODULES)  # no module skipped, no duplicate name
    assert set(every) == AUDIT | COMPARE
    assert set(registry()) == set(registry(Command.AUDIT)) == AUDIT
    assert set(registry(Command.COMPARE)) == COMPARE


def test_every_rule_has_a_doc_page_with_why_and_what_to_do() -> None:
    for spec in registry(None).values():
        doc = spec.doc
        assert len(doc) > 400, spec.name
        assert "**Why" in doc, spec.name  # "Why it matters", or why the default (layer-drift)
        assert "**What to do.**" in doc, spec.name
        assert spec.summary and spec.help_uri.endswith(f"/{spec.commands[0].docs_page}#{spec.name}")


def test_a_rule_declares_its_scope_once() -> None:
    def on_layer(ctx: Any, settings: RuleSettings[Any], layer: Layer) -> Iterator[Finding]:
        yield from ()

    def on_whole(ctx: Any, settings: RuleSettings[Any]) -> Iterator[Finding]:
        yield from ()

    common: dict[str, Any] = {"name": "x", "severity": Severity.INFO, "summary": "s", "doc": "d"}
    with pytest.raises(TypeError, match="exactly one"):
        RuleSpec(**common, per_layer=on_layer, whole=on_whole)
    with pytest.raises(TypeError, match="exactly one"):
        RuleSpec(**common)
    with pytest.raises(TypeError, match="finish"):
        RuleSpec(**common, whole=on_whole, finish=on_whole)
    assert RuleSpec(**common, per_layer=on_layer).scope is Scope.LAYER
    assert RuleSpec(**common, whole=on_whole).scope is Scope.WHOLE


def test_docs_rules_md_is_current() -> None:
    spec = importlib.util.spec_from_file_location("gen_rules", DOCS / "gen_rules.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    assert (DOCS / "rules.md").read_text(encoding="utf-8") == module.render(), "run python docs/gen_rules.py"
    assert (DOCS / "policy.md").read_text(encoding="utf-8") == module.render_policy(), "run python docs/gen_rules.py"


# ---- typed settings and the schema the policy file is checked against ----------------------
def test_settings_are_frozen_typed_records_whose_policy_keys_are_the_thresholds() -> None:
    for spec in registry(None).values():
        assert dataclasses.is_dataclass(spec.settings), spec.name
        assert spec.settings.__dataclass_params__.frozen, spec.name  # type: ignore[attr-defined]
        schema = settings_schema()[spec.name]
        assert list(schema) == list(spec.thresholds), spec.name
        for key, item in schema.items():
            assert item.default == spec.thresholds[key]
            assert item.kind in (bool, int, float, str), (spec.name, key)
            assert item.default is None or isinstance(item.default, item.kind), (spec.name, key)


def _rejects(rule: str, key: str, value: Any) -> bool:
    try:
        parse_policy({"rules": {rule: {key: value}}}, "test.toml")
    except PolicyError:
        return True
    return False


def test_schema_ranges_agree_with_the_policy_file_validation() -> None:
    # The schema must be a drop-in for the policy file's checks: every value the schema allows
    # at a range's edge is accepted, and every value just past it is refused.
    for rule, schema in settings_schema().items():
        for key, item in schema.items():
            if item.kind is bool:
                assert not _rejects(rule, key, not item.default)
                assert _rejects(rule, key, 1.5), (rule, key)
                continue
            assert item.low == 0.0, (rule, key)
            assert not _rejects(rule, key, 0)
            assert _rejects(rule, key, -1e-9), (rule, key)
            if item.high is not None:
                assert not _rejects(rule, key, item.high), (rule, key)
                assert _rejects(rule, key, item.high + 1e-9), (rule, key)
            else:
                assert not _rejects(rule, key, 1e6), (rule, key)
            assert _rejects(rule, key, "a word"), (rule, key)


def test_rules_read_thresholds_as_typed_attributes_resolved_per_layer() -> None:
    policy = Policy(
        rules={"dead-unit": {"error-share": 0.25}},
        overrides=(LayerOverride("head*", {"dead-unit": {"constant": 1, "enabled": False}}),),
    )
    settings: RuleSettings[DeadUnitSettings] = RuleSettings(DEAD_UNIT, policy)
    # Settings resolve by layer name only, so a stand-in with a name is enough.
    head, body = cast(Layer, SimpleNamespace(name="head.0")), cast(Layer, SimpleNamespace(name="body"))
    assert settings.rule_wide == DeadUnitSettings(error_share=0.25)
    on_head = settings.for_layer(head)
    assert on_head.constant == 1.0 and isinstance(on_head.constant, float)  # an int in TOML
    assert on_head.error_share == 0.25
    assert settings.for_layer(body).constant == 1e-3
    assert not settings.enabled(head) and settings.enabled(body)
    assert settings.enabled_anywhere()
    assert settings.severity(body) is None


def test_the_sarif_rules_table_comes_from_the_one_registry() -> None:
    # The committed golden SARIF log of the audit (tests/golden) holds the table the audit's
    # renderer builds today; the registry's table must be the same.
    golden = json.loads((REPO / "tests" / "golden" / "audit-bad.sarif").read_text(encoding="utf-8"))
    table, index = sarif_rules(Command.AUDIT)
    assert table == golden["runs"][0]["tool"]["driver"]["rules"]
    assert list(index) == list(registry(Command.AUDIT))
    compare_table, compare_index = sarif_rules(Command.COMPARE)
    assert compare_table[: len(table)] == table
    extra = compare_table[len(table):]
    assert {entry["id"] for entry in extra} == COMPARE
    assert all(entry["properties"]["command"] == "compare" for entry in extra)
    assert all("/compare/#" in entry["helpUri"] for entry in extra)
    assert [compare_index[e["id"]] for e in compare_table] == list(range(len(compare_table)))


def test_health_columns_are_declared_by_the_rules_that_fill_them() -> None:
    from steelyard.checkpoint_audit import _MEASURED

    measured = set(_MEASURED)  # filled by the audit itself, not by a rule
    filled = {
        column.field: spec.name for spec in registry().values() for column in spec.health
    }
    assert set(filled) == {f.name for f in dataclasses.fields(LayerHealth)} - measured
    assert filled == {
        "dead": "dead-unit",
        "twins": "twin-units",
        "unsupported_share": "unsupported-weight",
    }


@dataclasses.dataclass(frozen=True)
class _Unbounded:
    limit: float = threshold(1.0, low=None)


def test_a_threshold_may_declare_an_open_range() -> None:
    def on_whole(ctx: Any, settings: RuleSettings[Any]) -> Iterator[Finding]:
        yield from ()

    spec = RuleSpec(
        name="x", severity=Severity.INFO, summary="s", doc="d", settings=_Unbounded, whole=on_whole
    )
    (item,) = spec.schema
    assert (item.key, item.kind, item.low, item.high, item.default) == ("limit", float, None, None, 1.0)
