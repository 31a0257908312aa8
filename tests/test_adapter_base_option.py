"""``audit --base``: LoRA/DoRA adapters of a run are audited merged onto their base model.

The reference is peft's own merge (``merge_and_unload``), saved beside each fixture by
``fixtures/gen_adapters.py`` (peft 0.21.2): the fan-in norms the merged audit reports must be
those of peft's merged weights.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
from click.testing import CliRunner
from safetensors.numpy import load_file

from steelyard.cli import app

FIXTURES = Path(__file__).resolve().parents[1] / "fixtures" / "adapters"


def _audit(*args: str) -> tuple[int, dict[str, object], str]:
    result = CliRunner().invoke(app, ["audit", *args, "-f", "json", "--quiet"])
    document = json.loads(result.stdout) if result.stdout.strip().startswith("{") else {}
    return result.exit_code, document, result.stderr


def test_base_merges_the_adapter_and_reports_peft_merged_norms() -> None:
    code, document, _ = _audit(str(FIXTURES / "lora_mlp"), "--base", str(FIXTURES / "base_mlp"))
    assert code in (0, 1)
    merged = load_file(str(FIXTURES / "lora_mlp.merged.safetensors"))
    layers = {layer["name"]: layer for layer in document["layers"]}  # type: ignore[union-attr]
    weight = merged["fc1.weight"].astype(np.float64)
    norms = np.linalg.norm(weight, axis=1)
    reported = layers["fc1"]["fan_in_norm"]
    # Fan-in norm of each unit = L2 norm of its incoming weights (common practice, no source).
    assert abs(reported["max"] - norms.max()) < 1e-5 * norms.max()
    assert abs(reported["median"] - np.median(norms)) < 1e-5 * norms.max()
    assert any("merged onto the base" in note for note in document["notes"])  # type: ignore[union-attr]


def test_base_is_never_audited_as_a_checkpoint_of_its_own(tmp_path: Path) -> None:
    # The base sits inside the audited folder: it is a side input, listed as skipped.
    import shutil

    shutil.copytree(FIXTURES / "lora_mlp", tmp_path / "lora_mlp")
    shutil.copytree(FIXTURES / "base_mlp", tmp_path / "base_mlp")
    result = CliRunner().invoke(
        app,
        ["audit", str(tmp_path), "--base", str(tmp_path / "base_mlp"), "-f", "json", "--quiet"],
    )
    document = json.loads(result.stdout)
    audited = [a["checkpoint"]["path"] for a in document["audits"]]
    assert len(audited) == 1 and "lora_mlp" in audited[0]
    skipped = {s["path"]: s["reason"] for s in document["skipped"]}
    assert skipped[str(tmp_path / "base_mlp")] == "the --base model of this run"


def test_a_base_that_no_adapter_uses_is_an_input_error() -> None:
    code, _, stderr = _audit(str(FIXTURES / "base_mlp"), "--base", str(FIXTURES / "base_mlp"))
    assert code == 2
    lines = [line for line in stderr.splitlines() if line.strip()]
    assert len(lines) == 1 and "no checkpoint of this run is an adapter" in lines[0]
