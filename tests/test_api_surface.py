"""The package's public names: ``steelyard.audit`` and ``steelyard.compare`` are callables
that give the same documents as the CLI (timestamps fixed by SOURCE_DATE_EPOCH, the
reproducible-builds convention the CLI and API both honour)."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from typer.testing import CliRunner

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
