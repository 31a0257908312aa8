"""``unsupported-weight``: large weights that received almost no gradient.

**What it checks.** Each layer's weights ``w`` (batch-norm-folded where an inference-form
batch norm follows, ``W' = W·γ/sqrt(var+ε)``, because that is the weight the function uses)
against their *support* ``s``, a per-weight gradient magnitude from a ``--grads`` sidecar or
the optimizer's second moments (:mod:`steelyard.gradients`). Folding rescales unit j by
``a_j = γ_j/sqrt(var_j+ε)``; the chain rule gives ``∂E/∂W'_jk = (∂E/∂W_jk)/a_j``, so the
support is folded the same way, ``s' = s/|a_j|``. A weight is *unsupported* when

* ``|w| >= quantile(|w|, weight-quantile)`` over the layer (default 0.99), and
* ``|w| >= rms-multiple × RMS(w)`` of the layer (default 3), and
* ``s <= quantile(s, support-quantile)`` over the layer (default 0.05).

Each flagged weight is scored by its optimal-brain-damage saliency ``½·F·w²`` with the
diagonal Fisher / Hessian approximated by ``F ≈ s²`` (LeCun, Denker & Solla 1990, "Optimal
Brain Damage", NIPS 2): the second-order estimate of how much the loss rises when the weight
is set to zero. The saliency is the same in raw and folded form (``s'·w' = s·w``).

**Why it matters.** A weight far larger than its neighbours that the loss barely pulls on
was not put there by the data: it is a relic of initialisation, of an early phase of training,
of a rare input, or of a bug, and it still multiplies its input at inference. Its small
saliency says removing it would hardly change the training loss; its size says it can change
the output a lot on inputs unlike the training data.

**The equilibrium ratio.** When an L2 coefficient is known, each layer also gets one line with
its equilibrium ratio: the median, over weights with ``|w| >= negligible × RMS(w)`` (default
0.1; exact zeros never count), of ``(λ_eff·|w| + l1) / |∂E/∂w|`` on the *raw* weights (the
penalty acts on the stored weights, not the folded ones). At a minimum of ``E(w) + penalty``
the data gradient balances the penalty gradient, ``|∂E/∂w| = λ_eff·|w|`` (Krogh & Hertz 1992,
"A simple weight decay can improve generalization", NIPS 4), so a converged L2 layer has ratio
1; with an L1 term the balance of a non-zero weight is ``|∂E/∂w| = λ_eff·|w| + l1`` (the
subgradient condition). A ratio outside ``[1/equilibrium-band, equilibrium-band]`` (default 3)
is a warning: above the band the penalty outweighs the data (weights were still decaying, or
the declared λ is larger than the one that trained them), below it the data outweighs the
penalty (still learning, or λ was smaller). Inside the band the line is info.

Where λ_eff comes from, first match wins:

* the layer's Keras ``L2``/``L1L2`` kernel regularizer, penalty ``l1·Σ|w| + l2·Σw²``, gradient
  ``l1·sign(w) + 2·l2·w``: ``λ_eff = 2·l2``, ``l1`` as declared;
* the policy's ``weight-decay`` wd, PyTorch convention (``wd·w`` added to the gradient):
  ``λ_eff = wd``;
* the checkpoint's optimizer ``weight_decay`` wd when the decay is coupled (SGD, Adam,
  RMSprop with decay in the gradient): ``λ_eff = wd``;
* decoupled AdamW decay (Loshchilov & Hutter 2019, "Decoupled weight decay regularization",
  ICLR) updates ``w ← w − lr·(m̂/(sqrt(v̂)+ε) + wd·w)``, which stops moving where
  ``|m̂| = wd·(sqrt(v̂)+ε)·|w|``. With ``m̂ ≈ ∂E/∂w`` that is an L2 balance with a *per-weight*
  coefficient ``λ_eff = wd·(sqrt(v̂)+ε)`` (bias-corrected ``v̂``), so it needs the checkpoint's
  second moments as well as a sidecar; the reported λ_eff is the layer median.

**What the support must hold for the equilibrium.** The balance compares the penalty with the
*data* gradient ``|∂E/∂w|``, without the penalty term. A ``--grads`` sidecar of kind ``abs``
holds it directly (``rms`` and ``sq`` too; over several batches all three bound the mean
gradient from above, and for one full-batch gradient they equal it); the sidecar must be
taken from the data loss alone. Kind ``fisher`` is not used: per-example gradients do not
cancel, so they overstate ``|∂E/∂w|``. Optimizer second moments are not used either: with
coupled decay they are the RMS of the *total* gradient ``∂E/∂w + λ·w``, whose mean is what
vanishes at the balance, so they measure minibatch noise there; with AdamW they are the scale
the balance is defined by. Layers whose support is of such a kind are listed in a note of the
report saying the equilibrium was not checked. (Unsupported weights are still judged on such
support.)

**Without gradients.** With no gradient source, or one that matches no layer's weights, the
rule adds one note to the report saying it did not run and how to give it support:
``--grads FILE`` or a checkpoint saved with its optimizer state. What a rule could not do is
never a finding: it cannot fail a gate, and SARIF and JUnit do not show it as a result.

**Evidence.** Unsupported weights, one finding per layer: ``flagged`` (the count, which the
audit's health table reads), ``top`` (up to 10 flagged weights by ascending saliency, each
``unit``, ``input`` (flat fan-in index, input channel × kernel position), ``w``, ``support``,
``saliency``; folded values when ``folded``), ``total_saliency``, ``weight_limit``,
``support_limit``, ``rms``, ``essential_kept`` (large weights left out because
``essential-weight`` marks them: weights far beyond their row and column are never offered
for pruning, however little gradient they get). Equilibrium: ``ratio`` (None when infinite), ``lambda_eff``,
``l1``, ``penalty_source``, ``weights`` counted, ``quartiles``, ``band``, ``status``.

**Severity and score.** Unsupported weights: warning, score ``scoring.score(k/units,
max|w|/(rms-multiple·RMS))`` for k units holding flagged weights. Equilibrium outside the
band: warning, score ``scoring.score(counted/size, max(r, 1/r)/band)``.

**What to do.** Look at the inputs the flagged weights read: if they are (almost) never active
in the data, the weight is free to be anything; prune it (its saliency says the loss will
barely move), constrain or decay it, or fix the data pipeline that starves the input. For an
equilibrium warning, train longer, or declare the λ that was actually used.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass

import numpy as np

from steelyard.findings import Finding, Severity
from steelyard.gradients import GradientSource, GradsKind, optimizer_source
from steelyard.graph import Layer
from steelyard.numbers import count, measured
from steelyard.rules.base import (
    AuditContext,
    HealthColumn,
    RuleSettings,
    RuleSpec,
    fraction,
    layer_finding,
    threshold,
)
from steelyard.rules.essential_weight import essential_weights
from steelyard.rules.scoring import score
from steelyard.stats.folding import fold_scale
from steelyard.stats.numerics import distinct, median_of, quantile_of

_TOP = 10
_ADAM_EPS = 1e-8
"""ε of Adam/AdamW when the checkpoint does not say (the usual default)."""


@dataclass(frozen=True)
class UnsupportedWeightSettings:
    """Thresholds of ``unsupported-weight``."""

    weight_quantile: float = fraction(0.99)
    rms_multiple: float = threshold(3.0)
    support_quantile: float = fraction(0.05)
    equilibrium_band: float = threshold(3.0)
    negligible: float = threshold(0.1)


@dataclass(frozen=True)
class _Penalty:
    """The penalty gradient λ_eff·w + l1·sign(w) known for one layer."""

    lam: float | np.ndarray
    """λ_eff, a number or (decoupled AdamW) one value per weight ``[units, fan_in]``."""
    l1: float
    source: str


def _unsupported(
    ctx: AuditContext, limits: UnsupportedWeightSettings, layer: Layer, support: np.ndarray
) -> Iterator[Finding]:
    folded = ctx.stats.folded(layer)
    weights = np.asarray(folded.matrix, np.float64)
    grads = np.asarray(support, np.float64)
    if folded.folded:
        # In float64, like the rest of this test's arithmetic.
        scale = fold_scale(layer, ctx.stats.tensor, np.float64)
        if scale is not None:
            with np.errstate(divide="ignore", invalid="ignore"):
                grads = grads / np.abs(scale)[:, None]
    magnitude = np.abs(weights)
    finite = np.isfinite(magnitude) & np.isfinite(grads)
    if int(finite.sum()) < 2:
        return
    rms = float(np.sqrt(np.mean(magnitude[finite] ** 2)))
    if not rms > 0:
        return
    multiple = limits.rms_multiple
    weight_limit = max(
        float(quantile_of(magnitude[finite], limits.weight_quantile)), multiple * rms
    )
    support_limit = float(quantile_of(grads[finite], limits.support_quantile))
    hit = finite & (magnitude >= weight_limit) & (grads <= support_limit)
    # Never advise pruning a weight essential-weight marks (a model can depend on it).
    essential = essential_weights(ctx, layer)
    kept = int(hit[essential.units, essential.inputs].sum()) if essential.units.size else 0
    if kept:
        hit[essential.units, essential.inputs] = False
    rows, cols = np.nonzero(hit)
    if rows.size == 0:
        return
    w_hit, s_hit = weights[rows, cols], grads[rows, cols]
    # Optimal brain damage: δE ≈ ½·h_kk·w_k² with the diagonal h_kk ≈ F ≈ s² (LeCun et al. 1990).
    saliency = 0.5 * s_hit**2 * w_hit**2
    order = np.lexsort((-np.abs(w_hit), saliency))[:_TOP]
    units = tuple(int(u) for u in distinct(rows))
    largest = float(np.abs(w_hit).max())
    total = float(saliency.sum())
    where = "folded " if folded.folded else ""
    yield layer_finding(
        RULE.name,
        layer,
        severity=Severity.WARNING,
        units=units,
        score=score(len(units) / layer.units, largest / (multiple * rms)),
        message=(
            f"{count(rows.size)} {where}weight{'s' if rows.size != 1 else ''} in "
            f"{count(len(units))} of {count(layer.units)} units reach |w| up to "
            f"{measured(largest)} (limit {measured(weight_limit)}, RMS {measured(rms)}) with "
            f"gradient support <= {measured(support_limit)}; total optimal-brain-damage "
            f"saliency {measured(total)}"
        ),
        hint="check whether the inputs these weights read are ever active in the data; prune, "
        "constrain or decay them, or fix the pipeline that starves those inputs",
        evidence={
            "test": "unsupported",
            "flagged": int(rows.size),
            "top": [
                {
                    "unit": int(rows[i]),
                    "input": int(cols[i]),
                    "w": float(w_hit[i]),
                    "support": float(s_hit[i]),
                    "saliency": float(saliency[i]),
                }
                for i in order
            ],
            "total_saliency": total,
            "weight_limit": weight_limit,
            "support_limit": support_limit,
            "rms": rms,
            "folded": folded.folded,
            "essential_kept": kept,
        },
    )


def _penalty(ctx: AuditContext, layer: Layer) -> _Penalty | str | None:
    """The layer's known penalty, a reason it cannot be used, or None when none is known."""
    reg = layer.regularizer
    if reg is not None and (reg.l2 > 0 or reg.l1 > 0):
        # Keras: l1·Σ|w| + l2·Σw² has gradient l1·sign(w) + 2·l2·w.
        return _Penalty(2.0 * reg.l2, reg.l1, f"kernel regularizer (l1={reg.l1:g}, l2={reg.l2:g})")
    if ctx.policy.weight_decay is not None and ctx.policy.weight_decay > 0:
        return _Penalty(
            float(ctx.policy.weight_decay), 0.0, f"policy weight-decay {ctx.policy.weight_decay:g}"
        )
    state = ctx.checkpoint.optimizer
    if state is None or not state.weight_decay or state.weight_decay <= 0:
        return None
    wd = float(state.weight_decay)
    decoupled = state.decoupled if state.decoupled is not None else state.kind == "adamw"
    if not decoupled or state.kind == "sgd":
        # For plain SGD decoupled and coupled decay are the same update.
        return _Penalty(wd, 0.0, f"{state.kind} weight_decay {wd:g} (coupled)")
    moments = optimizer_source(ctx.checkpoint)
    root_v = None if moments is None else moments.support(layer)
    if root_v is None:
        return (
            f"decoupled {state.kind} decay {wd:g} balances wd·(sqrt(v̂)+ε)·|w|, and the "
            "checkpoint holds no second moments for this layer"
        )
    eps = state.eps if state.eps is not None else _ADAM_EPS
    return _Penalty(
        wd * (root_v + eps), 0.0, f"decoupled {state.kind} decay {wd:g}: wd·(sqrt(v̂)+ε)"
    )


