"""``untrained-token`` on the trained tiny transformers (fixtures/gen_transformer_tokens.py:
planted copies hold 6 never-seen reserved tokens and 3 tokens added after training at the mean
row; clean copies see every token in training).

Sources: Land & Bartolo 2024, "Fishing for Magikarp" (under-trained tokens keep rows that,
after removing the principal component shared by all rows, stand apart from the trained ones);
the ``tokenizers`` package reads the token strings (reference reader of ``tokenizer.json``).
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pytest

from steelyard.checkpoint_audit import run_rules
from steelyard.findings import Finding
from steelyard.loaders import load
from steelyard.policy import Policy
from steelyard.rules.base import RuleNotes
from steelyard.rules.untrained_token import (
    RULE,
    _products,
    _stable_order,
    measure,
    principal_directions,
    token_matrices,
)

TOKENS = Path(__file__).resolve().parents[2] / "fixtures" / "transformers_tokens"


def _run(path: Path, notes: RuleNotes | None = None) -> list[Finding]:
    findings, _, _ = run_rules(load(path), Policy(), None, rules={RULE.name: RULE}, notes=notes)
    return findings


@pytest.mark.parametrize("name", ["planted", "planted_tied"])
def test_every_planted_token_is_found_by_name(name: str) -> None:
    pytest.importorskip("tokenizers")
    planted = json.loads((TOKENS / name / "planted.json").read_text())
    expected = set(planted["reserved_never_trained"]) | set(planted["added_at_mean"])
    findings = _run(TOKENS / name / "model.safetensors")
    matrices = {"planted": {"model.embed_tokens", "lm_head"}, "planted_tied": {"model.embed_tokens"}}
    assert {f.layer for f in findings} == matrices[name]
    for finding in findings:
        assert set(finding.units) == expected  # full recall, no other token
        listed = {t["id"]: t for t in finding.evidence["tokens"]}
        assert listed[125]["text"] == "<|call|>" and listed[119]["text"] == "<reserved_0>"
        assert {listed[t]["test"] for t in planted["added_at_mean"]} == {"at the mean"}
        assert {listed[t]["test"] for t in planted["reserved_never_trained"]} == {"low residual"}
        assert "'<|call|>'" in finding.message
    if name == "planted_tied":
        assert findings[0].evidence["matrix"] == "tied embedding and head"


@pytest.mark.parametrize("name", ["clean", "clean_tied"])
def test_clean_copies_have_no_untrained_tokens(name: str) -> None:
    assert _run(TOKENS / name / "model.safetensors") == []


def test_without_a_tokenizer_tokens_are_ids_and_a_note_says_so(tmp_path: Path) -> None:
    shutil.copy(TOKENS / "planted" / "model.safetensors", tmp_path / "model.safetensors")
    shutil.copy(TOKENS / "planted" / "config.json", tmp_path / "config.json")
    notes = RuleNotes()
    findings = _run(tmp_path / "model.safetensors", notes)
    assert findings and all(t["text"] is None for f in findings for t in f.evidence["tokens"])
    assert any("no tokenizer.json" in line for line in notes.lines([]))


def test_token_matrices_are_found_from_the_layer_graph() -> None:
    untied = token_matrices(load(TOKENS / "clean" / "model.safetensors").layers)
    assert [e.name for e in untied.embeddings] == ["model.embed_tokens"]
    assert untied.head is not None and untied.head.name == "lm_head" and not untied.tied
    tied = token_matrices(load(TOKENS / "clean_tied" / "model.safetensors").layers)
    assert tied.head is None and tied.tied


def test_principal_directions_match_numpy_svd() -> None:
    # numpy.linalg.svd is the reference; the randomised range finder (Halko et al. 2011)
    # must recover the same leading direction on a matrix with a dominant component.
    rng = np.random.default_rng(3)
    rows = rng.standard_normal((5000, 96)) + 8.0 * rng.standard_normal((5000, 1)) * rng.standard_normal(96)
    centred = rows - rows.mean(axis=0)
    found = principal_directions(centred, 1)
    exact = np.linalg.svd(centred, full_matrices=False)[2][:1]
    assert abs(float(found[0] @ exact[0])) > 0.999


def test_identical_rows_and_zero_rows_are_told_apart() -> None:
    rng = np.random.default_rng(4)
    matrix = rng.standard_normal((200, 16)).astype(np.float32)
    matrix[10] = matrix[20]
    matrix[30] = 0.0
    found = measure(matrix, 1)
    assert set(np.flatnonzero(found.duplicates)) == {10, 20}
    assert found.norms[30] == 0.0


def test_identical_rows_are_found_in_chunks_bit_for_bit() -> None:
    # 70,000 zero rows give 69,999 neighbour pairs, more than one chunk of comparisons; the
    # expected set is every row whose bytes occur more than once (numpy.unique over the rows'
    # bytes, the reference). A row of −0.0 equals the zero rows as floats, not bit for bit.
    rng = np.random.default_rng(5)
    matrix = np.zeros((80_000, 16), np.float32)
    matrix[70_000:] = rng.standard_normal((10_000, 16)).astype(np.float32)
    matrix[75_000] = matrix[79_999]
    matrix[70_001] = -0.0
    found = measure(matrix, 1)
    rows = np.ascontiguousarray(matrix).view(np.dtype((np.void, 16 * 4))).reshape(-1)
    _, inverse, counts = np.unique(rows, return_inverse=True, return_counts=True)
    expected = counts[inverse] > 1
    np.testing.assert_array_equal(found.duplicates, expected)
    assert found.duplicates[:70_000].all() and not found.duplicates[70_001]


def test_stable_order_is_numpys_stable_argsort() -> None:
    """The duplicate search walks rows in ``numpy.argsort(kind="stable")`` order (the
    reference): many ties, no ties, one value, all equal."""
    rng = np.random.default_rng(3)
    for trial in range(400):
        n = int(rng.integers(1, 600))
        values = np.round(rng.random(n) * rng.choice([2.0, 40.0, 1e9])) / 7.0
        assert np.array_equal(_stable_order(values), np.argsort(values, kind="stable")), trial
    assert np.array_equal(_stable_order(np.ones(50)), np.arange(50))


@pytest.mark.parametrize("shape", [(5000, 256), (3000, 1000), (100, 4096), (1, 7)])
def test_blocked_products_match_the_exact_product(shape: tuple[int, int]) -> None:
    """Each entry of the blocked float32 product lies within the float32 dot-product error
    bound n·eps·Σ|a_i b_i| (Higham, "Accuracy and Stability of Numerical Algorithms", 2002,
    section 3.1) of the float64 product of the same numbers."""
    rng = np.random.default_rng(sum(shape))
    block = rng.standard_normal(shape).astype(np.float32)
    probes = rng.standard_normal((3, shape[1])).astype(np.float32)
    got = _products(block, probes).astype(np.float64)
    exact = block.astype(np.float64) @ probes.T.astype(np.float64)
    bound = shape[1] * np.finfo(np.float32).eps * (np.abs(block) @ np.abs(probes).T)
    assert np.all(np.abs(got - exact) <= bound)
