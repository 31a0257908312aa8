"""``head-circuits``: the circuit algebra against numpy, and recall/precision on trained models.

Sources: circuits ``W_Qᵀ W_K`` and ``W_O W_V`` as in Elhage et al. 2021 ("A Mathematical
Framework for Transformer Circuits"); ‖AB‖_F² = ⟨AᵀA, BBᵀ⟩ (trace identity) and the singular
values are checked against ``numpy.linalg.norm`` / ``numpy.linalg.svd`` of the formed product.
The trained fixtures (fixtures/gen_transformer_heads.py) hold planted defects listed in their
``planted.json``; their clean copies must give no finding.
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
from steelyard.rules import _circuits as circ
from tests.transformer.test_structure import HEADS, MODELS

RULE = "head-circuits"


def _found(path: Path, policy: Policy | None = None) -> list[Any]:
    return [f for f in audit(path, policy=policy).audits[0].findings if f.rule == RULE]


def _kinds(findings: list[Any]) -> set[tuple[str, str, tuple[int, ...]]]:
    out = set()
    for f in findings:
        heads = tuple(f.evidence["heads"]) if "heads" in f.evidence else (f.evidence["head"],)
        kind = "twin" if "twins" in f.message else "idle" if "idle" in f.message else "dominant"
        out.add((kind, f.evidence["block"], heads))
    return out


def _planted(model: str, gguf: bool = False) -> set[tuple[str, str, tuple[int, ...]]]:
    record = json.loads((HEADS / model / "planted.json").read_text())
    rename = (lambda b: "blk." + b.split(".")[2] + ".attn") if gguf else (lambda b: b)
    return {("idle", rename(p["block"]), (p["head"],)) for p in record["idle_heads"]} | {
        ("twin", rename(p["block"]), tuple(p["heads"])) for p in record["twin_heads"]
    }


@pytest.mark.parametrize("model", MODELS)
def test_every_planted_head_defect_is_found_and_named(model: str) -> None:
    found = _found(HEADS / model / "planted")
    assert _kinds(found) == _planted(model)
    for f in found:
        assert f.units == () and f.part.startswith("head")  # named by head, not by raw rows
        assert f"of {f.evidence['block']}" in f.message


@pytest.mark.parametrize("model", MODELS)
def test_clean_copies_have_no_head_findings(model: str) -> None:
    assert _found(HEADS / model / "clean") == []


def test_gguf_copy_finds_the_same_heads() -> None:
    assert _kinds(_found(HEADS / "moe_decoder" / "planted.gguf")) == _planted("moe_decoder", gguf=True)
    assert _found(HEADS / "moe_decoder" / "clean.gguf") == []


def test_twin_up_to_symmetry_has_different_raw_rows() -> None:
    # The GPT-2 twin (head 3 = rotated/rescaled head 0) is found although its rows are not
    # copies: the raw query rows are far apart, the circuits are not.
    import ml_dtypes  # noqa: F401
    from safetensors.numpy import load_file

    state = load_file(str(HEADS / "gpt2" / "planted" / "model.safetensors"))
    w = np.asarray(state["transformer.h.1.attn.c_attn.weight"], dtype=np.float32).T
    q0, q3 = w[0:8].ravel(), w[24:32].ravel()
    assert float(q0 @ q3 / np.linalg.norm(q0) / np.linalg.norm(q3)) < 0.9


def test_thresholds_are_policy_keys() -> None:
    # An exact copy stays a twin at any threshold; the idle head goes with idle-share 0, and
    # every ordinary head of the clean copy dominates at dominant-ratio 0.
    quiet = Policy(rules={RULE: {"idle-share": 0.0}})
    assert {k[0] for k in _kinds(_found(HEADS / "bert" / "planted", quiet))} == {"twin"}
    loud = Policy(rules={RULE: {"dominant-ratio": 0.0}})
    assert {k[0] for k in _kinds(_found(HEADS / "bert" / "clean", loud))} == {"dominant"}


# ---- the algebra -------------------------------------------------------------------------------
@pytest.mark.parametrize(("d", "dh"), [(32, 8), (96, 16), (40, 5)])
def test_circuit_norm_and_spectrum_match_the_formed_product(d: int, dh: int) -> None:
    rng = np.random.default_rng(d)
    wo, wv = rng.standard_normal((d, dh)), rng.standard_normal((dh, d))
    go, _ = circ.column_factors(wo.astype(np.float32), circ.sketch_matrix(d, True))
    gv, _ = circ.row_factors(wv.astype(np.float32), circ.sketch_matrix(d, False))
    product = wo.astype(np.float32).astype(np.float64) @ wv.astype(np.float32).astype(np.float64)
    assert circ.circuit_norm(go, gv) == pytest.approx(np.linalg.norm(product), rel=1e-6)
    assert np.allclose(circ.circuit_spectrum(go, gv), np.linalg.svd(product, compute_uv=False)[:dh], rtol=1e-5)


def test_sketches_are_invariant_under_the_attention_symmetries() -> None:
    # W_Q → R W_Q, W_K → R⁻ᵀ W_K and W_V → S W_V, W_O → W_O S⁻¹ leave attention unchanged
    # (Elhage et al. 2021); the sketched circuits must not move either.
    rng = np.random.default_rng(1)
    d, dh = 48, 8
    wq, wk, wv = (rng.standard_normal((dh, d)).astype(np.float32) for _ in range(3))
    wo = rng.standard_normal((d, dh)).astype(np.float32)
    r, s = rng.standard_normal((dh, dh)) + 3 * np.eye(dh), rng.standard_normal((dh, dh)) + 3 * np.eye(dh)
    psi, omega = circ.sketch_matrix(d, True), circ.sketch_matrix(d, False)

    def sketches(q: np.ndarray, k: np.ndarray, v: np.ndarray, o: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        return (q @ psi.T).T @ (k @ omega), (psi @ o) @ (v @ omega)

    base = sketches(wq, wk, wv, wo)
    moved = sketches((r @ wq).astype(np.float32), (np.linalg.inv(r).T @ wk).astype(np.float32),
                     (s @ wv).astype(np.float32), (wo @ np.linalg.inv(s)).astype(np.float32))
    for a, b in zip(base, moved, strict=True):
        assert circ.sketch_cosine(a, b) > 0.9999


def test_sketch_cosine_estimates_the_circuit_cosine() -> None:
    rng = np.random.default_rng(2)
    d, dh = 256, 32
    psi, omega = circ.sketch_matrix(d, True), circ.sketch_matrix(d, False)
    errors = []
    for mix in np.linspace(0, 1, 9):
        wo1, wv1 = rng.standard_normal((d, dh)), rng.standard_normal((dh, d))
        wo2 = mix * wo1 + (1 - mix) * rng.standard_normal((d, dh))
        wv2 = mix * wv1 + (1 - mix) * rng.standard_normal((dh, d))
        a, b = wo1 @ wv1, wo2 @ wv2
        true = float(np.sum(a * b) / np.linalg.norm(a) / np.linalg.norm(b))
        est = circ.sketch_cosine((psi @ wo1) @ (wv1 @ omega), (psi @ wo2) @ (wv2 @ omega))
        errors.append(abs(est - true))
    assert max(errors) < 0.1


# ---- random shapes, defects at random places ---------------------------------------------------
@pytest.mark.parametrize(("heads", "kv", "dim", "seed"), [(8, 8, 16, 0), (8, 2, 8, 1), (6, 3, 12, 2), (4, 1, 16, 3)])
def test_random_models_of_several_shapes(tmp_path: Path, heads: int, kv: int, dim: int, seed: int) -> None:
    rng = np.random.default_rng(seed)
    width = 64
    tensors: dict[str, np.ndarray] = {}
    planted: set[tuple[str, str, tuple[int, ...]]] = set()
    for layer in range(2):
        p = f"model.layers.{layer}.self_attn."
        q = rng.standard_normal((heads * dim, width)).astype(np.float32)
        o = rng.standard_normal((width, heads * dim)).astype(np.float32)
        if layer == 0:  # an idle head and a dominant one at random places
            idle, loud = rng.choice(heads, 2, replace=False)
            o[:, idle * dim : (idle + 1) * dim] *= 1e-3
            o[:, loud * dim : (loud + 1) * dim] *= 40
            planted |= {("idle", p[:-1], (int(idle),)), ("dominant", p[:-1], (int(loud),))}
        else:  # twins within one key/value group (they share k and v)
            group = heads // kv
            a = int(rng.integers(0, kv)) * group
            b = a + 1 if group > 1 else None
            if b is not None:
                q[b * dim : (b + 1) * dim] = q[a * dim : (a + 1) * dim]
                o[:, b * dim : (b + 1) * dim] = o[:, a * dim : (a + 1) * dim]
                planted.add(("twin", p[:-1], (a, b)))
        tensors |= {p + "q_proj.weight": q, p + "o_proj.weight": o,
                    p + "k_proj.weight": rng.standard_normal((kv * dim, width)).astype(np.float32),
                    p + "v_proj.weight": rng.standard_normal((kv * dim, width)).astype(np.float32)}
    config = json.dumps({"model_type": "llama", "num_attention_heads": heads,
                         "num_key_value_heads": kv, "head_dim": dim, "hidden_size": width})
    # The same model at scales where float32 products of the weights vanish into subnormals
    # (2^-70) or overflow (2^60): multiplying by a power of two is exact, and every head
    # defect is a ratio, so the findings must be the same.
    norms: dict[float, list[float]] = {}
    for scale in (1.0, 2.0**-70, 2.0**60):
        folder = tmp_path / f"m{scale:g}"
        folder.mkdir()
        save_file({k: v * np.float32(scale) for k, v in tensors.items()}, str(folder / "model.safetensors"))
        (folder / "config.json").write_text(config)
        found = _found(folder)
        assert _kinds(found) == planted
        norms[scale] = sorted(float(f.evidence["ov_norm"]) / scale**2 for f in found if "ov_norm" in f.evidence)
    # ‖W_O W_V‖_F scales with the square of the weights' scale (reference: the trace identity).
    for scale in (2.0**-70, 2.0**60):
        np.testing.assert_allclose(norms[scale], norms[1.0], rtol=1e-5)
