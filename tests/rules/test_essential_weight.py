"""``essential-weight`` on the trained tiny transformers and on synthetic matrices, and how
``unsupported-weight`` and ``dead-unit`` respect it.

Sources: Yu et al. 2024, "The Super Weight in Large Language Models" (single scalar weights,
in early feed-forward down-projections, far outside their row and column, that the model
depends on); the leave-one-out bound: a weight counted in its own row's RMS can never exceed
√n RMS (Cauchy–Schwarz / Samuelson's inequality, Samuelson 1968).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from safetensors.numpy import save_file

from steelyard.checkpoint_audit import run_rules
from steelyard.findings import Finding, Severity
from steelyard.loaders import load
from steelyard.policy import Policy
from steelyard.rules.dead_unit import RULE as DEAD
from steelyard.rules.essential_weight import RULE, measure
from steelyard.rules.unsupported_weight import RULE as UNSUPPORTED
from tests.rules._training import audit

TOKENS = Path(__file__).resolve().parents[2] / "fixtures" / "transformers_tokens"


def _run(path: Path) -> list[Finding]:
    findings, _, _ = run_rules(load(path), Policy(), None, rules={RULE.name: RULE})
    return findings


@pytest.mark.parametrize("name", ["planted", "planted_tied"])
def test_the_planted_super_weight_is_found_at_its_position(name: str) -> None:
    planted = json.loads((TOKENS / name / "planted.json").read_text())["super_weight"]
    (finding,) = _run(TOKENS / name / "model.safetensors")
    assert finding.layer == planted["tensor"].removesuffix(".weight")
    assert finding.severity is Severity.INFO and finding.evidence["count"] == 1
    (weight,) = finding.evidence["weights"]
    assert (weight["unit"], weight["input"]) == (planted["row"], planted["column"])
    # Stored as bf16: 8 significant bits.
    assert weight["value"] == pytest.approx(planted["value"], rel=2**-7)


@pytest.mark.parametrize("name", ["clean", "clean_tied"])
def test_clean_copies_have_no_outlier_weights(name: str) -> None:
    assert _run(TOKENS / name / "model.safetensors") == []


def test_a_weight_counted_in_its_own_rms_could_never_pass_so_it_is_left_out() -> None:
    # With the weight in its row's RMS, |w|/RMS <= √n (= 11.3 for n = 128) however large w
    # is; the leave-one-out scale finds a 1000σ weight.
    matrix = np.random.default_rng(0).standard_normal((64, 128)).astype(np.float32)
    matrix[5, 17] = 1000.0
    found = measure(matrix, 20.0)
    assert found.positions == {(5, 17)}
    assert found.row_rms[0] == pytest.approx(np.sqrt((np.delete(matrix[5], 17) ** 2).mean()), rel=1e-5)
    assert found.column_rms[0] == pytest.approx(
        np.sqrt((np.delete(matrix[:, 17], 5) ** 2).mean()), rel=1e-5
    )


def _by_definition(matrix: np.ndarray, sigma: float) -> set[tuple[int, int]]:
    """Every (unit, input) meeting the page's two inequalities, w² ≥ σ²·(R_j − w²)/(n − 1)
    and w² ≥ σ²·(C_k − w²)/(m − 1), evaluated in float64 over every weight: the slow
    reference the rule's blocked scan (and its screening of blocks) must agree with."""
    wide = matrix.astype(np.float64)
    w2 = wide**2
    m, n = wide.shape
    rows = w2.sum(axis=1, keepdims=True)
    columns = w2.sum(axis=0, keepdims=True)
    s2 = sigma * sigma
    hit = (w2 * (n - 1) >= s2 * (rows - w2)) & (w2 * (m - 1) >= s2 * (columns - w2))
    hit &= np.isfinite(w2) & (w2 > 0)
    return {(int(u), int(k)) for u, k in zip(*np.nonzero(hit), strict=True)}


