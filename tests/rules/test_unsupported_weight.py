"""``unsupported-weight`` on tiny safetensors checkpoints with planted weights and support."""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from safetensors.numpy import save_file

from steelyard.checkpoint_audit import audit_checkpoint, run_rules
from steelyard.errors import LoadError
from steelyard.findings import Severity
from steelyard.gradients import GradsKind, optimizer_source, sidecar_source
from steelyard.graph import Checkpoint, OptimizerSlots, OptimizerState, Tensor, TensorRole
from steelyard.loaders import load
from steelyard.policy import Policy
from steelyard.rules import registry
from steelyard.rules.base import RuleNotes
from steelyard.rules.unsupported_weight import RULE
from tests.rules._training import audit, by_test

UNITS, FAN_IN = 32, 64
PLANTED = ((5, 3, 1.0), (5, 40, -1.2), (17, 10, 0.9))
"""(unit, input, w) of the large weights planted in fc1."""
TINY = 1e-4


def _arrays(seed: int = 0) -> tuple[dict[str, np.ndarray], dict[str, np.ndarray]]:
    """Uniform weights (max/RMS = √3 < 3, so none is an outlier) and supports in [0.5, 1.5]."""
    rng = np.random.default_rng(seed)
    weights = {
        "fc1.weight": rng.uniform(-0.1, 0.1, (UNITS, FAN_IN)).astype(np.float32),
        "fc2.weight": rng.uniform(-0.1, 0.1, (4, UNITS)).astype(np.float32),
    }
    support = {
        name: rng.uniform(0.5, 1.5, w.shape).astype(np.float32) for name, w in weights.items()
    }
    return weights, support


def _write(
    folder: Path, weights: dict[str, np.ndarray], support: dict[str, np.ndarray]
) -> tuple[Path, Path]:
    folder.mkdir(parents=True, exist_ok=True)
    save_file(weights, str(folder / "model.safetensors"))
    save_file(support, str(folder / "grads.safetensors"))
    return folder / "model.safetensors", folder / "grads.safetensors"


def _planted(folder: Path, tiny_support: bool = True) -> tuple[Path, Path]:
    weights, support = _arrays()
    for unit, column, value in PLANTED:
        weights["fc1.weight"][unit, column] = value
        # Tiny, or the middle of the ordinary range [0.5, 1.5].
        support["fc1.weight"][unit, column] = TINY if tiny_support else 1.0
    return _write(folder, weights, support)


def test_rule_is_registered_with_docs() -> None:
    spec = registry()[RULE.name]
    assert spec is RULE and RULE.name == "unsupported-weight"
    doc = " ".join(RULE.doc.split())
    assert doc.startswith("``unsupported-weight``")
    assert "Optimal Brain Damage" in doc and "Krogh & Hertz 1992" in doc
    assert RULE.severity is Severity.WARNING


def test_planted_large_weights_with_tiny_support_are_flagged(tmp_path: Path) -> None:
    model, sidecar = _planted(tmp_path)
    findings = audit(model, sidecar)
    flagged = by_test(findings, "unsupported")
    assert set(flagged) == {"fc1"}
    finding = flagged["fc1"]
    assert finding.rule == "unsupported-weight" and finding.severity is Severity.WARNING
    assert finding.tensor == "fc1.weight" and finding.part == ""
    assert finding.units == tuple(sorted({u for u, _, _ in PLANTED}))
    assert finding.evidence["flagged"] == len(PLANTED)
    top = {(e["unit"], e["input"]): e for e in finding.evidence["top"]}
    assert set(top) == {(u, c) for u, c, _ in PLANTED}
    # Limits recomputed independently. reference: numpy.quantile (linear interpolation)
    w = np.abs(load(model).tensors["fc1.weight"].read_float32().astype(np.float64))
    s = load(sidecar).tensors["fc1.weight"].read_float32().astype(np.float64)
    rms = np.sqrt(np.mean(w**2))
    assert finding.evidence["weight_limit"] == pytest.approx(max(np.quantile(w, 0.99), 3 * rms))
    assert finding.evidence["support_limit"] == pytest.approx(np.quantile(s, 0.05))
    # Saliency ½·F·w² with F ≈ s². reference: LeCun, Denker & Solla 1990, "Optimal Brain Damage"
    for (unit, column), entry in top.items():
        expected = 0.5 * s[unit, column] ** 2 * w[unit, column] ** 2
        assert entry["saliency"] == pytest.approx(expected, rel=1e-6)
        assert abs(entry["w"]) == pytest.approx(w[unit, column])
    assert finding.evidence["total_saliency"] == pytest.approx(
        sum(e["saliency"] for e in top.values())
    )
    saliencies = [e["saliency"] for e in finding.evidence["top"]]
    assert saliencies == sorted(saliencies)


