"""The package's public names: ``steelyard.audit`` and ``steelyard.compare`` are callables
that give the same documents as the CLI (timestamps fixed by SOURCE_DATE_EPOCH, the
reproducible-builds convention the CLI and API both honour)."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from click.testing import CliRunner

import steelyard
from steelyard.cli import app

DEMO = Path(__file__).resolve().parents[1] / "fixtures" / "demo"
OLD = DEMO / "pumpwear-healthy.safetensors"
NEW = DEMO / "pumpwear-nightly-bad.safetensors"


def test_public_names_are_callables() -> None:
    assert set(steelyard.__all__) >= {"audit", "compare", "load", "__version__"}
    assert callable(steelyard.audit) and callable(steelyard.compare) and callable(steelyard.load)


def test_compare_from_python_equals_the_cli(monkeypatch: pytest.MonkeyPatch, tmp_path: Path) -> None:
    monkeypatch.setenv("SOURCE_DATE_EPOCH", "1700000000")
    monkeypatch.chdir(tmp_path)  # no project policy file found upwards from here
    report = steelyard.compare(OLD, NEW)
    assert report.passed is False
    cli = CliRunner().invoke(app, ["compare", str(OLD), str(NEW), "-f", "json"])
    assert cli.exit_code == 1
    assert json.loads(report.to_json()) == json.loads(cli.stdout)


def test_audit_from_python_equals_the_cli(monkeypatch: pytest.MonkeyPatch, tmp_path: Path) -> None:
    monkeypatch.setenv("SOURCE_DATE_EPOCH", "1700000000")
    monkeypatch.chdir(tmp_path)
    report = steelyard.audit(NEW)
    cli = CliRunner().invoke(app, ["audit", str(NEW), "-f", "json"])
    assert cli.exit_code == 1 and report.passed is False
    assert json.loads(report.to_json()) == json.loads(cli.stdout)


def test_the_api_finds_the_project_policy_as_the_cli_does(
    monkeypatch: pytest.MonkeyPatch, tmp_path: Path
) -> None:
    # A project folder whose steelyard.toml turns the gate off: the API and the CLI run
    # from a subfolder both find it upwards; Policy() asks for the defaults explicitly.
    from steelyard.policy import Policy

    monkeypatch.setenv("SOURCE_DATE_EPOCH", "1700000000")
    (tmp_path / "steelyard.toml").write_text('fail-on = "never"\n', encoding="utf-8")
    work = tmp_path / "runs"
    work.mkdir()
    monkeypatch.chdir(work)
    report = steelyard.audit(NEW)
    assert report.passed is True  # the bad demo passes only because the project's gate is off
    cli = CliRunner().invoke(app, ["audit", str(NEW), "-f", "json"])
    assert cli.exit_code == 0
    assert json.loads(report.to_json()) == json.loads(cli.stdout)
    assert steelyard.audit(NEW, policy=Policy()).passed is False
    assert steelyard.compare(OLD, NEW).passed is True
    assert steelyard.compare(OLD, NEW, policy=Policy()).passed is False


def test_audit_takes_several_paths(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(tmp_path)
    report = steelyard.audit([OLD, NEW])
    assert len(report.audits) == 2 and report.passed is False


def test_a_report_renders_in_every_format_and_in_a_notebook(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    from html.parser import HTMLParser

    monkeypatch.chdir(tmp_path)
    report = steelyard.audit(NEW)
    ranks = [f.severity.rank for f in report.findings]
    assert ranks and ranks == sorted(ranks)  # worst first, across checkpoints
    assert json.loads(report.render("json"))["findings"]
    assert json.loads(report.render("sarif"))["version"] == "2.1.0"  # OASIS SARIF 2.1.0
    assert report.render("junit").startswith("<?xml")
    assert "\x1b[" not in report.render("table")
    with pytest.raises(ValueError):
        report.render("pdf")
    assert repr(report).startswith("<steelyard Report failed")
    html = report._repr_html_()
    HTMLParser().feed(html)  # the standard library's parser reads it
    assert "FAIL" in html and report.findings[0].rule in html


def test_gate_and_baseline_from_python_equal_the_cli(monkeypatch: pytest.MonkeyPatch, tmp_path: Path) -> None:
    """``fail_on=`` and ``baseline=`` mean what ``--fail-on`` and ``--baseline`` mean."""
    monkeypatch.setenv("SOURCE_DATE_EPOCH", "1700000000")
    monkeypatch.chdir(tmp_path)
    relaxed = steelyard.audit(NEW, fail_on="never")
    assert relaxed.passed and relaxed.fail_on == "never"
    cli = CliRunner().invoke(app, ["audit", str(NEW), "-f", "json", "--fail-on", "never"])
    assert cli.exit_code == 0 and json.loads(relaxed.to_json()) == json.loads(cli.stdout)
    recorded = tmp_path / "baseline.json"
    assert CliRunner().invoke(app, ["audit", str(NEW), "--write-baseline", str(recorded)]).exit_code == 1
    gated = steelyard.audit(NEW, baseline=recorded)
    assert gated.passed and not gated.findings  # every finding is in the baseline
    cli = CliRunner().invoke(app, ["audit", str(NEW), "-f", "json", "--baseline", str(recorded)])
    assert cli.exit_code == 0 and json.loads(gated.to_json()) == json.loads(cli.stdout)
    with pytest.raises(steelyard.errors.PolicyError):
        steelyard.audit(NEW, fail_on="sometimes")
