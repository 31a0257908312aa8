"""``steelyard timeline`` on the command line: exit codes, one-line errors, the JSON document
against its schema (validated by the ``jsonschema`` package), and the table."""

from __future__ import annotations

import json
from pathlib import Path

import jsonschema
import numpy as np
import pytest
from click.testing import CliRunner
from safetensors.numpy import save_file

from steelyard.cli import app
from tests.conftest import FIXTURES, REPO
from tests.timeline._runs import CONV, write_run

runner = CliRunner()
RUN = FIXTURES / "timeline_run"
SCHEMA = json.loads((REPO / "docs" / "schemas" / "steelyard.timeline-1.schema.json").read_text())


def _one_line_error(result: object, *needles: str) -> None:
    assert result.exit_code == 2, result.output  # type: ignore[attr-defined]
    lines = result.stderr.strip().splitlines()  # type: ignore[attr-defined]
    assert len(lines) == 1, lines
    assert lines[0].startswith("steelyard: error: ")
    assert "Traceback" not in result.output  # type: ignore[attr-defined]
    for needle in needles:
        assert needle in lines[0]
    assert result.stdout == ""  # type: ignore[attr-defined]


def test_json_validates_against_the_schema(tmp_path: Path) -> None:
    jsonschema.Draft202012Validator.check_schema(SCHEMA)  # reference: JSON Schema 2020-12
    result = runner.invoke(app, ["timeline", str(RUN), "--format", "json", "--fail-on", "never"])
    assert result.exit_code == 0, result.output
    document = json.loads(result.stdout)
    jsonschema.validate(document, SCHEMA, cls=jsonschema.Draft202012Validator)
    # Every per-layer series is aligned with the checkpoints.
    for layer in document["layers"]:
        assert all(len(v) == len(document["checkpoints"]) for v in layer["series"].values())
    # The schema is strict enough to refuse a document with a field missing or mistyped.
    broken = json.loads(result.stdout)
    del broken["layers"][0]["series"]["dead_units"]
    with pytest.raises(jsonschema.ValidationError):
        jsonschema.validate(broken, SCHEMA, cls=jsonschema.Draft202012Validator)
    broken = json.loads(result.stdout)
    broken["findings"][0]["appeared"] = "600"
    with pytest.raises(jsonschema.ValidationError):
        jsonschema.validate(broken, SCHEMA, cls=jsonschema.Draft202012Validator)


def test_json_of_a_generated_run_with_absent_layers_validates(tmp_path: Path) -> None:
    def edit(step: int, tensors: dict[str, np.ndarray]) -> None:
        if step == 2:
            tensors["late.weight"] = np.full((3, 5), np.nan, np.float32)

    write_run(tmp_path, [1, 2, 3], shapes=CONV, edit=edit)
    out = tmp_path / "timeline.json"
    result = runner.invoke(app, ["timeline", str(tmp_path), "-f", "json", "-o", str(out), "-q"])
    assert result.exit_code == 1  # the NaN layer is an error present at the end
    document = json.loads(out.read_text())
    jsonschema.validate(document, SCHEMA, cls=jsonschema.Draft202012Validator)
    (late,) = [layer for layer in document["layers"] if layer["name"] == "late"]
    assert late["present"] == [False, True, True]
    assert late["series"]["fan_in_norm_median"] == [None, None, None]


def test_gate_exit_codes() -> None:
    assert runner.invoke(app, ["timeline", str(RUN)]).exit_code == 1  # NaN at the end
    assert runner.invoke(app, ["timeline", str(RUN), "--fail-on", "never"]).exit_code == 0


def test_a_healthy_run_passes(tmp_path: Path) -> None:
    write_run(tmp_path, [1, 2, 3])
    result = runner.invoke(app, ["timeline", str(tmp_path), "--fail-on", "warning"])
    assert result.exit_code == 0, result.output


def test_table_shows_the_planted_steps() -> None:
    result = runner.invoke(app, ["timeline", str(RUN), "--fail-on", "never"], env={"COLUMNS": "160"})
    assert result.exit_code == 0
    rows = {line.split()[0]: line for line in result.stdout.splitlines() if line.strip()}
    assert "0→3 @600" in rows["fc1"] and "dead-unit@600" in rows["fc1"]
    assert "0→1 @1000" in rows["fc2"] and "nonfinite@1000" in rows["fc2"]
    assert "weight health only" in result.stdout  # the caution


def test_order_override_on_the_command_line(tmp_path: Path) -> None:
    write_run(tmp_path, [1, 2], folder="final-{step}", trainer_state=False)
    missing = runner.invoke(app, ["timeline", str(tmp_path)])
    _one_line_error(missing, "no training step found", "--order")
    given = runner.invoke(app, ["timeline", str(tmp_path), "--order", "name", "-f", "json"])
    assert given.exit_code == 0, given.output
    document = json.loads(given.stdout)
    assert document["order"] == "name"
    assert [c["step"] for c in document["checkpoints"]] == [None, None]


def test_fewer_than_two_checkpoints(tmp_path: Path) -> None:
    (path,) = write_run(tmp_path, [5])
    _one_line_error(runner.invoke(app, ["timeline", str(path)]), str(path), "at least two")


def test_missing_and_unreadable_inputs(tmp_path: Path) -> None:
    paths = write_run(tmp_path, [1, 2])
    _one_line_error(
        runner.invoke(app, ["timeline", str(paths[0]), str(tmp_path / "nope.safetensors")]),
        "nope.safetensors",
        "does not exist",
    )
    broken = tmp_path / "checkpoint-3" / "model.safetensors"
    broken.parent.mkdir()
    broken.write_bytes(b"\x10\x00\x00\x00\x00\x00\x00\x00{not json}      ")
    _one_line_error(runner.invoke(app, ["timeline", *map(str, paths), str(broken)]), str(broken))


def test_layer_sets_that_share_nothing(tmp_path: Path) -> None:
    write_run(tmp_path / "a", [1])
    other = tmp_path / "b" / "checkpoint-2"
    other.mkdir(parents=True)
    save_file({"enc.weight": np.ones((4, 4), np.float32)}, str(other / "model.safetensors"))
    result = runner.invoke(app, ["timeline", str(tmp_path)])
    _one_line_error(result, "shares no layer")


def test_unknown_order_is_a_usage_error(tmp_path: Path) -> None:
    result = runner.invoke(app, ["timeline", str(RUN), "--order", "mtime"])
    assert result.exit_code == 2


def test_api_function_survives_importing_the_engine() -> None:
    # steelyard.timeline is the API function; the engine package has another name so that
    # importing it cannot replace the function on the package (as steelyard.comparison).
    import steelyard
    import steelyard.run_timeline.engine

    assert callable(steelyard.timeline)
    assert steelyard.timeline.__module__ == "steelyard.api"


def test_api_takes_one_run_folder_or_a_list() -> None:
    import steelyard
    from steelyard.policy import Policy

    one = steelyard.timeline(RUN, policy=Policy(), created="2026-01-01T00:00:00Z")
    listed = steelyard.timeline([str(RUN)], policy=Policy(), created="2026-01-01T00:00:00Z")
    assert one.to_json() == listed.to_json()
    assert len(one.checkpoints) == 12
