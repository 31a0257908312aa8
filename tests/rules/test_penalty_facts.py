"""Facts of the trade about weight penalties, checked on models trained here with numpy.

Each test trains a tiny model by full-batch descent (seeded, well under a second), then checks a
published property of the result, through ``unsupported-weight`` where the rule reports it.
Nothing the training produces is hard-coded: tests compare against the stated property.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest

from steelyard.findings import Severity
from steelyard.graph import Checkpoint, Regularizer
from steelyard.policy import Policy
from tests.rules._training import (
    Grads,
    Net,
    audit,
    by_test,
    data_grads,
    init_net,
    ista,
    lp_reweighted,
    lsq_grad,
    ridge_gd,
    save_linear,
    save_net,
    sparse_regression,
    teacher_data,
    train_l2,
)

LAM = 0.01
"""L2 coefficient in the PyTorch convention: lam·w added to the gradient."""
BAND = 3.0
"""The rule's default equilibrium band."""


def _regularized(reg: Regularizer) -> Callable[[Checkpoint], Checkpoint]:
    """Declare a Keras-style kernel regularizer on every layer, as the Keras loaders would."""

    def tweak(checkpoint: Checkpoint) -> Checkpoint:
        return replace(
            checkpoint, layers=tuple(replace(x, regularizer=reg) for x in checkpoint.layers)
        )

    return tweak


def _trained(steps: int, tol: float = 0.0, lam: float = LAM) -> tuple[Net, Grads, float]:
    x, y = teacher_data(0)
    net, norm = train_l2(
        init_net(1, x.shape[1], 12, y.shape[1], scale=0.3), x, y, lam, 1.0, steps, tol
    )
    return net, data_grads(net, x, y), norm


def test_converged_l2_training_balances_data_gradient_and_penalty(tmp_path: Path) -> None:
    # At a minimum of E(w) + (λ/2)·Σw², ∂E/∂w = −λ·w, so λ·|w| / |∂E/∂w| = 1.
    # reference: Krogh & Hertz 1992, "A simple weight decay can improve generalization", NIPS 4
    tol = 1e-5
    net, grads, norm = _trained(20_000, tol)
    assert norm < tol  # trained to convergence, not assumed
    lines = by_test(audit(*save_net(tmp_path, net, grads), Policy(weight_decay=LAM)), "equilibrium")
    assert set(lines) == {"fc1", "fc2"}
    for line in lines.values():
        assert 0.8 <= line.evidence["ratio"] <= 1.25
        assert line.severity is Severity.INFO and line.evidence["lambda_eff"] == pytest.approx(LAM)


def test_a_few_steps_of_l2_training_are_far_from_equilibrium(tmp_path: Path) -> None:
    # Early on the data gradient dominates the small penalty gradient λ·|w|.
    # reference: Krogh & Hertz 1992 (the balance holds only at the minimum)
    net, grads, _ = _trained(3)
    lines = by_test(audit(*save_net(tmp_path, net, grads), Policy(weight_decay=LAM)), "equilibrium")
    assert set(lines) == {"fc1", "fc2"}
    for line in lines.values():
        assert line.evidence["ratio"] < 1 / BAND
        assert line.severity is Severity.WARNING and line.evidence["status"] == "outside"


def test_a_declared_coefficient_that_did_not_train_the_model_is_flagged(tmp_path: Path) -> None:
    # The converged balance is with the λ actually used; ten times that leaves it 10× off.
    # reference: Krogh & Hertz 1992
    net, grads, norm = _trained(20_000, 1e-5)
    assert norm < 1e-5
    lines = by_test(
        audit(*save_net(tmp_path, net, grads), Policy(weight_decay=10 * LAM)), "equilibrium"
    )
    for line in lines.values():
        assert line.evidence["ratio"] > BAND and line.severity is Severity.WARNING


