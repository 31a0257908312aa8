"""``twin-units``: planted and trained twins, the merge, and the two searches.

References: the function a merge must preserve is checked with a plain numpy forward pass;
the blocked search against the full numpy Gram matrix; the hashed search against the exact
one. The L2 fact (an L2 penalty splits the weight of two identical features evenly, plain
gradient descent keeps their difference) is shown by training, not asserted by hand.
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
from steelyard.rules import _similarity
from steelyard.rules._rows import normalise
from steelyard.rules._similarity import (
    MEASURED_RECALL,
    candidate_pairs,
    exact_pairs,
)
from steelyard.rules.twin_units import RULE


def _write(folder: Path, tensors: dict[str, np.ndarray], act: str | None = "relu") -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "model.safetensors"
    save_file({k: np.ascontiguousarray(v, dtype=np.float32) for k, v in tensors.items()}, str(path))
    if act is not None:
        (folder / "config.json").write_text(json.dumps({"hidden_act": act}))
    return path


def _run(path: Path, policy: Policy | None = None) -> list[Finding]:
    findings, _, _ = run_rules(load(path), policy or Policy(), None, rules={RULE.name: RULE})
    return findings


def _mlp(
    rng: np.random.Generator, inputs: int = 6, hidden: int = 16, out: int = 4
) -> dict[str, np.ndarray]:
    return {
        "fc1.weight": rng.normal(size=(hidden, inputs)) / np.sqrt(inputs),
        "fc1.bias": 0.1 * rng.normal(size=hidden),
        "fc2.weight": rng.normal(size=(out, hidden)) / np.sqrt(hidden),
        "fc2.bias": 0.1 * rng.normal(size=out),
    }


def _forward(t: dict[str, np.ndarray], x: np.ndarray) -> np.ndarray:
    hidden = np.maximum(x @ t["fc1.weight"].T + t["fc1.bias"], 0.0)
    return hidden @ t["fc2.weight"].T + t["fc2.bias"]


def _apply_merge(t: dict[str, np.ndarray], finding: Finding) -> dict[str, np.ndarray]:
    """Drop each unit k, add s_k·u_k to the kept unit's columns, exactly as the evidence says."""
    keep = finding.evidence["merge"]["keep"]
    drop = finding.evidence["merge"]["drop"]
    w2 = t["fc2.weight"].astype(np.float64).copy()
    for k in drop:
        w2[:, keep] += finding.evidence["scale"][str(k)] * w2[:, k]
    rows = [j for j in range(t["fc1.weight"].shape[0]) if j not in drop]
    return {
        "fc1.weight": t["fc1.weight"][rows],
        "fc1.bias": t["fc1.bias"][rows],
        "fc2.weight": w2[:, rows],
        "fc2.bias": t["fc2.bias"],
    }


