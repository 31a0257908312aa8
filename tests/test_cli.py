"""The command line: exit codes, streams and one-line errors (click's CliRunner and a real
subprocess)."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest
from click.testing import CliRunner

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
        "activation", "norm", "inputs_from", "linked_by", "unit_groups",
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
    # The default identity is BLAKE3 (256-bit: 64 hex digits), and no SHA-256 beside it.
    assert len(document["checkpoint"]["blake3"]) == 64 and "sha256" not in document["checkpoint"]
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


# --- budgets, sidecar shapes -----------------------------------------------------------------


def _record_budget(monkeypatch: pytest.MonkeyPatch) -> list[object]:
    """Make api's loader record the budget in force when it is called."""
    from steelyard import api, budget

    seen: list[object] = []
    real = api._load

    def recording(path: object) -> object:
        seen.append(budget.current())
        return real(path)  # type: ignore[arg-type]

    monkeypatch.setattr(api, "_load", recording)
    return seen


def test_budget_option_and_policy_table_set_the_budget_readers_see(
    healthy_file: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    from steelyard.budget import Budget

    seen = _record_budget(monkeypatch)
    policy = tmp_path / "p.toml"
    policy.write_text('[budget]\nexpansion-bytes = "1G"\nload-seconds = 30\n')
    result = runner.invoke(
        app, ["audit", str(healthy_file), "--policy", str(policy), "--budget", "layer-units=4096"]
    )
    assert result.exit_code == 0, result.stderr
    assert seen and all(b == Budget(expansion_bytes=2**30, load_seconds=30.0, layer_units=4096) for b in seen)
    seen.clear()
    # --budget wins over the policy's table; sizes accept suffixes.
    runner.invoke(app, ["compare", str(healthy_file), str(healthy_file), "--policy", str(policy),
                        "--budget", "expansion-bytes=512M"])
    assert seen and all(b.expansion_bytes == 512 * 2**20 and b.load_seconds == 30.0 for b in seen)  # type: ignore[attr-defined]
    seen.clear()
    runner.invoke(app, ["layers", str(healthy_file), "--budget", "tensor-elements=1000"])
    assert seen and all(b.tensor_elements == 1000 for b in seen)  # type: ignore[attr-defined]


@pytest.mark.parametrize(
    "pair", ["memory=1G", "expansion-bytes", "expansion-bytes=inf", "load-seconds=0", "layer-units=lots"]
)
def test_a_bad_budget_option_is_one_line_exit_2(healthy_file: Path, pair: str) -> None:
    result = runner.invoke(app, ["audit", str(healthy_file), "--budget", pair])
    assert result.exit_code == 2, (result.stderr, result.exception)
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("steelyard: error:") and "budget" in lines[0]


def test_the_api_runs_under_the_budget_it_is_given(healthy_file: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    from steelyard import api
    from steelyard.budget import Budget, current

    seen = _record_budget(monkeypatch)
    chosen = Budget(layer_units=77)
    api.audit(healthy_file, budget=chosen)
    api.compare(healthy_file, healthy_file, budget=chosen)
    assert len(seen) >= 3 and all(b is chosen for b in seen)
    assert current() == Budget()  # restored afterwards


def _sidecar_run(tmp_path: Path, grads: dict[str, object]) -> object:
    import numpy as np

    from tests.conftest import write_safetensors

    rng = np.random.default_rng(8)
    model = write_safetensors(tmp_path / "m.safetensors", {
        "fc1.weight": rng.normal(size=(8, 4)).astype(np.float32),
        "fc2.weight": rng.normal(size=(3, 8)).astype(np.float32),
    })
    sidecar = write_safetensors(tmp_path / "m.grads.safetensors", grads)  # type: ignore[arg-type]
    return runner.invoke(app, ["audit", str(model), "--grads", str(sidecar), "-f", "json", "--fail-on", "never"])


@pytest.mark.parametrize("shape", [(4, 8), (2, 16), (32,), (8, 2, 2)])
def test_a_sidecar_tensor_of_another_shape_is_not_reshaped_onto_the_weights(
    tmp_path: Path, shape: tuple[int, ...]
) -> None:
    # Same element count as fc1.weight [8, 4], another shape: before, it was reshaped onto
    # the weights and silently used; now fc1 is not covered and the note says so.
    import numpy as np

    result = _sidecar_run(tmp_path, {
        "fc1.weight": np.ones(shape, np.float32),
        "fc2.weight": np.ones((3, 8), np.float32),
    })
    assert result.exit_code == 0, result.stderr  # type: ignore[attr-defined]
    notes = json.loads(result.stdout)["notes"]  # type: ignore[attr-defined]
    assert any("covers 1 of 2 layers" in n and "fc1" in n for n in notes), notes


def test_a_sidecar_matching_only_by_element_count_matches_no_layer(tmp_path: Path) -> None:
    import numpy as np

    result = _sidecar_run(tmp_path, {
        "fc1.weight": np.ones((2, 16), np.float32),
        "fc2.weight": np.ones((24,), np.float32),
    })
    assert result.exit_code == 2  # type: ignore[attr-defined]
    assert "matches no layer" in result.stderr and "shapes differ" in result.stderr  # type: ignore[attr-defined]


def test_a_sidecar_of_exactly_the_weight_shapes_covers_every_layer(tmp_path: Path) -> None:
    import numpy as np

    result = _sidecar_run(tmp_path, {
        "fc1.weight": np.ones((8, 4), np.float32),
        "fc2.weight": np.ones((3, 8), np.float32),
    })
    assert result.exit_code == 0, result.stderr  # type: ignore[attr-defined]
    document = json.loads(result.stdout)  # type: ignore[attr-defined]
    assert document["gradient_source"].startswith("rms gradients from")
    assert not any("covers" in n for n in document["notes"])
