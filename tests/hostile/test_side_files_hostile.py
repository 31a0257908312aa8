"""Hostile side files: policies, ``pyproject.toml`` in parent folders, baselines.

A side file is opened only when it is a regular file under a size cap, with ``O_NONBLOCK`` and
an ``fstat`` check (a FIFO never blocks, a link to an endless device is refused), and every
way its content can be hostile (deep nesting, a 400-digit integer, a ``tool`` key that is no
table, wrong types) is one stderr line and exit 2. Files are generated here, at test time.

FIFO, device and size cases run the real CLI in a child (``harness.run``: 20 s, 1 GiB); the
parse cases, pure Python, run in-process with click's CliRunner for speed.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner, Result

from steelyard.cli import app
from tests.conftest import mlp_tensors, write_safetensors
from tests.hostile.harness import assert_refused, run

runner = CliRunner()

_DEVICE = Path("/dev/zero")
needs_fifo = pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="no FIFOs on this system")
needs_device = pytest.mark.skipif(not _DEVICE.exists(), reason="no /dev/zero on this system")


@pytest.fixture
def model(tmp_path: Path) -> Path:
    return write_safetensors(tmp_path / "model.safetensors", mlp_tensors(np.random.default_rng(3)))


def _one_line(result: Result) -> str:
    """The CliRunner result exited 2 with one ``steelyard: error:`` line and no traceback."""
    code, stderr = result.exit_code, result.stderr
    assert code == 2, (code, stderr, result.exception)
    assert "Traceback" not in stderr
    lines = [line for line in stderr.splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith("steelyard: error: "), lines
    return lines[0]


# --- special files and sizes (real CLI in a child) -----------------------------------------


def _special(kind: str, path: Path) -> None:
    """Make ``path`` a FIFO, a link to an endless device, or a sparse file past the caps."""
    if kind == "fifo":
        os.mkfifo(path)
    elif kind == "device-link":
        path.symlink_to(_DEVICE)
    elif kind == "sparse-huge":
        # 80 MB claimed, nothing stored: past the 4 MB policy and 64 MB baseline caps.
        with open(path, "wb") as handle:
            handle.truncate(80 * 2**20)
    else:  # pragma: no cover
        raise AssertionError(kind)


_KINDS = [
    pytest.param("fifo", "FIFO", marks=needs_fifo),
    pytest.param("device-link", "character device", marks=needs_device),
    pytest.param("sparse-huge", "larger than", id="sparse-huge"),
]


@pytest.mark.parametrize(("kind", "fragment"), _KINDS)
def test_a_baseline_that_is_no_regular_small_file_is_refused_at_once(
    tmp_path: Path, model: Path, kind: str, fragment: str
) -> None:
    # Before: a FIFO baseline blocked forever, /dev/zero was read until memory ran out.
    _special(kind, tmp_path / "side.json")
    outcome = run(["audit", model.name, "--baseline", "side.json"], cwd=tmp_path, timeout=30)
    assert_refused(outcome, "side.json", fragment)


@pytest.mark.parametrize(("kind", "fragment"), _KINDS)
def test_a_policy_that_is_no_regular_small_file_is_refused_at_once(
    tmp_path: Path, model: Path, kind: str, fragment: str
) -> None:
    # In-process: opening is non-blocking, so even a regression cannot hang here (the
    # baseline cases above run the same reader in a child, with time and memory measured).
    _special(kind, tmp_path / "side.toml")
    result = runner.invoke(app, ["audit", str(model), "--policy", str(tmp_path / "side.toml")])
    line = _one_line(result)
    assert "side.toml" in line and fragment.lower() in line.lower()


@needs_fifo
def test_a_fifo_named_steelyard_toml_in_a_parent_folder_never_blocks(
    tmp_path: Path, model: Path
) -> None:
    work = tmp_path / "work"
    work.mkdir()
    os.mkfifo(tmp_path / "steelyard.toml")
    outcome = run(["audit", f"../{model.name}"], cwd=work, timeout=30)
    assert_refused(outcome, "steelyard.toml", "FIFO")


@needs_fifo
def test_a_fifo_gradient_sidecar_is_refused(tmp_path: Path, model: Path) -> None:
    os.mkfifo(tmp_path / "model.grads.safetensors")
    result = runner.invoke(
        app, ["audit", str(model), "--grads", str(tmp_path / "model.grads.safetensors")]
    )
    assert "FIFO" in _one_line(result)


# --- hostile TOML: policy files and pyproject.toml ------------------------------------------


def _deep_array(depth: int) -> str:
    return "[" * depth + "1" + "]" * depth


def _deep_table(depth: int) -> str:
    return "{ a = " * depth + "1" + " }" * depth


def _policies() -> list[tuple[str, str]]:
    """(id, policy text): nesting past the parser's recursion limit in several shapes, huge
    integers in every numeric slot, and values of the wrong type in every typed key."""
    cases: list[tuple[str, str]] = []
    for depth in (1_200, 5_000, 40_000):
        cases.append((f"deep-array-{depth}", f"frozen = {_deep_array(depth)}\n"))
        cases.append((f"deep-inline-table-{depth}", f"x = {_deep_table(depth)}\n"))
    huge = "1" + "0" * 400
    cases += [
        ("huge-weight-decay", f"weight-decay = {huge}\n"),
        ("huge-input-range", f"input-range = [0, {huge}]\n"),
        ("huge-negative-input-range", f"input-range = [-{huge}, 0]\n"),
        ("huge-threshold", f"[rules.fan-in-norm]\nratio = {huge}\n"),
        ("huge-override", f'[[override]]\nlayers = "x"\nfan-in-norm = {{ ratio = {huge} }}\n'),
        ("huge-budget", f"[budget]\nexpansion-bytes = {huge}\n"),
        ("overlong-integer", "weight-decay = " + "9" * 5000 + "\n"),
        ("ignore-rule-list", '[[ignore]]\nrule = ["nonfinite"]\nreason = "x"\n'),
        ("ignore-rule-table", '[[ignore]]\nrule = { a = 1 }\nreason = "x"\n'),
        ("fail-on-list", "fail-on = [1, 2]\n"),
        ("fail-on-table", "fail-on = { a = 1 }\n"),
        ("frozen-int", "frozen = 3\n"),
        ("rules-not-table", "rules = 3\n"),
        ("rule-not-table", "[rules]\nnonfinite = 3\n"),
        ("severity-list", '[rules.nonfinite]\nseverity = ["error"]\n'),
        ("threshold-date", "[rules.fan-in-norm]\nratio = 1979-05-27\n"),
        ("override-not-array", "override = 1\n"),
        ("budget-not-table", "budget = 5\n"),
        ("budget-unknown-key", "[budget]\nmemory = 5\n"),
        ("budget-nan", "[budget]\nexpansion-bytes = nan\n"),
        ("budget-inf", "[budget]\nexpansion-bytes = inf\n"),
        ("budget-string", '[budget]\nexpansion-bytes = "lots"\n'),
        ("budget-below-floor", "[budget]\nload-seconds = 0.001\n"),
        ("not-utf8", "fail-on = '\xff'\n"),
        ("broken-toml", "fail-on = \n"),
    ]
    return cases


@pytest.mark.parametrize(("text"), [pytest.param(t, id=i) for i, t in _policies()])
def test_a_hostile_policy_file_is_one_line_exit_2(tmp_path: Path, model: Path, text: str) -> None:
    policy = tmp_path / "policy.toml"
    policy.write_bytes(text.encode("latin-1") if "\xff" in text else text.encode())
    result = runner.invoke(app, ["audit", str(model), "--policy", str(policy)])
    line = _one_line(result)
    assert "policy.toml" in line


@pytest.mark.parametrize(
    "text",
    [
        pytest.param("tool = 3\n", id="tool-int"),
        pytest.param('tool = "steelyard"\n', id="tool-string"),
        pytest.param("tool = [1]\n", id="tool-array"),
        pytest.param("[tool]\nsteelyard = 3\n", id="steelyard-int"),
        pytest.param("[tool.other]\nx = 1\n", id="no-steelyard-table"),
        pytest.param(f"[tool.steelyard]\nx = {_deep_array(3000)}\n", id="deep"),
        pytest.param("[tool.steelyard]\nweight-decay = 1" + "0" * 400 + "\n", id="huge-int"),
    ],
)
def test_a_hostile_pyproject_named_as_policy_is_one_line_exit_2(
    tmp_path: Path, model: Path, text: str
) -> None:
    project = tmp_path / "pyproject.toml"
    project.write_text(text)
    result = runner.invoke(app, ["audit", str(model), "--policy", str(project)])
    assert "pyproject.toml" in _one_line(result)


_FOREIGN_BROKEN = [
    pytest.param("tool = 3\n", id="tool-not-a-table"),
    pytest.param(f"[tool.black]\nx = {_deep_array(5000)}\n", id="deep-nesting"),
    pytest.param("[project]\nversion = 1" + "0" * 5000 + "\n", id="overlong-integer"),
    pytest.param("[project\nname = \n", id="broken-syntax"),
]


@pytest.mark.parametrize("text", _FOREIGN_BROKEN)
def test_a_broken_pyproject_without_our_table_in_a_parent_folder_does_not_break_the_run(
    tmp_path: Path, model: Path, text: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Someone else's broken project file above the working folder: we never need it.
    (tmp_path / "pyproject.toml").write_text(text)
    work = tmp_path / "a" / "b"
    work.mkdir(parents=True)
    monkeypatch.chdir(work)
    result = runner.invoke(app, ["audit", str(model), "-f", "json"])
    assert result.exit_code == 0, (result.stderr, result.exception)
    assert json.loads(result.stdout)["policy"]["source"] == "built-in defaults"


@pytest.mark.parametrize(
    "text",
    [
        pytest.param(f"[tool.steelyard]\nfrozen = {_deep_array(5000)}\n", id="deep-nesting"),
        pytest.param("[tool.steelyard]\nweight-decay = 1" + "0" * 400 + "\n", id="huge-int"),
        pytest.param("[tool.steelyard]\nfail-on = \n", id="broken-syntax"),
        pytest.param("[[tool.steelyard.ignore]]\nrule = [1]\nreason = 'x'\n", id="wrong-type"),
        pytest.param('tool.steelyard.fail-on = "error"\ntool = 3\n', id="dotted-and-broken"),
    ],
)
def test_a_broken_pyproject_that_holds_our_table_is_one_line_exit_2(
    tmp_path: Path, model: Path, text: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    (tmp_path / "pyproject.toml").write_text(text)
    work = tmp_path / "a"
    work.mkdir()
    monkeypatch.chdir(work)
    result = runner.invoke(app, ["audit", str(model)])
    assert "pyproject.toml" in _one_line(result)


# --- hostile baselines --------------------------------------------------------------------


def _finding(**fields: object) -> dict[str, object]:
    return {"id": "0123456789abcdef", "rule": "nonfinite", "checkpoint": "model", **fields}


def _baselines() -> list[tuple[str, str]]:
    cases: list[tuple[str, str]] = []
    for depth in (900, 5_000, 200_000):
        nested = "[" * depth + "]" * depth
        # Deep nesting in a field that reports show again (the "fixed" list), in the findings
        # list itself, and in the schema.
        cases.append(
            (
                f"deep-units-{depth}",
                '{"schema": "steelyard.baseline/1", "findings": [{"id": "a", "rule": "b", '
                f'"checkpoint": "model", "units": {nested}}}]}}',
            )
        )
        cases.append((f"deep-findings-{depth}", '{"schema": "steelyard.baseline/1", "findings": ' + nested + "}"))
        cases.append((f"deep-schema-{depth}", '{"schema": ' + nested + "}"))
    wrong = [
        ("layer-int", _finding(layer=5)),
        ("tensor-list", _finding(tensor=["x"])),
        ("units-string", _finding(units="0-3")),
        ("units-table", _finding(units={"a": 1})),
        ("units-floats", _finding(units=[0.5])),
        ("units-negative", _finding(units=[-1])),
        ("units-bools", _finding(units=[True])),
        ("id-int", _finding(id=5)),
        ("rule-null", _finding(rule=None)),
        ("checkpoint-int", _finding(checkpoint=3)),
    ]
    for name, item in wrong:
        cases.append((name, json.dumps({"schema": "steelyard.baseline/1", "findings": [item]})))
    cases += [
        ("findings-table", '{"schema": "steelyard.baseline/1", "findings": {"a": 1}}'),
        ("audits-string", '{"schema": "steelyard.audit-set/1", "audits": "x"}'),
        ("schema-int", '{"schema": 1}'),
        ("top-level-list", "[1, 2]"),
        ("not-utf8", '{"schema": "\xff"}'),
    ]
    return cases


@pytest.mark.parametrize(
    ("text", "fmt"),
    # Both renderers that show baseline entries again, alternately (each case is cheap to
    # generate but a run costs an audit).
    [pytest.param(t, ("json", "table")[n % 2], id=i) for n, (i, t) in enumerate(_baselines())],
)
def test_a_hostile_baseline_is_one_line_exit_2(
    tmp_path: Path, model: Path, text: str, fmt: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Before: deep "units" in an entry passed validation and crashed the JSON renderer with a
    # RecursionError traceback (exit 1); wrong types reached the renderers.
    monkeypatch.chdir(tmp_path)
    baseline = tmp_path / "baseline.json"
    baseline.write_bytes(text.encode("latin-1") if "\xff" in text else text.encode())
    result = runner.invoke(app, ["audit", model.name, "--baseline", baseline.name, "-f", fmt])
    assert "baseline.json" in _one_line(result)


def test_a_baseline_written_by_steelyard_still_matches(
    tmp_path: Path, model: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # The control: a baseline written by steelyard itself goes through the same side-file
    # reader and its validation, and still works.
    monkeypatch.chdir(tmp_path)
    written = runner.invoke(app, ["audit", model.name, "--write-baseline", "b.json", "--fail-on", "never"])
    assert written.exit_code == 0, written.stderr
    used = runner.invoke(app, ["audit", model.name, "--baseline", "b.json", "-f", "json"])
    assert used.exit_code == 0, used.stderr
    assert json.loads(used.stdout)["baseline"]["path"] == "b.json"