def _support_reason(source: GradientSource, layer: Layer) -> str | None:
    """Why this layer's support cannot stand for |∂E/∂w|, or None when it can."""
    if not source.from_sidecar(layer):
        return (
            "support comes from optimizer second moments, which hold the RMS of the total "
            "gradient (or set the AdamW scale), not the data gradient |∂E/∂w|"
        )
    if source.kind is GradsKind.FISHER:
        return (
            "Fisher support sums per-example gradients that do not cancel, so it overstates |∂E/∂w|"
        )
    return None


def _equilibrium(
    ctx: AuditContext,
    limits: UnsupportedWeightSettings,
    layer: Layer,
    support: np.ndarray,
    source: GradientSource,
) -> Iterator[Finding]:
    penalty = _penalty(ctx, layer)
    if penalty is None:
        return
    reason = penalty if isinstance(penalty, str) else _support_reason(source, layer)
    base = {"test": "equilibrium"}
    if reason is not None:
        # Not a problem of the model: a note of the report, never a finding.
        ctx.notes.add(RULE.name, f"equilibrium ratio not checked: {reason}", layer.name)
        return
    assert isinstance(penalty, _Penalty)
    weights = np.asarray(ctx.stats.matrix(layer), np.float64)
    grads = np.asarray(support, np.float64)
    lam = np.broadcast_to(np.asarray(penalty.lam, np.float64), weights.shape)
    magnitude = np.abs(weights)
    finite = np.isfinite(magnitude) & np.isfinite(grads) & np.isfinite(lam)
    if not finite.any():
        return
    rms = float(np.sqrt(np.mean(magnitude[finite] ** 2)))
    counted = (
        finite & (magnitude > 0) & (magnitude >= limits.negligible * rms)
    )
    if not counted.any():
        return
    pull = lam[counted] * magnitude[counted] + penalty.l1
    with np.errstate(divide="ignore", invalid="ignore"):
        ratios = np.where(grads[counted] > 0, pull / grads[counted], np.inf)
    ratio = median_of(ratios)
    q25, q75 = (float(q) for q in quantile_of(ratios, [0.25, 0.75]))
    band = limits.equilibrium_band
    inside = 1.0 / band <= ratio <= band
    lam_eff = median_of(lam[counted])
    shown = measured(ratio) if np.isfinite(ratio) else "infinite"
    message = (
        f"equilibrium ratio (λ_eff·|w| + l1)/|∂E/∂w| = {shown} (median over {count(int(counted.sum()))} "
        f"weights, λ_eff = {measured(lam_eff)} from {penalty.source}), "
        f"{'inside' if inside else 'outside'} [{measured(1 / band)}, {measured(band)}]"
    )
    if inside:
        hint = "informational: the data gradient balances the declared penalty"
    elif ratio > band:
        hint = (
            "the penalty outweighs the data gradient: train longer, or declare the smaller "
            "weight decay or regularizer strength that was really used"
        )
    else:
        hint = (
            "the data gradient outweighs the penalty: train longer, or declare the larger "
            "weight decay or regularizer strength that was really used"
        )
    excess = max(ratio, 1.0 / ratio) / band if ratio > 0 else float("inf")
    yield layer_finding(
        RULE.name,
        layer,
        severity=Severity.INFO if inside else Severity.WARNING,
        score=0.0 if inside else score(int(counted.sum()) / weights.size, excess),
        message=message,
        hint=hint,
        evidence={
            **base,
            "status": "inside" if inside else "outside",
            "ratio": ratio if np.isfinite(ratio) else None,
            "quartiles": [q if np.isfinite(q) else None for q in (q25, q75)],
            "lambda_eff": lam_eff,
            "l1": penalty.l1,
            "penalty_source": penalty.source,
            "weights": int(counted.sum()),
            "band": band,
        },
    )


