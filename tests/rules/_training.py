"""Tiny full-batch numpy training shared by the rule tests (seeded, float64, milliseconds).

Two models: a 2-layer tanh network with a softmax cross-entropy head (``fc1`` → tanh →
``fc2``), trained by plain full-batch gradient descent with an L2 penalty on the weights
(PyTorch convention: ``lam·w`` added to the gradient, biases not decayed); and linear least
squares, trained with an L2 penalty or with proximal L1 steps (ISTA). Helpers also write the
trained weights and their data gradients as safetensors files under PyTorch names.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from safetensors.numpy import save_file

from steelyard.checkpoint_audit import run_rules
from steelyard.findings import Finding
from steelyard.gradients import GradsKind, sidecar_source
from steelyard.graph import Checkpoint
from steelyard.loaders import load
from steelyard.policy import Policy
from steelyard.rules.base import RuleNotes
from steelyard.rules.unsupported_weight import RULE


@dataclass(frozen=True)
class Net:
    """fc1 [hidden, inputs] → tanh → fc2 [classes, hidden] → softmax."""

    w1: np.ndarray
    b1: np.ndarray
    w2: np.ndarray
    b2: np.ndarray


@dataclass(frozen=True)
class Grads:
    """Gradients of the mean data loss alone (no penalty), shaped like :class:`Net`."""

    w1: np.ndarray
    b1: np.ndarray
    w2: np.ndarray
    b2: np.ndarray


def teacher_data(
    seed: int, n: int = 200, inputs: int = 6, classes: int = 3
) -> tuple[np.ndarray, np.ndarray]:
    """Inputs ~ N(0, I) labelled by a random tanh teacher plus noise; one-hot targets."""
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, inputs))
    t1 = rng.normal(size=(8, inputs))
    t2 = rng.normal(size=(classes, 8))
    logits = np.tanh(x @ t1.T) @ t2.T + 0.5 * rng.normal(size=(n, classes))
    return x, np.eye(classes)[np.argmax(logits, axis=1)]


def init_net(seed: int, inputs: int, hidden: int, classes: int, scale: float = 0.5) -> Net:
    """Gaussian weights of standard deviation ``scale``, zero biases."""
    rng = np.random.default_rng(seed)
    return Net(
        rng.normal(size=(hidden, inputs)) * scale,
        np.zeros(hidden),
        rng.normal(size=(classes, hidden)) * scale,
        np.zeros(classes),
    )


def data_grads(net: Net, x: np.ndarray, y: np.ndarray) -> Grads:
    """Backpropagated gradient of the mean softmax cross-entropy."""
    hidden = np.tanh(x @ net.w1.T + net.b1)
    logits = hidden @ net.w2.T + net.b2
    logits -= logits.max(axis=1, keepdims=True)
    prob = np.exp(logits)
    prob /= prob.sum(axis=1, keepdims=True)
    d_logits = (prob - y) / x.shape[0]
    d_hidden = (d_logits @ net.w2) * (1.0 - hidden * hidden)
    return Grads(d_hidden.T @ x, d_hidden.sum(axis=0), d_logits.T @ hidden, d_logits.sum(axis=0))


def train_l2(
    net: Net, x: np.ndarray, y: np.ndarray, lam: float, lr: float, steps: int, tol: float = 0.0
) -> tuple[Net, float]:
    """Full-batch gradient descent on mean loss + (lam/2)·Σw² over the two weight matrices.

    Stops after ``steps`` or once the norm of the total gradient is below ``tol``; returns the
    net and that final norm, so a test can check convergence instead of assuming it.
    """
    norm = float("inf")
    for _ in range(steps):
        g = data_grads(net, x, y)
        t1, t2 = g.w1 + lam * net.w1, g.w2 + lam * net.w2
        norm = float(np.sqrt(sum(float((a * a).sum()) for a in (t1, t2, g.b1, g.b2))))
        if norm < tol:
            break
        net = Net(net.w1 - lr * t1, net.b1 - lr * g.b1, net.w2 - lr * t2, net.b2 - lr * g.b2)
    return net, norm


def save_net(folder: Path, net: Net, grads: Grads) -> tuple[Path, Path]:
    """``model.safetensors`` (PyTorch names, [out, in]) and a ``grads.safetensors`` sidecar of |∂E/∂w|."""
    folder.mkdir(parents=True, exist_ok=True)
    model, sidecar = folder / "model.safetensors", folder / "grads.safetensors"
    as32 = {
        "fc1.weight": net.w1,
        "fc1.bias": net.b1,
        "fc2.weight": net.w2,
        "fc2.bias": net.b2,
    }
    save_file({k: np.ascontiguousarray(v, np.float32) for k, v in as32.items()}, str(model))
    save_file(
        {
            "fc1.weight": np.abs(grads.w1).astype(np.float32),
            "fc2.weight": np.abs(grads.w2).astype(np.float32),
        },
        str(sidecar),
    )
    return model, sidecar


# ---- linear least squares ---------------------------------------------------------------


def sparse_regression(
    seed: int, n: int = 120, inputs: int = 40, active: int = 5
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """y = X·w* + noise with only ``active`` non-zero entries in w*; returns X, y, w*."""
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, inputs))
    truth = np.zeros(inputs)
    truth[rng.choice(inputs, size=active, replace=False)] = rng.choice([-1.0, 1.0], active) * (
        1.0 + rng.random(active)
    )
    return x, x @ truth + 0.1 * rng.normal(size=n), truth


def lsq_grad(w: np.ndarray, x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Gradient of E(w) = ‖Xw − y‖² / (2n)."""
    return np.asarray(x.T @ (x @ w - y) / x.shape[0])


