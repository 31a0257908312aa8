"""The "add a rule in five minutes" walkthrough of DEVELOPERS.md, done once: a tiny rule that
exists only in this test is registered, then runs through the engine (per layer, typed
settings from a policy file, the engine's enabled / severity / override / ignore handling) and
shows up in every report: terminal, JSON, SARIF (rules table and results) and ``steelyard
rules``."""

from __future__ import annotations

import json
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

import steelyard.rules as rules_package
from steelyard.cli import app
from steelyard.findings import Finding, Severity
from steelyard.graph import Layer
from steelyard.rules.base import AuditContext, RuleSettings, RuleSpec, layer_finding, threshold
from steelyard.rules.scoring import score
from tests.conftest import mlp_tensors, write_safetensors
from tests.rules._registration import registered_for_the_test

runner = CliRunner()
CALLS: list[str] = []


# ---- the walkthrough's rule: steps 1 to 3 -----------------------------------------------------
@dataclass(frozen=True)
class WideLayerSettings:
    """Thresholds of ``wide-layer``."""

    max_fan_in: int = threshold(4)


def check_layer(
    ctx: AuditContext, settings: RuleSettings[WideLayerSettings], layer: Layer
) -> Iterator[Finding]:
    """A layer reading more inputs than ``max-fan-in``."""
    CALLS.append(layer.name)
    limit = settings.for_layer(layer).max_fan_in
    if layer.fan_in > limit:
        yield layer_finding(
            RULE.name,
            layer,
            severity=Severity.WARNING,
            score=score(1.0, layer.fan_in / limit),
            message=f"fan-in {layer.fan_in} is above {limit}",
            hint="informational",
            evidence={"fan_in": layer.fan_in, "limit": limit},
        )


RULE = RuleSpec(
    name="wide-layer",
    severity=Severity.WARNING,
    settings=WideLayerSettings,
    summary="a test-only rule: a layer reading many inputs",
    doc="``wide-layer``: test only.\n\n**Why it matters.** It does not.\n\n**What to do.** Nothing.\n",
    per_layer=check_layer,
)


# ---- step 4: register it (here only for the test's duration) -------------------------------
@pytest.fixture
def registered(monkeypatch: pytest.MonkeyPatch) -> Iterator[None]:
    CALLS.clear()
    yield from registered_for_the_test(monkeypatch, "steelyard_test_wide_layer", RULE)


def _mlp(tmp_path: Path) -> Path:
    # fc1 reads 6 inputs, fc2 reads 16 (PyTorch state-dict names, written with safetensors).
    return write_safetensors(tmp_path / "m.safetensors", mlp_tensors(np.random.default_rng(3)))


def test_a_rule_registered_once_runs_in_the_audit_and_shows_in_every_report(
    registered: None, tmp_path: Path
) -> None:
    path = _mlp(tmp_path)
    policy = tmp_path / "steelyard.toml"
    policy.write_text(
        'fail-on = "never"\n'
        "[rules.wide-layer]\nmax-fan-in = 5\n"
        '[[override]]\nlayers = "fc2"\nwide-layer = { severity = "error" }\n',
        encoding="utf-8",
    )
    common = ["audit", str(path), "--policy", str(policy)]
    document = json.loads(runner.invoke(app, [*common, "-f", "json"]).stdout)
    mine = {f["layer"]: f for f in document["findings"] if f["rule"] == "wide-layer"}
    assert set(mine) == {"fc1", "fc2"}  # fan-in 6 and 16 both above the policy's 5
    assert mine["fc1"]["evidence"] == {"fan_in": 6, "limit": 5}  # typed setting from the policy
    assert mine["fc1"]["severity"] == "warning"
    assert mine["fc2"]["severity"] == "error"  # the override's severity, applied by the engine

    sarif = json.loads(runner.invoke(app, [*common, "-f", "sarif"]).stdout)
    run = sarif["runs"][0]
    ids = [r["id"] for r in run["tool"]["driver"]["rules"]]
    assert "wide-layer" in ids
    results = [r for r in run["results"] if r["ruleId"] == "wide-layer"]
    assert len(results) == 2 and all(ids[r["ruleIndex"]] == "wide-layer" for r in results)

    text = runner.invoke(app, common).stdout
    assert "wide-layer" in text and "fan-in 16 is above 5" in text

    listed = runner.invoke(app, ["rules"])
    assert "wide-layer" in listed.stdout
    page = runner.invoke(app, ["rules", "wide-layer"])
    assert page.exit_code == 0 and "thresholds: max-fan-in=4" in page.stdout


def test_the_engine_skips_layers_the_rule_is_off_on_and_moves_ignored_findings_aside(
    registered: None, tmp_path: Path
) -> None:
    path = _mlp(tmp_path)
    policy = tmp_path / "steelyard.toml"
    policy.write_text(
        'fail-on = "never"\n'
        '[[override]]\nlayers = "fc1"\nwide-layer = { enabled = false }\n'
        '[[ignore]]\nrule = "wide-layer"\nlayers = "fc2"\nreason = "wide by design"\n',
        encoding="utf-8",
    )
    result = runner.invoke(app, ["audit", str(path), "--policy", str(policy), "-f", "json"])
    document = json.loads(result.stdout)
    assert not [f for f in document["findings"] if f["rule"] == "wide-layer"]
    assert "fc1" not in CALLS and "fc2" in CALLS  # never run where it is off
    assert document["summary"]["ignored"] == 1
    (silenced,) = document["suppressed"]
    assert silenced["reason"] == "wide by design"


def test_the_registry_is_back_to_the_real_rules_afterwards() -> None:
    assert "wide-layer" not in rules_package.registry()
