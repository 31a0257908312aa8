"""Several reports from one run, formats from file endings: `-o report.sarif -o report.md`
writes both from one audit; an explicit --format that contradicts an ending is refused.

Each written document is read back by a reader outside the project: SARIF 2.1.0 and the
JSON report by the json module (SARIF's required "version" and "runs", OASIS SARIF 2.1.0
§3.13), JUnit XML by junitparser."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import junitparser
import pytest
from click.testing import CliRunner

from steelyard import api
from steelyard.cli import app

runner = CliRunner()
DEMO = Path(__file__).resolve().parents[1] / "fixtures" / "demo"
BAD = DEMO / "pumpwear-nightly-bad.safetensors"
HEALTHY = DEMO / "pumpwear-healthy.safetensors"


def test_one_audit_writes_every_named_report(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    calls: list[Any] = []
    real = api.audit_many

    def counted(*args: Any, **kwargs: Any) -> Any:
        calls.append(args)
        return real(*args, **kwargs)

    monkeypatch.setattr(api, "audit_many", counted)
    names = ["r.sarif", "r.md", "r.xml", "r.json", "r.txt", "upload.sarif.json"]
    args = ["audit", str(BAD)]
    for name in names:
        args += ["-o", str(tmp_path / name)]
    result = runner.invoke(app, args)
    assert result.exit_code == 1, result.output  # the bad demo fails the gate
    assert len(calls) == 1
    for name in ("r.sarif", "upload.sarif.json"):
        log = json.loads((tmp_path / name).read_text(encoding="utf-8"))
        assert log["version"] == "2.1.0" and log["runs"][0]["results"]
    document = json.loads((tmp_path / "r.json").read_text(encoding="utf-8"))
    assert document["findings"]
    suites = junitparser.JUnitXml.fromfile(str(tmp_path / "r.xml"))
    assert sum(suite.failures for suite in suites) >= 1
    assert (tmp_path / "r.md").read_text(encoding="utf-8").lstrip().startswith("#")
    table = (tmp_path / "r.txt").read_text(encoding="utf-8")
    assert "\x1b[" not in table and "fc" in table
    assert result.stdout == ""


def test_a_format_that_contradicts_the_ending_is_refused_before_auditing(tmp_path: Path) -> None:
    target = tmp_path / "report.json"
    result = runner.invoke(app, ["audit", str(HEALTHY), "-f", "sarif", "-o", str(target)])
    assert result.exit_code == 2
    lines = [line for line in result.stderr.splitlines() if line.strip()]
    assert len(lines) == 1 and "report.json" in lines[0] and "sarif" in lines[0]
    assert not target.exists()


def test_an_unknown_ending_needs_a_format(tmp_path: Path) -> None:
    target = tmp_path / "report.out"
    refused = runner.invoke(app, ["audit", str(HEALTHY), "-o", str(target)])
    assert refused.exit_code == 2 and "report.out" in refused.stderr
    taken = runner.invoke(app, ["audit", str(HEALTHY), "-f", "json", "-o", str(target)])
    assert taken.exit_code == 0
    assert json.loads(target.read_text(encoding="utf-8"))["findings"] == []


def test_compare_writes_several_reports_from_one_run(tmp_path: Path) -> None:
    args = ["compare", str(HEALTHY), str(BAD), "-o", str(tmp_path / "c.sarif"), "-o", str(tmp_path / "c.xml")]
    result = runner.invoke(app, args)
    assert result.exit_code == 1, result.output
    log = json.loads((tmp_path / "c.sarif").read_text(encoding="utf-8"))
    assert log["version"] == "2.1.0"
    assert junitparser.JUnitXml.fromfile(str(tmp_path / "c.xml")) is not None


def _toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return json.dumps(value)  # a JSON string is a valid TOML basic string (TOML 1.0)
    return repr(value)


def test_rules_json_lists_every_rule_with_keys_the_policy_file_accepts(tmp_path: Path) -> None:
    from steelyard.rules import registry

    result = runner.invoke(app, ["rules", "--format", "json"])
    assert result.exit_code == 0
    document = json.loads(result.stdout)
    assert document["schema"] == "steelyard.rules/1"
    assert [r["name"] for r in document["rules"]] == list(registry(None))
    lines = []
    for rule in document["rules"]:
        lines.append(f'[rules.{rule["name"]}]')
        lines += [
            f"{key} = {_toml_value(spec['default'])}"
            for key, spec in rule["settings"].items()
            if spec["default"] is not None
        ]
    policy = tmp_path / "steelyard.toml"
    policy.write_text("\n".join(lines) + "\n", encoding="utf-8")
    shown = runner.invoke(app, ["policy", "--show", "--policy", str(policy)])
    assert shown.exit_code == 0, shown.output
    one = json.loads(runner.invoke(app, ["rules", "dead-unit", "-f", "json"]).stdout)
    assert [r["name"] for r in one["rules"]] == ["dead-unit"]
    assert runner.invoke(app, ["rules", "no-such-rule", "-f", "json"]).exit_code == 2


def test_layers_writes_to_a_file(tmp_path: Path) -> None:
    target = tmp_path / "layers.json"
    result = runner.invoke(app, ["layers", str(HEALTHY), "-f", "json", "-o", str(target)])
    assert result.exit_code == 0 and result.stdout == ""
    assert json.loads(target.read_text(encoding="utf-8"))["layers"]


def test_the_cli_formats_are_the_report_formats() -> None:
    # One table serves --format and Report.render: the CLI offers exactly its names.
    from steelyard.cli import AuditFormat
    from steelyard.render.report_formats import AUDIT_FORMATS

    assert [f.value for f in AuditFormat] == list(AUDIT_FORMATS)