def lipschitz(x: np.ndarray) -> float:
    """Largest eigenvalue of XᵀX/n, the Lipschitz constant of ∇E (step 1/L is safe)."""
    return float(np.linalg.eigvalsh(x.T @ x / x.shape[0]).max())


def soft_threshold(z: np.ndarray, t: np.ndarray | float) -> np.ndarray:
    """The proximal map of t·|·|: sign(z)·max(|z| − t, 0), exact zeros inside [−t, t]."""
    return np.asarray(np.sign(z) * np.maximum(np.abs(z) - t, 0.0))


def ista(
    x: np.ndarray, y: np.ndarray, l1: np.ndarray | float, steps: int, w: np.ndarray | None = None
) -> np.ndarray:
    """Proximal gradient (ISTA) on E(w) + Σ l1_i·|w_i| with step 1/L (Beck & Teboulle 2009)."""
    step = 1.0 / lipschitz(x)
    w = np.zeros(x.shape[1]) if w is None else w.copy()
    for _ in range(steps):
        w = soft_threshold(w - step * lsq_grad(w, x, y), step * np.asarray(l1))
    return w


def lp_reweighted(
    x: np.ndarray, y: np.ndarray, lam: float, p: float, rounds: int, steps: int, eps: float = 1e-3
) -> np.ndarray:
    """E(w) + lam·Σ|w_i|^p for 0 < p < 1 by majorize-minimize: each round replaces the concave
    penalty by its tangent in |w|, a weighted L1 with l1_i = lam·p·(|w_i| + eps)^(p−1), solved by
    ISTA from the previous round (reweighted L1: Candès, Wakin & Boyd 2008). Starts from the
    plain L1 solution at the same lam.
    """
    w = ista(x, y, lam, steps)
    for _ in range(rounds):
        w = ista(x, y, lam * p * (np.abs(w) + eps) ** (p - 1.0), steps, w=w)
    return w


def ridge_gd(x: np.ndarray, y: np.ndarray, lam: float, steps: int) -> np.ndarray:
    """Plain gradient descent on E(w) + (lam/2)·‖w‖², step 1/(L + lam)."""
    step = 1.0 / (lipschitz(x) + lam)
    w = np.zeros(x.shape[1])
    for _ in range(steps):
        w = w - step * (lsq_grad(w, x, y) + lam * w)
    return w


def save_linear(folder: Path, w: np.ndarray, grad: np.ndarray) -> tuple[Path, Path]:
    """One dense layer ``fc1`` [1, inputs] and its |∂E/∂w| sidecar."""
    folder.mkdir(parents=True, exist_ok=True)
    model, sidecar = folder / "model.safetensors", folder / "grads.safetensors"
    save_file({"fc1.weight": w.reshape(1, -1).astype(np.float32)}, str(model))
    save_file({"fc1.weight": np.abs(grad).reshape(1, -1).astype(np.float32)}, str(sidecar))
    return model, sidecar


# ---- auditing what was trained -----------------------------------------------------------


def audit(
    model: Path,
    sidecar: Path | None,
    policy: Policy | None = None,
    tweak: Callable[[Checkpoint], Checkpoint] | None = None,
    kind: GradsKind = GradsKind.ABS,
    notes: RuleNotes | None = None,
) -> list[Finding]:
    """Run only ``unsupported-weight`` on a saved model with its gradient sidecar (if any);
    what the rule could not do goes to ``notes``."""
    checkpoint = load(model)
    if tweak is not None:
        checkpoint = tweak(checkpoint)
    source = None if sidecar is None else sidecar_source(str(sidecar), kind, load(sidecar))
    findings, _, _ = run_rules(
        checkpoint, policy or Policy(), source, rules={RULE.name: RULE}, notes=notes
    )
    return findings


def by_test(findings: list[Finding], test: str) -> dict[str | None, Finding]:
    """Findings whose evidence ``test`` is ``test`` (unsupported, equilibrium), by layer."""
    return {f.layer: f for f in findings if f.evidence.get("test") == test}


__all__ = [
    "Grads",
    "Net",
    "audit",
    "by_test",
    "data_grads",
    "init_net",
    "ista",
    "lipschitz",
    "lp_reweighted",
    "lsq_grad",
    "ridge_gd",
    "save_linear",
    "save_net",
    "soft_threshold",
    "sparse_regression",
    "teacher_data",
    "train_l2",
]
