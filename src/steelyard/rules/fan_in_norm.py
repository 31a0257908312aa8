"""``fan-in-norm``: a unit whose incoming weight vector has grown far past its neighbours'.

**What it checks.** For each unit (row of the canonical view ``W[out, fan_in]``; for
convolutions over input channels × kernel) the L2 norm ‖w_j‖ of its incoming weights:

* *relative*: ‖w_j‖ > ``ratio`` × the layer's median row norm (default 8);
* *max-norm*: ‖w_j‖ > ``max-norm`` when the policy sets one (default unset). Max-norm
  constraints with c around 3 to 4 are the usual practice with dropout (Srivastava et al.
  2014, "Dropout: a simple way to prevent neural networks from overfitting", JMLR 15).

Embeddings are skipped unless ``include-embeddings`` is true: a token row's norm tracks how
often the token was seen, not a defect.

**Why it matters.** A unit with a huge fan-in norm responds to small input changes with huge
output changes: it dominates its layer, amplifies noise, and is what an L2 penalty or a
max-norm constraint exists to prevent.

**When it is only info.**

* *Normalised*: where a batch, layer or group normalisation follows the layer, the function
  does not depend on the scale of the raw incoming weights, so a raw outlier is at most info.
* *Rescalable*: where the activation is positively homogeneous (ReLU, leaky ReLU, identity)
  and no normalisation sits between, scaling unit j's incoming row by a > 0 and every
  consumer's column for j by 1/a leaves the function unchanged (the symmetry cross-layer
  equalisation uses, Nagel et al. 2019, "Data-free quantization through weight equalization
  and bias correction", ICCV). When the consumers' columns for j are correspondingly small,
  i.e. (‖w_j‖/median_in)·(‖u_j‖/median_out) <= ``rescalable-product`` (default 2), the unit is
  *rescalable* and the finding is info; its balancing factor is a = sqrt(‖u_j‖ / ‖w_j‖), which
  gives both sides the norm sqrt(‖w_j‖·‖u_j‖).

**Severity and score.** Warning (info as above). Score = ``scoring.score(k/units,
max_norm/limit)`` for k flagged units.

**What to do.** Retrain with weight decay or a max-norm constraint on the layer, lower the
learning rate for it, or, for rescalable units, rebalance with the factor given.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np

from steelyard.findings import Finding, Severity
from steelyard.graph import Layer, LayerKind
from steelyard.numbers import count, measured
from steelyard.rules.base import AuditContext, RuleSettings, RuleSpec, layer_finding, threshold
from steelyard.rules.scoring import score
from steelyard.stats.numerics import median_of

_TOP = 10



@dataclass(frozen=True)
class FanInNormSettings:
    """Thresholds of ``fan-in-norm``."""

    ratio: float = threshold(8.0)
    max_norm: float | None = threshold(None)
    rescalable_product: float = threshold(2.0)
    include_embeddings: bool = threshold(False)


def _consumer_norms(ctx: AuditContext, layer: Layer) -> np.ndarray | None:
    """‖u_j‖ over every consumer's columns for unit j, each consumer scaled by its median."""
    consumers = ctx.stats.consumers(layer)
    if not consumers:
        return None
    total = np.zeros(layer.units)
    for consumer in consumers:
        norms = ctx.stats.column_norms(layer, consumer)
        if norms is None:
            return None
        total += norms**2
    return np.sqrt(total)


def _relative(ctx: AuditContext, limits: FanInNormSettings, layer: Layer) -> Iterator[Finding]:
    norms = ctx.stats.row_norms(layer)
    finite = norms[np.isfinite(norms)]
    if finite.size < 2:
        return
    median = median_of(finite)
    ratio_limit = limits.ratio
    absolute = limits.max_norm
    tests: list[tuple[str, float]] = []
    if median > 0:
        tests.append(("relative", ratio_limit * median))
    if absolute is not None and absolute > 0:
        tests.append(("max-norm", absolute))
    out_norms = None
    if layer.norm is None and layer.activation.positive_homogeneous:
        out_norms = _consumer_norms(ctx, layer)
    for test, limit in tests:
        hit = np.flatnonzero(np.isfinite(norms) & (norms > limit))
        if hit.size == 0:
            continue
        severity = Severity.WARNING
        status = "outlier"
        evidence: dict[str, object] = {
            "test": test,
            "limit": limit,
            "median": median,
            "largest": float(norms[hit].max()),
        }
        if layer.norm is not None:
            severity, status = Severity.INFO, "normalised"
        elif out_norms is not None and test == "relative":
            out_median = median_of(out_norms)
            product = (
                (norms[hit] / median) * (out_norms[hit] / out_median) if out_median > 0 else None
            )
            if product is not None and bool(
                np.all(product <= limits.rescalable_product)
            ):
                severity, status = Severity.INFO, "rescalable"
                factors = np.sqrt(out_norms[hit] / np.maximum(norms[hit], 1e-30))
                order = np.argsort(-norms[hit])[:_TOP]
                evidence["balancing_factor"] = {str(int(hit[i])): float(factors[i]) for i in order}
        order = np.argsort(-norms[hit])[:_TOP]
        evidence["norms"] = {str(int(hit[i])): float(norms[hit][i]) for i in order}
        evidence["status"] = status
        word = "the layer's median" if test == "relative" else "the policy's max-norm"
        limit_text = (
            f"{ratio_limit:g} × median {measured(median)} = {measured(limit)}"
            if test == "relative"
            else f"{limit:g}"
        )
        message = (
            f"{count(hit.size)} of {count(layer.units)} units have incoming L2 norm up to "
            f"{measured(float(norms[hit].max()))}, past {word} limit ({limit_text})"
        )
        if status == "normalised":
            message += "; a normalisation follows, so the raw scale does not change the function"
            hint = "informational: judge this layer after its normalisation"
        elif status == "rescalable":
            message += (
                "; the consumers' columns are correspondingly small, so the units are rescalable"
            )
            hint = (
                "rebalance: multiply each unit's incoming weights by its balancing factor (in "
                "the evidence) and divide the weights its consumers read from it by the same factor"
            )
        else:
            hint = "retrain with weight decay or a max-norm constraint on this layer, or lower its learning rate"
        yield layer_finding(
            RULE.name,
            layer,
            severity=severity,
            units=[int(u) for u in hit],
            score=score(hit.size / layer.units, float(norms[hit].max()) / limit),
            message=message,
            hint=hint,
            evidence=evidence,
        )


def check_layer(
    ctx: AuditContext, settings: RuleSettings[FanInNormSettings], layer: Layer
) -> Iterator[Finding]:
    """Yield one layer's outlier fan-in norms."""
    limits = settings.for_layer(layer)
    if layer.kind is LayerKind.EMBEDDING and not limits.include_embeddings:
        return
    yield from _relative(ctx, limits, layer)


RULE = RuleSpec(
    name="fan-in-norm",
    severity=Severity.WARNING,
    settings=FanInNormSettings,
    summary="a unit whose incoming weights grew far past its neighbours' dominates its layer and amplifies noise",
    doc=__doc__ or "",
    per_layer=check_layer,
)
