"""The hashed twin search against the exact one on weights shaped like trained layers, its
bounded work, and ``twin-units`` findings that do not depend on the search or ``--jobs``.

Reference: the exact blocked search, itself checked against the full numpy Gram matrix in
``test_twin_units.py``. The backgrounds are our own invented draws (the full-size ones and
the recall they give are in ``bench/twin_recall.py``); the sign-hashing collision
probability they stress is Charikar 2002 ("Similarity estimation techniques from rounding
algorithms", STOC): rows at angle θ agree on a random hyperplane with probability 1 − θ/π, so
rows that share directions crowd the same buckets.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from safetensors.numpy import save_file

from steelyard.checkpoint_audit import run_rules
from steelyard.findings import Finding
from steelyard.loaders import load
from steelyard.policy import Policy
from steelyard.rules import _similarity
from steelyard.rules._bucket_gram import BUCKET_CAP
from steelyard.rules._rows import Rows, Tally
from steelyard.rules._similarity import (
    MEASURED_RECALL,
    PARTNERS,
    candidate_pairs,
    confirmation_bound,
    exact_pairs,
)
from steelyard.rules.twin_units import RULE, _components

THRESHOLD = 0.995


def _at_cosine(rng: np.random.Generator, row: np.ndarray, cos: float) -> np.ndarray:
    base = row / np.linalg.norm(row)
    other = rng.normal(size=row.size)
    other -= (other @ base) * base
    return np.asarray(cos * base + np.sqrt(1 - cos**2) * other / np.linalg.norm(other))


def _correlated(rng: np.random.Generator, units: int, width: int) -> np.ndarray:
    """A power-law low-rank part plus Student-t noise: rows share a few strong directions."""
    rank = min(16, width)
    low = (rng.normal(size=(units, rank)) / (1.0 + np.arange(rank))) @ rng.normal(
        size=(rank, width)
    )
    low /= np.sqrt(np.mean(low**2))
    return np.asarray(low + 0.3 * rng.standard_t(3, size=(units, width)))


def _background(rng: np.random.Generator, kind: str, units: int, width: int) -> np.ndarray:
    if kind == "independent":
        return rng.normal(size=(units, width))
    if kind == "correlated":
        return _correlated(rng, units, width)
    if kind == "near-duplicate":  # 30 % of the rows near copies of other rows
        rows = _correlated(rng, units, width)
        order = rng.permutation(units)
        copies = order[: int(0.3 * units)]
        for copy, source in zip(copies, rng.choice(order[copies.size :], copies.size), strict=True):
            rows[copy] = _at_cosine(rng, rows[source], rng.uniform(0.99, 1.0)) * 2.0
        return rows
    if kind == "outlier-columns":  # a few input columns 30 × larger, one sign each
        rows = rng.normal(size=(units, width))
        columns = rng.choice(width, 4, replace=False)
        rows[:, columns] = rng.choice([-1.0, 1.0], 4) * 30.0 * rng.lognormal(0, 0.5, (units, 4))
        return rows
    assert kind == "clustered"  # a quarter of the rows within cosine 0.998 of one row
    rows = _correlated(rng, units, width)
    members = rng.permutation(units)[: units // 4]
    for member in members[1:]:
        rows[member] = _at_cosine(rng, rows[members[0]], rng.uniform(0.998, 1.0))
    return rows


def _planted(rng: np.random.Generator, kind: str, units: int, width: int) -> np.ndarray:
    rows = _background(rng, kind, units, width)
    pairs = rng.permutation(units)[: units // 4].reshape(-1, 2)
    for (a, b), cos in zip(pairs, rng.uniform(THRESHOLD, 1.0, len(pairs)), strict=True):
        rows[b] = _at_cosine(rng, rows[a], cos) * rng.uniform(0.5, 2.0)
    return rows


def _groups(first: np.ndarray, second: np.ndarray, units: int) -> list[tuple[int, ...]]:
    return sorted(tuple(g.tolist()) for g in _components(first, second, units))


KINDS = ["independent", "correlated", "near-duplicate", "outlier-columns", "clustered"]


@pytest.mark.parametrize("negative", [False, True])
@pytest.mark.parametrize("kind", KINDS)
def test_hashed_search_equals_the_exact_search_in_every_background(
    kind: str, negative: bool, monkeypatch: pytest.MonkeyPatch
) -> None:
    rng = np.random.default_rng(KINDS.index(kind) + 10 * negative)
    rows = _planted(rng, kind, 1200, 40)
    if negative:
        rows[rng.random(rows.shape[0]) < 0.5] *= -1
    # No fallback to the exact search, even where it would be cheaper.
    monkeypatch.setattr(_similarity, "BUCKET_DOT_COST", 0.0)
    view = Rows.of(rows)
    a, b, cos = exact_pairs(view, THRESHOLD, negative)
    tally = Tally()
    c, d, cos_hashed = candidate_pairs(view, THRESHOLD, negative, seed=0, tally=tally)
    assert tally.method == "hashed" and a.size >= 150
    capped = np.bincount(a, minlength=rows.shape[0]).max() >= PARTNERS
    if capped:
        # Past the partner cap each search keeps some of a row's partners; the twin groups
        # (what the rule reports) must be the same.
        assert kind == "clustered" and tally.banded > 0
        assert _groups(a, b, rows.shape[0]) == _groups(c, d, rows.shape[0])
    else:
        assert np.array_equal(a, c) and np.array_equal(b, d)
        np.testing.assert_allclose(cos_hashed, cos, atol=1e-5)
    if kind in ("outlier-columns", "clustered"):
        assert tally.split > 0  # crowded buckets were cut by longer keys


@pytest.mark.parametrize("kind", ["outlier-columns", "clustered"])
def test_confirmation_work_is_bounded_by_the_bucket_cap(
    kind: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    # At fan-in 64 the exact search would be cheaper; the hashed path is what is measured here.
    monkeypatch.setattr(_similarity, "BUCKET_DOT_COST", 0.0)
    rng = np.random.default_rng(31)
    n = 6000
    rows = _planted(rng, kind, n, 64)
    tally = Tally()
    first, second, _ = candidate_pairs(Rows.of(rows), THRESHOLD, tally=tally)
    assert tally.method == "hashed"
    assert tally.largest <= BUCKET_CAP
    # The documented bound: at most 4·BUCKET_CAP dot products per row and table.
    assert 0 < tally.dots <= tally.planned <= 4 * BUCKET_CAP * tally.tables * n
    assert tally.confirmed <= tally.planned  # pairs past the screen, each confirmed once
    assert tally.dots <= confirmation_bound(n, tally.tables)
    assert tally.split > 0 and tally.banded > 0
    a, b, _ = exact_pairs(Rows.of(rows), THRESHOLD)
    exact_groups, hashed_groups = _groups(a, b, n), _groups(first, second, n)
    if kind == "outlier-columns":
        assert hashed_groups == exact_groups
        return
    # The cluster of 1,500 rows (more than _BAND·BUCKET_CAP, so banded) is one group either
    # way; its rows are past the partner cap, so recall is counted on the other rows, whose
    # partner lists the exact search gives in full.
    assert max(hashed_groups, key=len) == max(exact_groups, key=len)
    complete = np.bincount(a, minlength=n)[a] < PARTNERS
    truth = set(zip(a[complete].tolist(), b[complete].tolist(), strict=True))
    found = set(zip(first.tolist(), second.tolist(), strict=True))
    assert len(truth) > 1000 and len(truth & found) / len(truth) >= MEASURED_RECALL


def test_a_collision_storm_cheaper_searched_exactly_is() -> None:
    rows = np.tile(np.random.default_rng(32).normal(size=(1, 16)), (900, 1))  # all copies
    tally = Tally()
    first, second, _ = candidate_pairs(Rows.of(rows), THRESHOLD, tally=tally)
    # 900 identical rows: one band per table, planned work > the exact search's 810,000 dots.
    assert tally.method == "exact"
    assert tally.planned * _similarity.BUCKET_DOT_COST > tally.dots
    assert tally.dots <= confirmation_bound(900, tally.tables)
    assert _groups(first, second, 900) == [tuple(range(900))]


def _write(folder: Path, tensors: dict[str, np.ndarray]) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "model.safetensors"
    save_file({k: np.ascontiguousarray(v, dtype=np.float32) for k, v in tensors.items()}, str(path))
    (folder / "config.json").write_text(json.dumps({"hidden_act": "relu"}))
    return path


def _near_duplicate_mlp(tmp_path: Path) -> tuple[Path, list[tuple[int, int]]]:
    """A 32-700-8 ReLU MLP whose hidden rows are near-duplicate-heavy, with lopsided twins."""
    rng = np.random.default_rng(33)
    hidden = _background(rng, "near-duplicate", 700, 32)
    out = rng.normal(size=(8, 700))
    planted = [(40, 41), (300, 512), (650, 7)]
    for keep, copy in planted:
        hidden[copy] = 1.5 * hidden[keep]
        out[:, copy] = 0.01 * out[:, keep]  # the consumer reads the copy 100 × less
    tensors = {
        "fc1.weight": hidden,
        "fc1.bias": np.zeros(700),
        "fc2.weight": out,
        "fc2.bias": np.zeros(8),
    }
    return _write(tmp_path, tensors), [tuple(sorted(p)) for p in planted]


def _findings(path: Path, limit: int, jobs: int = 1) -> list[Finding]:
    policy = Policy(rules={RULE.name: {"exact-limit": limit}})
    findings, _, _ = run_rules(load(path), policy, None, rules={RULE.name: RULE}, jobs=jobs)
    return findings


def test_planted_twins_in_a_near_duplicate_heavy_layer_and_the_same_findings_either_way(
    tmp_path: Path,
) -> None:
    path, planted = _near_duplicate_mlp(tmp_path)
    hashed = _findings(path, 16)
    exact = _findings(path, 4096)
    assert {f.evidence["search"] for f in hashed} == {"hashed"}
    assert {f.evidence["search"] for f in exact} == {"exact"}
    strip = [
        (f.units, f.message, {k: v for k, v in f.evidence.items() if k != "search"}) for f in hashed
    ]
    assert strip == [
        (f.units, f.message, {k: v for k, v in f.evidence.items() if k != "search"}) for f in exact
    ]
    for pair in planted:
        assert any(set(pair) <= set(f.units) for f in hashed), pair
    assert len(hashed) > len(planted)  # the near copies are twins as well


def test_hashed_findings_are_the_same_for_one_and_two_jobs(tmp_path: Path) -> None:
    path, _ = _near_duplicate_mlp(tmp_path)
    one = _findings(path, 16, jobs=1)
    assert one and one == _findings(path, 16, jobs=2)


@pytest.mark.parametrize("negative", [False, True])
def test_rows_sharing_a_bias_are_screened_on_their_projections_and_lose_no_pair(
    negative: bool,
) -> None:
    # Every row carries the same large extra entry (a bias of about 1 beside weights of norm
    # about 1, as in an invented checkpoint whose biases were drawn around 1): rows sit at
    # cosine ~0.5 from each other and crowd the buckets. The screen on the hashing's own
    # projections must drop those pairs before any row is gathered, and keep every planted
    # twin (reference: the exact blocked search on the same rows).
    rng = np.random.default_rng(41)
    units, width = 3000, 96
    weights = rng.normal(size=(units, width)) / np.sqrt(width)
    bias = 1.0 + 0.05 * rng.normal(size=units)
    full = np.concatenate([weights, bias[:, None]], axis=1)
    pairs = rng.permutation(units)[:400].reshape(-1, 2)
    for (a, b), cos in zip(pairs, rng.uniform(THRESHOLD, 1.0, len(pairs)), strict=True):
        full[b] = _at_cosine(rng, full[a], cos) * rng.uniform(0.5, 2.0)
    full = full.astype(np.float32)
    view = Rows(
        np.ascontiguousarray(full[:, :-1]),
        np.sqrt(np.einsum("ij,ij->i", full, full, dtype=np.float64)),
        extra=np.ascontiguousarray(full[:, -1]),
    )
    tally = Tally()
    first, second, _ = candidate_pairs(view, THRESHOLD, negative, tally=tally)
    a, b, _ = exact_pairs(full, THRESHOLD, negative)
    assert tally.method == "hashed"
    assert np.array_equal(first, a) and np.array_equal(second, b) and a.size >= 200
    # Crowded: many colliding pairs per row, but only about the twins reach the rows.
    assert tally.planned > 20 * units
    assert a.size <= tally.confirmed <= 2 * a.size


def test_a_cluster_of_copies_is_confirmed_by_gram_products_not_pair_by_pair(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    # Most colliding pairs of a cluster pass the screen; confirming them one by one would cost
    # more than the buckets' Gram products on the rows, which the search then uses.
    monkeypatch.setattr(_similarity, "BUCKET_DOT_COST", 0.0)
    rng = np.random.default_rng(42)
    rows = _planted(rng, "clustered", 3000, 64)
    tally = Tally()
    first, second, _ = candidate_pairs(Rows.of(rows), THRESHOLD, tally=tally)
    assert tally.method == "hashed" and tally.confirmed == 0
    a, b, _ = exact_pairs(Rows.of(rows), THRESHOLD)
    assert max(_groups(first, second, 3000), key=len) == max(_groups(a, b, 3000), key=len)


@pytest.mark.parametrize("negative", [False, True])
def test_crowded_gram_blocks_apply_the_partner_cap_on_the_mask_with_the_same_result(
    negative: bool, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Rows of weights that are zero (or constant) beside a bias are all parallel: every pair
    # is a hit, and the exact search caps them on the block's mask instead of listing them.
    # The kept pairs must be those of the listed path, near-threshold pairs included.
    rng = np.random.default_rng(43)
    units, width = 1800, 48
    rows = rng.normal(size=(units, width))
    crowd = rng.permutation(units)[:1300]
    anchor = rows[crowd[0]]
    for member in crowd[1:]:
        cos = rng.choice([rng.uniform(0.9999, 1.0), rng.uniform(THRESHOLD - 2e-4, THRESHOLD + 2e-4)])
        rows[member] = _at_cosine(rng, anchor, cos) * rng.uniform(0.5, 2.0)
        if negative and rng.random() < 0.3:
            rows[member] *= -1.0
    crowded = exact_pairs(Rows.of(rows), THRESHOLD, negative)
    monkeypatch.setattr(_similarity, "_CROWDED_ROW", 10**12)
    listed = exact_pairs(Rows.of(rows), THRESHOLD, negative)
    assert crowded[0].size > 20_000
    for a, b in zip(crowded, listed, strict=True):
        assert np.array_equal(a, b)
