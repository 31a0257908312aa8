"""Packed checkpoints through the command line: the stored type in reports, and hostile
packed files (lying shapes, bit widths, group counts, quant states, truncation) refused with
exit 2 and one line naming the file, before anything large is allocated."""

from __future__ import annotations

import json
import os
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from steelyard.cli import app

from . import _reference as ref

runner = CliRunner()
M = "model.layers.0.self_attn.q_proj"
H = "lm_head"


def _folder(tmp_path: Path) -> Path:
    """A small mixed checkpoint: a GPTQ layer feeding nothing, a float head."""
    rng = np.random.default_rng(0)
    parts, _ = ref.gptq(rng, 4, 16, 32, 16, act=True)
    head = rng.normal(size=(12, 16)).astype(np.float32)
    config = {"quantization_config": {"quant_method": "gptq", "bits": 4, "group_size": 16}}
    return ref.save(tmp_path / "model.safetensors", {**ref.prefixed(M, parts),
                                                      f"{H}.weight": head}, config)


def test_layers_and_audit_report_the_stored_type(tmp_path: Path) -> None:
    path = _folder(tmp_path)
    table = runner.invoke(app, ["layers", str(path)], env={"COLUMNS": "200"})
    assert table.exit_code == 0, table.stderr
    assert "stored as" in table.stdout and "gptq-int4" in table.stdout
    assert "qweight" not in table.stdout.split("coverage")[0]  # no part is a layer
    for command in (["layers", str(path), "--format", "json"],
                    ["audit", str(path), "--format", "json", "--fail-on", "never"]):
        result = runner.invoke(app, command)
        assert result.exit_code == 0, result.stderr
        layers = {entry["name"]: entry for entry in json.loads(result.stdout)["layers"]}
        assert set(layers) == {M, H}
        assert layers[M]["stored_type"] == "gptq-int4" and layers[M]["units"] == 16
        assert "stored_type" not in layers[H]  # float weights: entry unchanged
    document = json.loads(runner.invoke(app, ["audit", str(path), "-f", "json",
                                              "--fail-on", "never"]).stdout)
    assert document["checkpoint"]["parameters"] == 16 * 32 + 12 * 16


def _gptq(tmp_path: Path, change: Callable[[dict[str, np.ndarray]], None] | None = None,
          config: dict | None = None) -> Path:
    parts, _ = ref.gptq(np.random.default_rng(1), 4, 16, 32, 16, act=False)
    if change:
        change(parts)
    return ref.save(tmp_path / "model.safetensors", ref.prefixed(M, parts), config)


def _bnb4(tmp_path: Path, state: dict | None = None, raw_state: bytes | None = None,
          change: Callable[[dict[str, np.ndarray]], None] | None = None) -> Path:
    parts, _ = ref.bnb4(np.random.default_rng(2), 8, 16, 64, "nf4", nested=False)
    key = "weight.quant_state.bitsandbytes__nf4"
    if state is not None:
        raw_state = json.dumps(state).encode()
    if raw_state is not None:
        parts[key] = np.frombuffer(raw_state, np.uint8).copy()
    if change:
        change(parts)
    return ref.save(tmp_path / "model.safetensors", ref.prefixed(M, parts))


def _pack_quantized(tmp_path: Path, shape: list[int]) -> Path:
    parts, _ = ref.pack_quantized(np.random.default_rng(3), 4, 6, 32, 16, symmetric=True)
    parts["weight_shape"] = np.array(shape, np.int64)
    return ref.save(tmp_path / "model.safetensors", ref.prefixed(M, parts))


def _set(key: str, value: np.ndarray) -> Callable[[dict[str, np.ndarray]], None]:
    def change(parts: dict[str, np.ndarray]) -> None:
        parts[key] = value
    return change