def _weights(kind: str, rows: int, cols: int, rng: np.random.Generator) -> np.ndarray:
    if kind == "gaussian":  # never trained: every other block is passed over
        out = rng.standard_normal((rows, cols))
    elif kind == "scaled-rows":  # trained-like: rows of lognormal scale, Student-t weights
        out = rng.standard_t(4, (rows, cols)) * np.exp(rng.normal(0, 0.7, (rows, 1)))
    else:  # gaussian with zero rows, a NaN row and spikes late in the layer
        out = rng.standard_normal((rows, cols))
        out[::7] = 0.0
        out[3, 5] = np.nan
    out = out.astype(np.float32)
    if kind != "gaussian":
        # Spikes in the first block (so the screening gives up after two) and in the last.
        for u in (1, rows // 2, rows - 2):
            out[u, (7 * u) % cols] = 60.0 * float(np.sqrt(np.nanmean(out[u + 1] ** 2)))
    return out


@pytest.mark.parametrize("kind", ["gaussian", "scaled-rows", "holes-and-spikes"])
@pytest.mark.parametrize("shape", [(64, 96), (1408, 512), (300, 4100)])
def test_the_blocked_scan_finds_exactly_what_the_definition_does(
    kind: str, shape: tuple[int, int]
) -> None:
    # The test as the rule's page writes it, over every weight in float64 (definition above).
    # Shapes from one block to many (1 MiB row blocks); the screening that passes over a
    # block whose largest weight is below all its row limits must never lose a weight.
    base = _weights(kind, *shape, np.random.default_rng(sum(shape)))
    for sigma in (6.0, 20.0):
        matrix = base.copy()
        if kind == "gaussian":
            # One weight only 2 % beyond both of its limits, in the first block: a screening
            # that skipped a block wrongly would lose it.
            u, k = 2, 3
            matrix[u, k] = 0.0
            rest = max(
                float(np.sqrt((matrix[u].astype(np.float64) ** 2).sum() / (shape[1] - 1))),
                float(np.sqrt((matrix[:, k].astype(np.float64) ** 2).sum() / (shape[0] - 1))),
            )
            matrix[u, k] = 1.02 * sigma * rest
        expected = _by_definition(matrix, sigma)
        assert expected  # the planted weights are there to be found
        assert measure(matrix, sigma).positions == expected


def test_zero_rows_hold_no_outlier_weight_and_are_not_candidates() -> None:
    # A pruned or never-written layer: most rows all zero. A zero weight is never an outlier
    # (its row limit is 0 and it does not exceed it); the rows with a real spike still count.
    # Before the fix every zero was a candidate, one Python step each (minutes per layer).
    matrix = np.zeros((512, 256), np.float32)
    matrix[7] = np.random.default_rng(2).standard_normal(256)
    matrix[7, 9] = 500.0
    matrix[300, 40] = 1.0  # a lone weight in an otherwise empty row
    found = measure(matrix, 20.0)
    assert (7, 9) in found.positions
    assert all(matrix[u, k] != 0 for u, k in found.positions)
    assert measure(np.zeros((512, 256), np.float32), 20.0).positions == frozenset()


def test_an_outlier_column_is_not_an_outlier_weight() -> None:
    # Every weight of column 3 is 50× the rest: far beyond its row, ordinary in its column.
    matrix = np.random.default_rng(1).standard_normal((64, 128)).astype(np.float32)
    matrix[:, 3] *= 50
    assert measure(matrix, 20.0).positions == frozenset()


def test_unsupported_weight_never_lists_an_essential_weight(tmp_path: Path) -> None:
    rng = np.random.default_rng(2)
    weights = {
        "fc1.weight": rng.uniform(-0.1, 0.1, (32, 64)).astype(np.float32),
        "fc2.weight": rng.uniform(-0.1, 0.1, (4, 32)).astype(np.float32),
    }
    support = {k: rng.uniform(0.5, 1.5, v.shape).astype(np.float32) for k, v in weights.items()}
    # Two large weights with almost no gradient: (5, 3) is moderate, (17, 10) a super weight.
    weights["fc1.weight"][5, 3] = 1.0
    weights["fc1.weight"][17, 10] = 8.0
    support["fc1.weight"][5, 3] = support["fc1.weight"][17, 10] = 1e-4
    save_file(weights, str(tmp_path / "model.safetensors"))
    save_file(support, str(tmp_path / "grads.safetensors"))
    findings = [
        f for f in audit(tmp_path / "model.safetensors", tmp_path / "grads.safetensors")
        if f.evidence.get("test") == "unsupported"
    ]
    (finding,) = findings
    assert [(w["unit"], w["input"]) for w in finding.evidence["top"]] == [(5, 3)]
    assert finding.evidence["essential_kept"] == 1 and finding.units == (5,)


def test_dead_unit_does_not_offer_a_unit_holding_an_essential_weight_for_pruning(
    tmp_path: Path,
) -> None:
    # A batch-norm-silenced unit (γ ≈ 0) whose row holds a super weight: dead by the silenced
    # test, but its row must not be advised away.
    rng = np.random.default_rng(5)
    w = rng.standard_normal((16, 32)).astype(np.float32)
    w[2, 7] = 200.0
    gamma = np.ones(16, np.float32)
    gamma[[2, 9]] = 0.0
    save_file(
        {
            "fc1.weight": w,
            "bn1.weight": gamma,
            "bn1.bias": np.zeros(16, np.float32),
            "fc2.weight": rng.standard_normal((4, 16)).astype(np.float32),
        },
        str(tmp_path / "model.safetensors"),
    )
    findings, _, _ = run_rules(load(tmp_path / "model.safetensors"), Policy(), None, rules={DEAD.name: DEAD})
    dead = [f for f in findings if f.layer == "fc1"]
    if not dead or 2 not in dead[0].units:
        pytest.skip("the layout gives fc1 no normalisation here; silenced test not applicable")
    assert dead[0].evidence["keep_essential"] == [2]
    assert "units 2 hold weights essential-weight marks: keep them" in dead[0].hint
    per_unit = dead[0].evidence["parameter_saving"] // (len(dead[0].units) - 1)
    assert dead[0].evidence["parameter_saving"] == per_unit * (len(dead[0].units) - 1)


def test_settings_are_policy_keys() -> None:
    assert set(RULE.thresholds) == {"sigma", "max-listed"}
    assert UNSUPPORTED.name == "unsupported-weight"
