"""Policy files: discovery, validation with "did you mean", overrides and ignores."""

from __future__ import annotations

import os
from pathlib import Path

import pytest
from click.testing import CliRunner

from steelyard.cli import app
from steelyard.errors import PolicyError
from steelyard.policy_file import discover, load_policy, parse_policy, starter_text

runner = CliRunner()


def _policy(tmp_path: Path, text: str, name: str = "steelyard.toml") -> Path:
    path = tmp_path / name
    path.write_text(text)
    return path


def test_discovery_walks_up_and_prefers_own_file(tmp_path: Path) -> None:
    nested = tmp_path / "a" / "b"
    nested.mkdir(parents=True)
    _policy(tmp_path, '[tool.steelyard]\nfail-on = "warning"\n', "pyproject.toml")
    found = discover(nested)
    assert found is not None and found[0] == tmp_path / "pyproject.toml"
    assert load_policy(start=nested).fail_on == "warning"
    _policy(tmp_path / "a", 'fail-on = "info"\n')
    assert load_policy(start=nested).fail_on == "info"
    assert "steelyard.toml" in load_policy(start=nested).source


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ('fail_on = "error"\n', "did you mean 'fail-on'"),
        ('fail-on = "fatal"\n', "must be one of"),
        ("[rules.dead-units]\n", "did you mean 'dead-unit'"),
        ("[rules.fan-in-norm]\nratoi = 3\n", "did you mean 'ratio'"),
        ('[rules.fan-in-norm]\nratio = "big"\n', "must be a number"),
        ("[rules.fan-in-norm]\nratio = -1\n", "must be >= 0"),
        ("[rules.dead-unit]\nerror-share = 1.5\n", r"must lie in \[0, 1\]"),
        ("[rules.dead-unit]\nenabled = 1\n", "true or false"),
        ('[rules.dead-unit]\nseverity = "fatal"\n', "must be one of"),
        ("input-range = [1.0, 0.0]\n", "above high"),
        ("input-range = 3\n", "pair"),
        ("weight-decay = -1.0\n", ">= 0"),
        ('[[ignore]]\nrule = "dead-unit"\nlayers = "x"\n', "reason"),
        ('[[ignore]]\nrule = "dead-units"\nreason = "r"\n', "did you mean 'dead-unit'"),
        ('[[override]]\nfan-in-norm = { ratio = 3 }\n', "layers"),
        ('[[override]]\nlayers = "h*"\nfan-in-norm = { ratoi = 3 }\n', "did you mean 'ratio'"),
        ("this is = not toml [\n", "not valid TOML"),
    ],
)
def test_every_mistake_names_key_and_file(tmp_path: Path, text: str, message: str) -> None:
    path = _policy(tmp_path, text)
    with pytest.raises(PolicyError, match=message) as raised:
        load_policy(path)
    assert str(path) in str(raised.value)


def test_cli_policy_error_exits_2(tmp_path: Path, healthy_file: Path) -> None:
    path = _policy(tmp_path, "[rules.fan-in-norm]\nratoi = 3\n")
    result = runner.invoke(app, ["audit", str(healthy_file), "--policy", str(path)])
    assert result.exit_code == 2
    assert "ratoi" in result.stderr and str(path) in result.stderr and "did you mean" in result.stderr


def test_overrides_apply_in_order_and_ignores_need_reason(unhealthy_file: Path, tmp_path: Path) -> None:
    policy = parse_policy(
        {
            "rules": {"fan-in-norm": {"ratio": 100.0}},
            "override": [{"layers": "fc1", "fan-in-norm": {"ratio": 8.0}}],
            "ignore": [{"rule": "dead-unit", "layers": "fc*", "reason": "pruned later"}],
        },
        "inline",
    )
    assert policy.settings("fan-in-norm", {"ratio": 8.0}, "fc1")["ratio"] == 8.0
    assert policy.settings("fan-in-norm", {"ratio": 8.0}, "fc2")["ratio"] == 100.0
    from steelyard.api import audit

    report = audit(unhealthy_file, policy=policy)
    rules = {f.rule for f in report.audits[0].findings}
    assert "dead-unit" not in rules and "fan-in-norm" in rules
    assert report.audits[0].ignored >= 1


def test_policy_in_pyproject_changes_the_gate(tmp_path: Path, unhealthy_file: Path) -> None:
    _policy(tmp_path, '[tool.steelyard]\nfail-on = "never"\n', "pyproject.toml")
    cwd = os.getcwd()
    os.chdir(tmp_path)
    try:
        result = runner.invoke(app, ["audit", str(unhealthy_file)])
    finally:
        os.chdir(cwd)
    assert result.exit_code == 0
    assert "[tool.steelyard]" in result.stdout


def test_starter_file_parses_back_to_the_defaults(tmp_path: Path) -> None:
    path = _policy(tmp_path, starter_text())
    policy = load_policy(path)
    assert policy.fail_on == "error"
    from steelyard.rules import registry

    for spec in registry().values():
        settings = policy.settings(spec.name, {"enabled": True, **spec.thresholds}, None)
        assert settings == {"enabled": True, **spec.thresholds}


def test_policy_command(tmp_path: Path) -> None:
    cwd = os.getcwd()
    os.chdir(tmp_path)
    try:
        assert runner.invoke(app, ["policy", "--init"]).exit_code == 0
        assert (tmp_path / "steelyard.toml").is_file()
        assert runner.invoke(app, ["policy", "--init"]).exit_code == 2  # refuses to overwrite
        shown = runner.invoke(app, ["policy", "--show"])
    finally:
        os.chdir(cwd)
    assert shown.exit_code == 0 and "[rules.dead-unit]" in shown.stdout and "steelyard.toml" in shown.stdout


def test_policy_show_is_toml_that_policy_reads_back_unchanged(tmp_path: Path) -> None:
    # Every rule and key, unset thresholds, overrides, ignores, budget and text that needs
    # escaping; parsed by tomllib (the standard library's TOML 1.0 reader) and by --policy.
    import tomllib

    runner = CliRunner()
    source = tmp_path / "steelyard.toml"
    source.write_text(
        'fail-on = "warning"\n'
        "input-range = [-1.5, 2.0]\n"
        "weight-decay = 0.0001\n"
        'frozen = ["encoder.*", "emb\\"quoted"]\n'
        "[budget]\n"
        "load-seconds = 30\n"
        "[rules.dead-unit]\n"
        "floor = 1e-06\n"
        "[rules.fan-in-norm]\n"
        "ratio = 6.5\n"
        "[rules.layer-drift]\n"
        "enabled = false\n"
        "[[override]]\n"
        'layers = "fc*"\n'
        'dead-unit = { severity = "error", enabled = true }\n'
        "[[ignore]]\n"
        'rule = "twin-units"\n'
        'layers = "head"\n'
        "reason = \"copied on purpose: 'twin' heads\"\n",
        encoding="utf-8",
    )
    first = runner.invoke(app, ["policy", "--show", "--policy", str(source)])
    assert first.exit_code == 0, first.output
    tomllib.loads(first.stdout)  # valid TOML
    shown = tmp_path / "shown.toml"
    shown.write_text(first.stdout, encoding="utf-8")
    second = runner.invoke(app, ["policy", "--show", "--policy", str(shown)])
    assert second.exit_code == 0, second.output
    # Only the first line (where the policy came from) differs.
    assert first.stdout.splitlines()[1:] == second.stdout.splitlines()[1:]
    assert "# max-norm is unset" in first.stdout
    assert 'ratio = 6.5' in first.stdout and "load-seconds = 30" in first.stdout