HOSTILE: dict[str, tuple[Callable[[Path], Path], str]] = {
    "gptq scales wider than qweight": (
        lambda d: _gptq(d, _set("scales", np.ones((2, 17), np.float16))), "shapes"),
    "gptq 5-bit declared": (
        lambda d: _gptq(d, config={"quantization_config": {"quant_method": "gptq", "bits": 5}}),
        "bit width 5"),
    "gptq 3-bit declared over 4-bit words": (
        lambda d: _gptq(d, config={"quantization_config": {"quant_method": "gptq", "bits": 3}}),
        "does not fit"),
    "gptq marlin checkpoint format": (
        lambda d: _gptq(d, config={"quantization_config": {
            "quant_method": "gptq", "checkpoint_format": "marlin"}}), "checkpoint format"),
    "gptq g_idx past the groups": (
        lambda d: _gptq(d, _set("g_idx", np.full(32, 1000, np.int32))), "g_idx"),
    "gptq qweight truncated to fewer inputs": (
        lambda d: _gptq(d, lambda p: p.update(qweight=p["qweight"][:2])), "bit width"),
    "gptq huge group count declared": (
        lambda d: _gptq(d, lambda p: p.pop("g_idx"),
                        {"quantization_config": {"quant_method": "gptq", "group_size": 1}}),
        "group size"),
    "awq group size that does not divide": (
        lambda d: ref.save(d / "model.safetensors", ref.prefixed(
            M, ref.awq(np.random.default_rng(4), 16, 64, 16)[0]),
            {"quantization_config": {"quant_method": "awq", "group_size": 48}}), "divide"),
    "awq 8-bit declared": (
        lambda d: ref.save(d / "model.safetensors", ref.prefixed(
            M, ref.awq(np.random.default_rng(4), 16, 64, 16)[0]),
            {"quantization_config": {"quant_method": "awq", "bits": 8}}), "bit width 8"),
    "fp8 scale for the wrong number of rows": (
        lambda d: ref.save(d / "model.safetensors", ref.prefixed(M, {
            **ref.fp8(np.random.default_rng(5), 6, 4, "tensor")[0],
            "weight_scale": np.ones((7,), np.float32)})), "scale shape"),
    "mlx shapes that fit no default without config": (
        lambda d: ref.save(d / "model.safetensors", ref.prefixed(
            M, ref.mlx(np.random.default_rng(6), 4, 4, 64, 16)[0])), "config.json"),
    "bnb4 astronomical shape": (
        lambda d: _bnb4(d, {"quant_type": "nf4", "blocksize": 64, "dtype": "bfloat16",
                            "shape": [2**31, 2**31]}), "element budget"),
    "bnb4 absmax count lies": (
        lambda d: _bnb4(d, change=_set("weight.absmax", np.ones(3, np.float32))), "absmax"),
    "bnb4 quant state is not JSON": (lambda d: _bnb4(d, raw_state=b"\xff{garbage"), "JSON"),
    "bnb4 quant_map is not nf4": (
        lambda d: _bnb4(d, change=_set("weight.quant_map", np.linspace(-1, 1, 16,
                                                                        dtype=np.float32))),
        "quant_map"),
    "llm.int8 tile layout": (
        lambda d: ref.save(d / "model.safetensors", ref.prefixed(M, {
            **ref.bnb8(np.random.default_rng(7), 4, 6)[0],
            "weight_format": np.array([2], np.uint8)})), "tile"),
    "pack-quantized astronomical weight_shape": (
        lambda d: _pack_quantized(d, [2**40, 2**20]), "element budget"),
    "pack-quantized weight_shape wider than the packed words": (
        lambda d: _pack_quantized(d, [6, 33]), "does not hold"),
}


@pytest.mark.parametrize("case", sorted(HOSTILE))
def test_hostile_packed_file_is_one_line_exit_2(tmp_path: Path, case: str) -> None:
    make, words = HOSTILE[case]
    path = make(tmp_path)
    result = runner.invoke(app, ["audit", str(path)])
    assert result.exit_code == 2, (result.stdout, result.stderr, result.exception)
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in result.stderr, result.stderr
    assert str(path) in lines[0] and words in lines[0], lines[0]


def test_truncated_packed_file_is_one_line_exit_2(tmp_path: Path) -> None:
    path = _gptq(tmp_path)
    data = path.read_bytes()
    path.write_bytes(data[:-40])
    result = runner.invoke(app, ["layers", str(path)])
    assert result.exit_code == 2
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and str(path) in lines[0]


def test_malformed_config_is_named(tmp_path: Path) -> None:
    path = _gptq(tmp_path)
    (tmp_path / "config.json").write_text("{not json")
    result = runner.invoke(app, ["layers", str(path)])
    assert result.exit_code == 2
    assert "config.json" in result.stderr and len(result.stderr.strip().splitlines()) == 1


def test_a_linked_config_outside_the_folder_is_never_read(tmp_path: Path) -> None:
    # A config reached through a link counts as absent (the project's confinement rule):
    # the one outside claims 8 bits, which these shapes refute, so reading it would fail.
    outside = tmp_path / "elsewhere"
    outside.mkdir()
    (outside / "config.json").write_text(json.dumps(
        {"quantization_config": {"quant_method": "gptq", "bits": 8}}))
    model = tmp_path / "model"
    path = _gptq(model)
    os.symlink(outside / "config.json", model / "config.json")
    result = runner.invoke(app, ["layers", str(path), "--format", "json"])
    assert result.exit_code == 0, result.stderr
    assert json.loads(result.stdout)["layers"][0]["stored_type"] == "gptq-int4"