def test_healthy_twin_has_no_finding(tmp_path: Path) -> None:
    # Same large weights, but the data pulls on them as on any other weight.
    model, sidecar = _planted(tmp_path / "supported", tiny_support=False)
    assert by_test(audit(model, sidecar), "unsupported") == {}
    # Tiny support on ordinary-sized weights is not a finding either.
    weights, support = _arrays()
    for unit, column, _ in PLANTED:
        support["fc1.weight"][unit, column] = TINY
    model, sidecar = _write(tmp_path / "small", weights, support)
    assert by_test(audit(model, sidecar), "unsupported") == {}


def test_thresholds_come_from_the_policy(tmp_path: Path) -> None:
    model, sidecar = _planted(tmp_path)
    relaxed = Policy(rules={RULE.name: {"rms-multiple": 50.0}})
    assert by_test(audit(model, sidecar, relaxed), "unsupported") == {}


def test_without_a_source_the_rule_adds_a_note_and_no_finding(tmp_path: Path) -> None:
    model, _ = _planted(tmp_path)
    notes = RuleNotes()
    assert audit(model, None, Policy(weight_decay=0.01), notes=notes) == []
    (line,) = notes.lines([])
    assert line.startswith(f"{RULE.name}: did not run: no gradient source") and "--grads" in line


def test_a_sidecar_that_matches_no_layer_is_an_input_error(tmp_path: Path) -> None:
    model, _ = _planted(tmp_path)
    other = tmp_path / "other.safetensors"
    save_file({"head.weight": np.ones((3, 5), np.float32)}, str(other))
    with pytest.raises(LoadError, match="matches no layer"):
        sidecar_source(str(other), GradsKind.ABS, load(other), load(model))


def test_a_sidecar_with_the_right_names_but_wrong_shapes_is_an_input_error(tmp_path: Path) -> None:
    model, _ = _planted(tmp_path)
    other = tmp_path / "other.safetensors"
    names = list(load(model).tensors)
    save_file({n: np.ones((2, 2), np.float32) for n in names}, str(other))
    with pytest.raises(LoadError, match="shapes differ"):
        sidecar_source(str(other), GradsKind.ABS, load(other), load(model))


def test_a_partial_sidecar_is_reported_with_counts(tmp_path: Path) -> None:
    model, sidecar = _planted(tmp_path)
    partial = tmp_path / "partial.safetensors"
    first = load(model).layers[0]
    save_file({first.weight: load(sidecar).tensors[first.weight].read_float32()}, str(partial))
    source = sidecar_source(str(partial), GradsKind.ABS, load(partial), load(model))
    layers = len(load(model).layers)
    assert layers > 1
    assert any(f"covers 1 of {layers} layers" in note for note in source.notes)


def test_health_table_reads_the_flagged_count(tmp_path: Path) -> None:
    model, sidecar = _planted(tmp_path)
    checkpoint = load(model)
    source = sidecar_source(str(sidecar), GradsKind.ABS, load(sidecar))
    result = audit_checkpoint(checkpoint, Policy(), source, rules={RULE.name: RULE})
    health = {h.layer["name"]: h.unsupported_share for h in result.layers}
    assert health["fc1"] == pytest.approx(len(PLANTED) / (UNITS * FAN_IN))
    assert health["fc2"] == 0


def test_weights_are_judged_batch_norm_folded(tmp_path: Path) -> None:
    weights, support = _arrays()
    var = np.ones(UNITS, np.float32)
    big, small = 3, 9
    var[big], var[small] = 0.0025, 2500.0
    # Inference batch norm y = γ(x − μ)/sqrt(var + ε) + β with PyTorch's default ε = 1e-5.
    # reference: torch.nn.BatchNorm1d documentation (eps=1e-05); Ioffe & Szegedy 2015
    scale = 1.0 / np.sqrt(var.astype(np.float64) + 1e-5)
    fc1, grads = weights["fc1.weight"], support["fc1.weight"]
    fc1[big] /= scale[big]  # row 3 looks ordinary once folded ...
    fc1[big, 7] = 0.05  # ... except this one, unremarkable raw, large folded
    fc1[small, 20] = 1.0  # large raw, tiny once folded
    grads[big] *= scale[big]  # folded support s' = s/scale stays ordinary
    grads[small] *= scale[small]
    grads[big, 7] = grads[small, 20] = TINY
    weights.update(
        {
            "bn1.weight": np.ones(UNITS, np.float32),
            "bn1.bias": np.zeros(UNITS, np.float32),
            "bn1.running_mean": np.zeros(UNITS, np.float32),
            "bn1.running_var": var,
        }
    )
    model, sidecar = _write(tmp_path / "bn", weights, support)
    layer = load(model).layer("fc1")
    assert layer is not None and layer.norm is not None and layer.norm.var == "bn1.running_var"
    finding = by_test(audit(model, sidecar), "unsupported")["fc1"]
    assert finding.units == (big,) and finding.evidence["folded"] is True
    (entry,) = finding.evidence["top"]
    assert (entry["unit"], entry["input"]) == (big, 7)
    assert entry["w"] == pytest.approx(0.05 * scale[big], rel=1e-5)
    assert entry["support"] == pytest.approx(TINY / scale[big], rel=1e-5)
    # Without the batch norm, the raw view flags the other weight.
    raw = {k: v for k, v in weights.items() if not k.startswith("bn1.")}
    model, sidecar = _write(tmp_path / "raw", raw, support)
    finding = by_test(audit(model, sidecar), "unsupported")["fc1"]
    assert finding.units == (small,) and finding.evidence["folded"] is False