def test_keras_l2_penalty_has_gradient_twice_its_coefficient(tmp_path: Path) -> None:
    # Keras L2(l2) adds l2·Σw² to the loss, so its gradient is 2·l2·w: a model trained with
    # PyTorch-style decay λ = 2·l2 balances the Keras declaration L2(l2), and reads as half a
    # balance when l2 is mistaken for a PyTorch weight decay.
    # reference: keras.regularizers.L2 documentation (loss = l2 * reduce_sum(square(x)))
    l2 = LAM / 2
    net, grads, norm = _trained(20_000, 1e-5, lam=2 * l2)
    assert norm < 1e-5
    model, sidecar = save_net(tmp_path, net, grads)
    keras = by_test(audit(model, sidecar, tweak=_regularized(Regularizer(l2=l2))), "equilibrium")
    assert set(keras) == {"fc1", "fc2"}
    for line in keras.values():
        assert 0.8 <= line.evidence["ratio"] <= 1.25
        assert line.evidence["lambda_eff"] == pytest.approx(2 * l2)
    mistaken = by_test(audit(model, sidecar, Policy(weight_decay=l2)), "equilibrium")
    for line in mistaken.values():
        assert 0.8 <= 2 * line.evidence["ratio"] <= 1.25


def test_proximal_l1_gives_exact_zeros_and_l2_does_not(tmp_path: Path) -> None:
    # Soft-thresholding, the proximal map of the L1 norm, returns exact zeros (ISTA: Beck &
    # Teboulle 2009, "A fast iterative shrinkage-thresholding algorithm for linear inverse
    # problems", SIAM J. Imaging Sci. 2(1)); the lasso solution is sparse (Tibshirani 1996,
    # "Regression shrinkage and selection via the lasso"); the ridge solution
    # (XᵀX/n + λI)⁻¹Xᵀy/n has no exact zeros for generic data (Hoerl & Kennard 1970).
    x, y, truth = sparse_regression(4)
    l1 = 0.1
    lasso = ista(x, y, l1, steps=3000)
    ridge = ridge_gd(x, y, l1, steps=3000)
    # The descent reached the ridge solution. reference: numpy.linalg.solve
    closed = np.linalg.solve(x.T @ x / x.shape[0] + l1 * np.eye(x.shape[1]), x.T @ y / x.shape[0])
    np.testing.assert_allclose(ridge, closed, rtol=1e-8, atol=1e-10)
    zeros_l1 = int(np.count_nonzero(lasso == 0.0))
    assert zeros_l1 >= x.shape[1] // 2  # at least half of the 40 weights are exactly zero
    assert int(np.count_nonzero(ridge == 0.0)) == 0
    assert np.count_nonzero(truth) <= x.shape[1] - zeros_l1  # the true support is not all zeroed
    # Lasso optimality (subgradient condition): |∂E/∂w| <= l1 where w = 0, = l1 elsewhere.
    grad = lsq_grad(lasso, x, y)
    assert np.all(np.abs(grad[lasso == 0.0]) <= l1 * (1 + 1e-6))
    np.testing.assert_allclose(np.abs(grad[lasso != 0.0]), l1, rtol=1e-4)
    # The rule reads the same balance from a Keras L1 declaration: ratio l1/|∂E/∂w| = 1.
    model, sidecar = save_linear(tmp_path, lasso, grad)
    line = by_test(audit(model, sidecar, tweak=_regularized(Regularizer(l1=l1))), "equilibrium")[
        "fc1"
    ]
    assert 0.8 <= line.evidence["ratio"] <= 1.25
    assert 0 < line.evidence["weights"] <= x.shape[1] - zeros_l1  # exact zeros never count


def test_penalties_below_l1_are_sparser_than_l1() -> None:
    # With fewer measurements than weights, an Lp penalty with p < 1 recovers sparse signals
    # that L1 does not: fewer non-zeros, and (being lighter on large weights) a smaller misfit.
    # reference: Chartrand 2007, "Exact reconstruction of sparse signals via nonconvex
    # minimization", IEEE Signal Process. Lett. 14(10); solved by reweighted L1 (Candès, Wakin
    # & Boyd 2008, "Enhancing sparsity by reweighted l1 minimization", J. Fourier Anal. Appl. 14)
    x, y, truth = sparse_regression(1, n=30, inputs=60, active=6)
    lam = 0.05
    lasso = ista(x, y, lam, steps=3000)
    half = lp_reweighted(x, y, lam, p=0.5, rounds=10, steps=1000)

    def misfit(w: np.ndarray) -> float:
        return float(np.mean((x @ w - y) ** 2))

    assert np.count_nonzero(half) < np.count_nonzero(lasso)
    assert misfit(half) <= misfit(lasso)
    assert set(np.flatnonzero(truth)) <= set(np.flatnonzero(half))  # sparser, not just zeroed