def _float32(t: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    return {k: v.astype(np.float32).astype(np.float64) for k, v in t.items()}


def test_planted_lopsided_twins_found_with_a_function_preserving_merge(tmp_path: Path) -> None:
    rng = np.random.default_rng(1)
    t = _mlp(rng)
    # Unit 9 is unit 3 scaled by 2 (ReLU is positively homogeneous: h9 = 2·h3), and the
    # consumer reads unit 3 strongly and unit 9 weakly: contributions u3 vs 2·u9 = 10:1.
    t["fc1.weight"][9] = 2.0 * t["fc1.weight"][3]
    t["fc1.bias"][9] = 2.0 * t["fc1.bias"][3]
    direction = rng.normal(size=4)
    t["fc2.weight"][:, 3] = direction
    t["fc2.weight"][:, 9] = 0.05 * direction
    findings = _run(_write(tmp_path, t))
    assert [f.units for f in findings] == [(3, 9)]
    found = findings[0]
    assert found.severity is Severity.WARNING and found.evidence["kind"] == "lopsided"
    assert found.evidence["merge"]["keep"] == 3 and found.evidence["merge"]["drop"] == [9]
    assert found.evidence["scale"]["9"] == pytest.approx(2.0, rel=1e-5)
    assert found.evidence["ratio"] == pytest.approx(10.0, rel=1e-4)
    # reference: numpy forward pass through ReLU, before and after the merge
    exact = _float32(t)
    merged = _apply_merge(exact, found)
    x = rng.normal(size=(500, 6))
    np.testing.assert_allclose(_forward(merged, x), _forward(exact, x), rtol=1e-9, atol=1e-9)
    # reference: parameter counts and squared norms of the two parameter sets, by numpy
    before = sum(v.size for v in exact.values())
    after = sum(v.size for v in merged.values())
    assert found.evidence["parameter_saving"] == before - after
    squares = sum(float((v**2).sum()) for k, v in exact.items() if k != "fc2.bias")
    squares_after = sum(float((v**2).sum()) for k, v in merged.items() if k != "fc2.bias")
    assert found.evidence["squared_norm_saving"] == pytest.approx(squares - squares_after, rel=1e-5)


def test_cancelling_twins(tmp_path: Path) -> None:
    rng = np.random.default_rng(2)
    t = _mlp(rng)
    t["fc1.weight"][11] = t["fc1.weight"][4]
    t["fc1.bias"][11] = t["fc1.bias"][4]
    column = 3.0 * rng.normal(size=4)
    t["fc2.weight"][:, 4] = column
    t["fc2.weight"][:, 11] = -0.9 * column  # the pair nets 0.1·column out of 1.9·|column|
    findings = _run(_write(tmp_path, t))
    assert [f.units for f in findings] == [(4, 11)]
    assert findings[0].evidence["kind"] == "cancelling"
    assert findings[0].evidence["cancelling_pair"] == [4, 11]
    merged = _apply_merge(_float32(t), findings[0])
    x = rng.normal(size=(200, 6))
    np.testing.assert_allclose(_forward(merged, x), _forward(_float32(t), x), atol=1e-9)


def test_evenly_split_twins_are_not_flagged(tmp_path: Path) -> None:
    rng = np.random.default_rng(3)
    t = _mlp(rng)
    t["fc1.weight"][7] = 0.5 * t["fc1.weight"][2]
    t["fc1.bias"][7] = 0.5 * t["fc1.bias"][2]
    column = rng.normal(size=4)
    t["fc2.weight"][:, 2] = column
    t["fc2.weight"][:, 7] = 1.5 * column  # contributions u2 and 0.5·u7 differ only 1:0.75
    assert _run(_write(tmp_path, t)) == []


def test_non_homogeneous_activation_needs_equal_norms(tmp_path: Path) -> None:
    rng = np.random.default_rng(4)
    t = _mlp(rng)
    t["fc1.weight"][9] = 2.0 * t["fc1.weight"][3]  # parallel but twice as long
    t["fc1.bias"][9] = 2.0 * t["fc1.bias"][3]
    t["fc1.weight"][12] = t["fc1.weight"][5]  # an exact twin
    t["fc1.bias"][12] = t["fc1.bias"][5]
    for a, b in ((3, 9), (5, 12)):
        t["fc2.weight"][:, b] = 0.01 * t["fc2.weight"][:, a]
    # gelu(2z) != 2·gelu(z): only the exact twin (5, 12) computes the same function.
    assert [f.units for f in _run(_write(tmp_path / "gelu", t, act="gelu"))] == [(5, 12)]
    assert {f.units for f in _run(_write(tmp_path / "relu", t, act="relu"))} == {(3, 9), (5, 12)}


def test_negative_twins_for_odd_and_identity_activations(tmp_path: Path) -> None:
    rng = np.random.default_rng(5)
    t = _mlp(rng)
    t["fc1.weight"][10] = -t["fc1.weight"][1]
    t["fc1.bias"][10] = -t["fc1.bias"][1]
    t["fc2.weight"][:, 10] = 0.02 * t["fc2.weight"][:, 1]
    # tanh is odd: tanh(−z) = −tanh(z), so unit 10 outputs −h1 and s = −1.
    tanh = _run(_write(tmp_path / "tanh", t, act="tanh"))
    assert [f.units for f in tanh] == [(1, 10)]
    assert tanh[0].evidence["scale"]["10"] == pytest.approx(-1.0)
    # ReLU is not odd: relu(−z) ≠ −relu(z), no twin.
    assert _run(_write(tmp_path / "relu", t, act="relu")) == []
    # Identity (the up_proj leaf is linear by the naming convention): any signed scale.
    ident = {k.replace("fc1", "up_proj").replace("fc2", "down_proj"): v for k, v in t.items()}
    ident["up_proj.weight"][10] *= 3.0
    ident["up_proj.bias"][10] *= 3.0
    found = _run(_write(tmp_path / "identity", ident, act="relu"))
    assert [f.units for f in found] == [(1, 10)]
    assert found[0].evidence["scale"]["10"] == pytest.approx(-3.0, rel=1e-5)
    x = rng.normal(size=(100, 6))
    # reference: numpy forward pass of the linear hidden layer, merged vs original
    lin = _float32(ident)
    hidden = x @ lin["up_proj.weight"].T + lin["up_proj.bias"]
    keep, drop = found[0].evidence["merge"]["keep"], found[0].evidence["merge"]["drop"][0]
    w2 = lin["down_proj.weight"].copy()
    w2[:, keep] += found[0].evidence["scale"][str(drop)] * w2[:, drop]
    rows = [j for j in range(16) if j != drop]
    np.testing.assert_allclose(
        hidden[:, rows] @ w2[:, rows].T, hidden @ lin["down_proj.weight"].T, atol=1e-9
    )


def test_batch_norm_is_folded_before_comparing(tmp_path: Path) -> None:
    rng = np.random.default_rng(6)
    t = _mlp(rng, hidden=8)
    # Raw rows differ by a factor 3, but the batch norm divides unit 6 by 3 more: folded equal.
    t["fc1.weight"][6] = 3.0 * t["fc1.weight"][0]
    t["fc1.bias"][6] = 3.0 * t["fc1.bias"][0]
    var = rng.uniform(0.5, 2.0, 8)
    mean = rng.normal(size=8)
    var[6] = 9.0 * var[0] + 8.0 * 1e-5  # sqrt(var6 + eps) = 3·sqrt(var0 + eps)
    mean[6] = 3.0 * mean[0]
    t.update(
        {
            "bn1.weight": np.ones(8),
            "bn1.bias": np.zeros(8),
            "bn1.running_mean": mean,
            "bn1.running_var": var,
        }
    )
    t["fc2.weight"][:, 6] = 0.01 * t["fc2.weight"][:, 0]
    findings = _run(_write(tmp_path, t, act="gelu"))
    assert [f.units for f in findings] == [(0, 6)]
    assert findings[0].evidence["folded"] is True


def test_unlinked_layers_report_redundancy_only_when_asked(tmp_path: Path) -> None:
    rng = np.random.default_rng(7)
    weight = rng.normal(size=(12, 5))
    weight[8] = weight[2]
    path = _write(tmp_path, {"head.weight": weight, "head.bias": np.zeros(12)}, act=None)
    assert _run(path) == []
    findings = _run(path, Policy(rules={RULE.name: {"report-unlinked": True}}))
    assert [f.units for f in findings] == [(2, 8)]
    assert findings[0].severity is Severity.INFO and findings[0].evidence["kind"] == "redundant"


def _train_head(
    features: np.ndarray,
    y: np.ndarray,
    w: np.ndarray,
    b: np.ndarray,
    l2: float,
    steps: int,
    lr: float,
) -> tuple[np.ndarray, np.ndarray]:
    """Full-batch gradient descent on mean squared error (+ l2·w added to the gradient)."""
    for _ in range(steps):
        err = (features @ w.T + b - y) / features.shape[0]
        w = w - lr * (err.T @ features + l2 * w)
        b = b - lr * err.sum(axis=0)
    return w, b


def _task(rng: np.random.Generator, n: int) -> tuple[np.ndarray, np.ndarray]:
    x = rng.normal(size=(n, 4))
    y = np.stack(
        [
            np.maximum(x[:, 0] + x[:, 1], 0) - 0.5 * np.maximum(x[:, 2] - x[:, 3], 0),
            np.maximum(x[:, 1] - x[:, 2], 0),
        ],
        axis=1,
    )
    return x, y


def _widened_and_retrained(l2: float) -> dict[str, np.ndarray]:
    """Train a 4-6-2 ReLU net, widen it by copying one hidden unit, fine-tune the head.

    Phase 1 trains both layers jointly. The widening copies the hidden unit with the largest
    outgoing weights, giving the copy zero outgoing weights (function-preserving, so the start
    of phase 2 is lopsided). Phase 2 trains the head on fresh data with the hidden layer frozen:
    the two copies are two identical input features of the head.
    """
    rng = np.random.default_rng(11)
    x, y = _task(rng, 256)
    w1 = rng.normal(size=(6, 4)) / 2
    b1 = np.full(6, 0.1)
    w2 = rng.normal(size=(2, 6)) / np.sqrt(6)
    b2 = np.zeros(2)
    for _ in range(2000):
        z = x @ w1.T + b1
        h = np.maximum(z, 0)
        err = (h @ w2.T + b2 - y) / x.shape[0]
        d_z = (err @ w2) * (z > 0)
        w1, b1 = w1 - 0.05 * (d_z.T @ x + l2 * w1), b1 - 0.05 * d_z.sum(axis=0)
        w2, b2 = w2 - 0.05 * (err.T @ h + l2 * w2), b2 - 0.05 * err.sum(axis=0)
    copied = int(np.argmax(np.linalg.norm(w2, axis=0)))
    w1 = np.vstack([w1, w1[copied]])
    b1 = np.r_[b1, b1[copied]]
    w2 = np.hstack([w2, np.zeros((2, 1))])
    x2, y2 = _task(rng, 256)
    start = w2[:, copied] - w2[:, 6]
    w2, b2 = _train_head(np.maximum(x2 @ w1.T + b1, 0), y2, w2, b2, l2, 2000, 0.1)
    # The fact itself, as it emerged: identical features get identical gradients, so the
    # difference of their weights is untouched by the data term and decays only under L2.
    drift = np.linalg.norm(w2[:, copied] - w2[:, 6] - start)
    if l2 == 0:
        assert drift < 1e-9 * np.linalg.norm(start)
    else:
        assert np.linalg.norm(w2[:, copied] - w2[:, 6]) < 0.1 * np.linalg.norm(start)
    return {
        "fc1.weight": w1,
        "fc1.bias": b1,
        "fc2.weight": w2,
        "fc2.bias": b2,
        "copied": np.array([copied]),
    }


def test_l2_splits_identical_features_evenly_and_only_the_unregularised_twins_are_flagged(
    tmp_path: Path,
) -> None:
    plain = _widened_and_retrained(0.0)
    decayed = _widened_and_retrained(2e-2)
    copied = int(plain.pop("copied")[0])
    decayed.pop("copied")
    split = np.linalg.norm(decayed["fc2.weight"][:, copied]) / np.linalg.norm(
        decayed["fc2.weight"][:, 6]
    )
    assert 0.8 < split < 1.25  # L2: nearly even
    flagged = _run(_write(tmp_path / "plain", plain))
    assert [f.units for f in flagged] == [tuple(sorted((copied, 6)))]
    assert flagged[0].evidence["kind"] == "lopsided"
    assert _run(_write(tmp_path / "decayed", decayed)) == []


def _planted(
    rng: np.random.Generator, units: int, width: int, pairs: int, threshold: float
) -> np.ndarray:
    rows = rng.normal(size=(units, width))
    chosen = rng.permutation(units)[: 2 * pairs].reshape(pairs, 2)
    for (a, b), cos in zip(chosen, rng.uniform(threshold, 1.0, pairs), strict=True):
        base = rows[a] / np.linalg.norm(rows[a])
        other = rng.normal(size=width)
        other -= (other @ base) * base
        rows[b] = cos * base + np.sqrt(1 - cos**2) * other / np.linalg.norm(other)
        if rng.random() < 0.5:
            rows[b] *= -1
    return rows


def test_blocked_search_equals_the_full_gram_matrix(monkeypatch: pytest.MonkeyPatch) -> None:
    rng = np.random.default_rng(8)
    rows = _planted(rng, 700, 24, 60, 0.99)
    monkeypatch.setattr(_similarity, "BLOCK_BYTES", 4 * 700 * 37)  # 37-row blocks: many of them
    unit, _ = normalise(rows)
    for negative in (False, True):
        a, b, cos = exact_pairs(unit, 0.99, negative)
        # reference: numpy full Gram matrix of the float64 unit rows
        u64 = rows / np.linalg.norm(rows, axis=1, keepdims=True)
        gram = u64 @ u64.T
        hit = gram >= 0.99
        if negative:
            hit |= gram <= -0.99
        truth = {(int(i), int(k)) for i, k in np.argwhere(np.triu(hit, 1))}
        assert set(zip(a.tolist(), b.tolist(), strict=True)) == truth
        np.testing.assert_allclose(cos, gram[a, b], atol=1e-6)
        assert len(truth) >= (60 if negative else 25)


def test_hashed_search_recall_on_a_wide_planted_layer() -> None:
    rng = np.random.default_rng(9)
    rows = _planted(rng, 4096, 64, 400, 0.995)
    unit, _ = normalise(rows)
    a, b, _ = exact_pairs(unit, 0.995, True)
    c, d, _ = candidate_pairs(unit, 0.995, True, seed=0)
    truth = set(zip(a.tolist(), b.tolist(), strict=True))
    found = set(zip(c.tolist(), d.tolist(), strict=True))
    assert found <= truth  # candidates are confirmed exactly
    assert len(truth) >= 400 and len(found & truth) / len(truth) >= MEASURED_RECALL


def test_wide_layers_use_the_hashed_search(tmp_path: Path) -> None:
    rng = np.random.default_rng(10)
    t = _mlp(rng, hidden=64)
    t["fc1.weight"][40] = t["fc1.weight"][20]
    t["fc1.bias"][40] = t["fc1.bias"][20]
    t["fc2.weight"][:, 40] = 0.1 * t["fc2.weight"][:, 20]
    findings = _run(_write(tmp_path, t), Policy(rules={RULE.name: {"exact-limit": 16}}))
    assert [f.units for f in findings] == [(20, 40)]
    assert findings[0].evidence["search"] == "hashed"


def test_mutual_twins_form_one_group_with_an_exact_merge(tmp_path: Path) -> None:
    rng = np.random.default_rng(12)
    t = _mlp(rng, hidden=24)
    members = [2, 7, 13, 19, 22]
    for unit, scale in zip(members[1:], (0.5, 3.0, 1.7, 0.2), strict=True):
        t["fc1.weight"][unit] = scale * t["fc1.weight"][2]
        t["fc1.bias"][unit] = scale * t["fc1.bias"][2]
    for unit, weight in zip(members, (1.0, 0.3, 0.02, 0.5, 2.0), strict=True):
        t["fc2.weight"][:, unit] = (
            weight * t["fc2.weight"][:, 2] if unit != 2 else t["fc2.weight"][:, 2]
        )
    findings = _run(_write(tmp_path, t))
    assert [f.units for f in findings] == [tuple(members)]
    assert len(findings[0].evidence["merge"]["drop"]) == 4
    exact = _float32(t)
    x = rng.normal(size=(300, 6))
    # reference: numpy forward pass through ReLU before and after dropping four units (the
    # stored float32 rows are scaled copies only to float32 precision, hence the tolerance)
    np.testing.assert_allclose(
        _forward(_apply_merge(exact, findings[0]), x), _forward(exact, x), rtol=1e-6, atol=1e-6
    )


@pytest.mark.parametrize("limit", [4096, 16])
def test_a_layer_of_copies_stays_one_group(tmp_path: Path, limit: int) -> None:
    rng = np.random.default_rng(13)
    t = _mlp(rng, hidden=300)
    t["fc1.weight"][:] = t["fc1.weight"][0]  # every unit the same (as a constant init leaves it)
    t["fc1.bias"][:] = t["fc1.bias"][0]
    findings = _run(_write(tmp_path, t), Policy(rules={RULE.name: {"exact-limit": limit}}))
    assert [f.units for f in findings] == [tuple(range(300))]
    assert findings[0].evidence["merge"]["dropped"] == 299


@pytest.mark.parametrize("act", ["relu", "gelu"])
def test_many_twin_pairs_screened_together_give_the_per_group_findings(
    tmp_path: Path, act: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    # A layer widened by duplicating units (each copy scaled, as a widening step makes them),
    # its consumer splitting each pair's weight in one of four ways: evenly, lopsided beyond
    # the ratio, just inside and just beyond it (3.99 and 4.01), cancelling, or not read at
    # all. The batch screen of two-member groups may only skip the pairs the per-group path
    # would not report: the findings must be the same with the screen switched off.
    rng = np.random.default_rng(7)
    base, copies = 300, 240
    t = _mlp(rng, inputs=48, hidden=base, out=32)
    w1, b1, w2 = t["fc1.weight"], t["fc1.bias"], t["fc2.weight"]
    sources = rng.permutation(base)[:copies]
    scale = rng.uniform(0.5, 2.0, copies) if act == "relu" else np.ones(copies)
    w1 = np.concatenate([w1, scale[:, None] * w1[sources]])
    b1 = np.concatenate([b1, scale * b1[sources]])
    split = rng.choice([1.0, 0.1, 1 / 3.99, 1 / 4.01, -0.9, 0.0], copies)
    new_columns = w2[:, sources] * split / scale
    new_columns[:, split == 0.0] = 0.0
    w2[:, sources[split == 0.0]] = 0.0  # neither copy read
    w2 = np.concatenate([w2, new_columns], axis=1)
    t = {"fc1.weight": w1, "fc1.bias": b1, "fc2.weight": w2, "fc2.bias": t["fc2.bias"]}
    path = _write(tmp_path, t, act)
    screened = _run(path)
    from steelyard.rules import twin_units

    monkeypatch.setattr(twin_units, "_quiet_pairs", lambda *args: set())
    unscreened = _run(path)
    assert [(f.units, f.evidence) for f in screened] == [(f.units, f.evidence) for f in unscreened]
    kinds = {f.evidence["kind"] for f in screened}
    assert kinds == {"lopsided", "cancelling"} and len(screened) >= copies // 3
