"""The command line: exit codes, streams and one-line errors (typer's CliRunner and a real
subprocess)."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest
from typer.testing import CliRunner

from steelyard.cli import app

runner = CliRunner()


def test_layers_json_contract(healthy_file: Path) -> None:
    result = runner.invoke(app, ["layers", str(healthy_file), "--format", "json"])
    assert result.exit_code == 0, result.output
    document = json.loads(result.stdout)
    assert document["schema"] == "steelyard.layers/1"
    assert document["checkpoint"]["format"] == "safetensors"
    assert set(document["layers"][0]) == {
        "name", "kind", "weight", "bias", "units", "fan_in", "groups", "kernel",
        "activation", "norm", "inputs_from", "linked_by",
    }


def test_audit_exit_codes(healthy_file: Path, unhealthy_file: Path) -> None:
    assert runner.invoke(app, ["audit", str(healthy_file)]).exit_code == 0
    failing = runner.invoke(app, ["audit", str(unhealthy_file)])
    assert failing.exit_code == 1
    assert "nonfinite" in failing.stdout
    assert runner.invoke(app, ["audit", str(unhealthy_file), "--fail-on", "never"]).exit_code == 0



def test_a_rule_that_could_not_run_is_a_note_not_a_finding(healthy_file: Path) -> None:
    # Without a gradient source unsupported-weight cannot run. That is not a problem of the
    # model, so even the strictest gate passes, and the report says so in its notes.
    result = runner.invoke(app, ["audit", str(healthy_file), "--fail-on", "info", "-f", "json"])
    assert result.exit_code == 0, result.stdout
    document = json.loads(result.stdout)
    assert not [f for f in document["findings"] if f["rule"] == "unsupported-weight"]
    assert any(n.startswith("unsupported-weight: did not run") for n in document["notes"])


def test_audit_json_schema(unhealthy_file: Path) -> None:
    result = runner.invoke(app, ["audit", str(unhealthy_file), "--format", "json"])
    document = json.loads(result.stdout)
    assert document["schema"] == "steelyard.audit/1"
    assert len(document["checkpoint"]["sha256"]) == 64
    rules = [f["rule"] for f in document["findings"]]
    assert {"nonfinite", "dead-unit", "fan-in-norm"} <= set(rules)
    severities = [f["severity"] for f in document["findings"]]
    order = {"error": 0, "warning": 1, "info": 2}
    assert severities == sorted(severities, key=order.__getitem__)  # rank order
    nan = next(f for f in document["findings"] if f["rule"] == "nonfinite")
    assert nan["units"] == [1] and nan["tensor"] == "fc2.bias"
    assert document["gate"] == {"fail_on": "error", "passed": False}
    assert document["summary"]["error"] >= 1


@pytest.mark.parametrize(
    "content", [b"", b"\x00" * 64, b"PK\x03\x04 broken zip", b"\x89HDF\r\n\x1a\n garbage"]
)
def test_bad_input_is_one_line_exit_2(tmp_path: Path, content: bytes) -> None:
    path = tmp_path / "broken.bin"
    path.write_bytes(content)
    result = runner.invoke(app, ["audit", str(path)])
    assert result.exit_code == 2
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and str(path) in lines[0] and "Traceback" not in result.stderr


def test_missing_file_and_unknown_rule(tmp_path: Path) -> None:
    result = runner.invoke(app, ["layers", str(tmp_path / "nope.safetensors")])
    assert result.exit_code == 2 and "does not exist" in result.stderr
    result = runner.invoke(app, ["rules", "dead-units"])
    assert result.exit_code == 2 and "did you mean 'dead-unit'" in result.stderr


def test_rules_list_and_page() -> None:
    listing = runner.invoke(app, ["rules"])
    assert listing.exit_code == 0
    for name in ("nonfinite", "dead-unit", "fan-in-norm", "constraint-breach"):
        assert name in listing.stdout
    page = runner.invoke(app, ["rules", "dead-unit"])
    assert "interval bound propagation" in page.stdout and "help:" in page.stdout


def test_output_file_is_written_and_stdout_stays_clean(tmp_path: Path, unhealthy_file: Path) -> None:
    target = tmp_path / "report.json"
    result = runner.invoke(app, ["audit", str(unhealthy_file), "-f", "json", "-o", str(target)])
    assert result.exit_code == 1 and result.stdout == ""
    assert json.loads(target.read_text())["schema"] == "steelyard.audit/1"
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".report.json.tmp")]


def test_real_subprocess_streams_and_exit_codes(tmp_path: Path, unhealthy_file: Path) -> None:
    env = {**os.environ, "NO_COLOR": "1"}
    done = subprocess.run(
        [sys.executable, "-m", "steelyard", "audit", str(unhealthy_file), "--format", "json"],
        capture_output=True, text=True, env=env, timeout=120,
    )
    assert done.returncode == 1
    assert json.loads(done.stdout)["gate"]["passed"] is False  # stdout is pure JSON
    bad = tmp_path / "bad.onnx"
    bad.write_bytes(b"\x08\x07 not really onnx" * 3)
    done = subprocess.run(
        [sys.executable, "-m", "steelyard", "layers", str(bad)], capture_output=True, text=True, env=env, timeout=120
    )
    assert done.returncode == 2 and done.stdout == ""
    assert len(done.stderr.strip().splitlines()) == 1 and "Traceback" not in done.stderr


def test_several_paths_and_folders(tmp_path: Path, healthy_file: Path, unhealthy_file: Path) -> None:
    result = runner.invoke(app, ["audit", str(tmp_path), "-f", "json"])
    document = json.loads(result.stdout)
    assert document["schema"] == "steelyard.audit-set/1"
    assert [Path(a["checkpoint"]["path"]).name for a in document["audits"]] == [
        "healthy.safetensors", "unhealthy.safetensors",
    ]
    assert [a["gate"]["passed"] for a in document["audits"]] == [True, False]
    assert result.exit_code == 1 and document["gate"]["passed"] is False
