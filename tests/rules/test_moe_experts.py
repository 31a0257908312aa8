"""``moe-experts``: recall on the trained MoE decoder (stacked, per-expert and GGUF layouts),
no finding on its clean copy, and random MoE blocks of several shapes.

The planted experts are listed in fixtures/transformers_heads/moe_decoder/planted.json (written
by fixtures/gen_transformer_heads.py, which trained ``transformers.MixtralForCausalLM``); the
sampled cosine is checked against the exact cosine computed with numpy on the whole weights.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from safetensors.numpy import save_file

from steelyard.api import audit
from steelyard.policy import Policy
from steelyard.rules.moe_experts import _measure
from tests.transformer.test_structure import HEADS, legacy_experts

RULE = "moe-experts"
MOE = HEADS / "moe_decoder"


def _found(path: Path, policy: Policy | None = None) -> list[Any]:
    return [f for f in audit(path, policy=policy).audits[0].findings if f.rule == RULE]


def _kinds(findings: list[Any]) -> set[tuple[str, str, tuple[int, ...]]]:
    return {
        ("twin", f.evidence["block"], tuple(f.evidence["experts"])) if "experts" in f.evidence
        else ("idle", f.evidence["block"], (f.evidence["expert"],))
        for f in findings
    }


def _planted(rename: Any = lambda b: b) -> set[tuple[str, str, tuple[int, ...]]]:
    record = json.loads((MOE / "planted.json").read_text())
    return {("idle", rename(p["block"]), (p["expert"],)) for p in record["idle_experts"]} | {
        ("twin", rename(p["block"]), tuple(p["experts"])) for p in record["twin_experts"]
    }


def test_planted_experts_are_found_in_stacked_tensors() -> None:
    found = _found(MOE / "planted")
    assert _kinds(found) == _planted()
    for f in found:
        assert f.units == () and f.part.startswith("expert") and f.layer.endswith(".gate")


def test_planted_experts_are_found_in_per_expert_modules(tmp_path: Path) -> None:
    folder = legacy_experts(MOE / "planted", tmp_path / "legacy")
    assert _kinds(_found(folder)) == _planted(lambda b: b.replace(".mlp", ".block_sparse_moe"))
    assert _found(legacy_experts(MOE / "clean", tmp_path / "legacy-clean")) == []


def test_planted_experts_are_found_in_gguf() -> None:
    assert _kinds(_found(MOE / "planted.gguf")) == _planted(lambda b: "blk." + b.split(".")[2] + ".ffn")
    assert _found(MOE / "clean.gguf") == []


def test_clean_copy_has_no_expert_findings() -> None:
    assert _found(MOE / "clean") == []


def test_evidence_has_fan_in_norms_and_nearest_expert() -> None:
    idle = next(f for f in _found(MOE / "planted") if "expert" in f.evidence)
    assert set(idle.evidence["fan_in"]) == {"gate_up", "down"}
    assert idle.evidence["router_norm"] < 0.05 * idle.evidence["median_router_norm"]


def test_sampled_cosine_matches_the_exact_cosine() -> None:
    rng = np.random.default_rng(3)
    a = rng.standard_normal((300, 400)).astype(np.float32)
    b = (0.7 * a + 0.3 * rng.standard_normal((300, 400))).astype(np.float32)
    exact = float(np.sum(a.astype(np.float64) * b) / np.linalg.norm(a) / np.linalg.norm(b))
    sa, sb = _measure(a, 65536).sample, _measure(b, 65536).sample
    assert sa.size == 65536
    assert float(sa @ sb / np.linalg.norm(sa) / np.linalg.norm(sb)) == pytest.approx(exact, abs=0.01)


def test_thresholds_are_policy_keys() -> None:
    assert _kinds(_found(MOE / "planted", Policy(rules={RULE: {"idle-share": 0.0}}))) == {
        k for k in _planted() if k[0] == "twin"
    }
    assert _found(MOE / "planted", Policy(rules={RULE: {"twin-cosine": 1.0, "idle-share": 0.0}})) == []


@pytest.mark.parametrize(("experts", "inner", "seed"), [(8, 24, 0), (6, 40, 1), (16, 8, 2)])
def test_random_moe_blocks(tmp_path: Path, experts: int, inner: int, seed: int) -> None:
    rng = np.random.default_rng(seed)
    width = 32
    tensors: dict[str, np.ndarray] = {}
    block = "model.layers.0.mlp"
    for e in range(experts):
        for leaf, shape in (("gate_proj", (inner, width)), ("up_proj", (inner, width)), ("down_proj", (width, inner))):
            tensors[f"{block}.experts.{e}.{leaf}.weight"] = rng.standard_normal(shape).astype(np.float32)
    tensors[f"{block}.gate.weight"] = rng.standard_normal((experts, width)).astype(np.float32)
    for leaf in ("gate_proj", "up_proj", "down_proj"):  # a shared expert: never judged
        tensors[f"{block}.shared_expert.{leaf}.weight"] = np.zeros_like(tensors[f"{block}.experts.0.{leaf}.weight"])
    twin, copy, idle = (int(x) for x in rng.choice(experts, 3, replace=False))
    for leaf in ("gate_proj", "up_proj", "down_proj"):
        source = tensors[f"{block}.experts.{twin}.{leaf}.weight"]
        tensors[f"{block}.experts.{copy}.{leaf}.weight"] = source + 1e-3 * rng.standard_normal(source.shape).astype(np.float32)
        tensors[f"{block}.experts.{idle}.{leaf}.weight"] *= 1e-3
    tensors[f"{block}.gate.weight"][idle] *= 1e-3
    folder = tmp_path / "m"
    folder.mkdir()
    save_file(tensors, str(folder / "model.safetensors"))
    (folder / "config.json").write_text(json.dumps({"model_type": "qwen2_moe", "num_experts": experts, "hidden_size": width}))
    assert _kinds(_found(folder)) == {("twin", block, tuple(sorted((twin, copy)))), ("idle", block, (idle,))}


def test_findings_do_not_depend_on_jobs() -> None:
    # Blocks are judged by whichever thread reads their last matrix; finish yields them in
    # block order, so the report is the same with one thread or several.
    one = audit(MOE / "planted", jobs=1).audits[0].findings
    two = audit(MOE / "planted", jobs=2).audits[0].findings
    assert [(f.rule, f.part, f.layer, f.score) for f in one] == [(f.rule, f.part, f.layer, f.score) for f in two]
    assert {f.rule for f in one} >= {"moe-experts", "head-circuits"}