def _with_moments(
    checkpoint: Checkpoint, moments: dict[str, np.ndarray], **state: object
) -> Checkpoint:
    slots = {
        name: OptimizerSlots(
            first_moment=None,
            second_moment=Tensor(
                f"{name}.exp_avg_sq", v.shape, "f32", TensorRole.OPTIMIZER, reader=lambda v=v: v
            ),
        )
        for name, v in moments.items()
    }
    return replace(checkpoint, optimizer=OptimizerState(slots=slots, source="test", **state))  # type: ignore[arg-type]


def test_optimizer_moments_support_but_do_not_test_equilibrium(tmp_path: Path) -> None:
    model, sidecar = _planted(tmp_path)
    s = load(sidecar)
    beta2, step = 0.999, 50
    # Stored Adam moments are biased: v = (1 − β₂^t)·v̂. reference: Kingma & Ba 2015, Algorithm 1
    moments = {
        name: (s.tensors[name].read_float32().astype(np.float64) ** 2 * (1 - beta2**step)).astype(
            np.float32
        )
        for name in ("fc1.weight", "fc2.weight")
    }
    checkpoint = _with_moments(
        load(model),
        moments,
        kind="adam",
        step=step,
        beta2=beta2,
        weight_decay=0.01,
        decoupled=False,
    )
    source = optimizer_source(checkpoint)
    assert source is not None
    findings, _, _ = run_rules(checkpoint, Policy(), source, rules={RULE.name: RULE})
    flagged = by_test(findings, "unsupported")
    assert set(flagged) == {"fc1"} and flagged["fc1"].evidence["flagged"] == len(PLANTED)
    # optimizer moments cannot stand for |dE/dw|: the equilibrium is a note, not a finding
    assert by_test(findings, "equilibrium") == {}


@pytest.mark.parametrize("slack", [1.0, 10.0])
def test_decoupled_adamw_balances_a_per_weight_coefficient(tmp_path: Path, slack: float) -> None:
    # AdamW stops where |m̂| = wd·(sqrt(v̂)+ε)·|w|.
    # reference: Loshchilov & Hutter 2019, "Decoupled weight decay regularization", Algorithm 2
    rng = np.random.default_rng(3)
    wd, eps = 0.05, 1e-8
    weights = {"fc1.weight": rng.normal(0, 0.3, (16, 24)).astype(np.float32)}
    v_hat = {"fc1.weight": rng.uniform(0.01, 4.0, (16, 24)).astype(np.float32)}
    balance = (
        wd * (np.sqrt(v_hat["fc1.weight"].astype(np.float64)) + eps) * np.abs(weights["fc1.weight"])
    )
    support = {"fc1.weight": (balance / slack).astype(np.float32)}
    model, sidecar = _write(tmp_path, weights, support)
    findings = audit(
        model,
        sidecar,
        tweak=lambda c: _with_moments(
            c, v_hat, kind="adamw", weight_decay=wd, eps=eps, decoupled=True
        ),
    )
    finding = by_test(findings, "equilibrium")["fc1"]
    assert finding.evidence["ratio"] == pytest.approx(slack, rel=1e-4)
    assert finding.severity is (Severity.INFO if slack < 3 else Severity.WARNING)


def test_fisher_support_does_not_test_equilibrium(tmp_path: Path) -> None:
    model, sidecar = _planted(tmp_path)
    notes = RuleNotes()
    findings = audit(model, sidecar, Policy(weight_decay=0.01), kind=GradsKind.FISHER, notes=notes)
    assert by_test(findings, "equilibrium") == {}
    (line,) = notes.lines(["fc1", "fc2"])
    assert "equilibrium ratio not checked: Fisher" in line and "fc1, fc2" in line


def test_no_equilibrium_line_without_a_known_coefficient(tmp_path: Path) -> None:
    model, sidecar = _planted(tmp_path)
    assert by_test(audit(model, sidecar), "equilibrium") == {}