def _not_run(source: GradientSource | None) -> str:
    if source is None:
        why = "no gradient source was given"
    else:
        why = f"the gradient source ({source.description}) matched no layer's weights"
    return (
        f"did not run: {why}; pass --grads FILE (per-weight gradient statistics under the "
        "model's tensor names) or audit a checkpoint saved with its optimizer state"
    )


def _support(ctx: AuditContext, layer: Layer) -> np.ndarray | None:
    """The layer's gradient support when there is one of the weight's shape, else None."""
    source = ctx.gradients
    if source is None:
        return None
    support = source.support(layer)
    if support is None or support.shape != (layer.units, layer.fan_in):
        return None
    return support


class _Supported:
    """Whether any layer the rule ran on had gradient support (set from worker threads; a
    flag only ever set to True needs no lock)."""

    def __init__(self) -> None:
        self.any = False


def _supported(ctx: AuditContext) -> _Supported:
    return ctx.stats.shared(f"{RULE.name}:supported", _Supported)


def check_layer(
    ctx: AuditContext, settings: RuleSettings[UnsupportedWeightSettings], layer: Layer
) -> Iterator[Finding]:
    """Yield one layer's unsupported large weights and equilibrium ratio."""
    support = _support(ctx, layer)
    if support is None or ctx.gradients is None:
        return
    _supported(ctx).any = True
    limits = settings.for_layer(layer)
    yield from _unsupported(ctx, limits, layer, support)
    yield from _equilibrium(ctx, limits, layer, support, ctx.gradients)


def finish(
    ctx: AuditContext, settings: RuleSettings[UnsupportedWeightSettings]
) -> Iterator[Finding]:
    """The one note when no layer had gradient support (a note, not a finding)."""
    if ctx.gradients is not None and _supported(ctx).any:
        return
    ctx.notes.add(RULE.name, _not_run(ctx.gradients))
    yield from ()


def flagged_share(layer: Layer, findings: Sequence[Finding]) -> float:
    """Share of the layer's weights the rule flagged unsupported (a health column)."""
    flagged = sum(int(f.evidence["flagged"]) for f in findings if "flagged" in f.evidence)
    return flagged / max(1, layer.units * layer.fan_in)


RULE = RuleSpec(
    name="unsupported-weight",
    severity=Severity.WARNING,
    settings=UnsupportedWeightSettings,
    summary="a large weight the loss barely pulls on was not put there by the data, yet still "
    "multiplies its input at inference",
    doc=__doc__ or "",
    per_layer=check_layer,
    finish=finish,
    health=(HealthColumn("unsupported_share", flagged_share, needs_gradients=True),),
)
