"""``nonfinite``: NaN or ±Inf anywhere in a floating-point tensor.

**What it checks.** Every floating tensor of the checkpoint, weights, biases, normalisation
parameters, running statistics, and the optimizer state stored with it, is scanned for NaN,
+Inf and −Inf, as the audit reads them in float32: a value stored in float64 beyond the
float32 range (|x| > 3.4e38) counts as ±Inf, which is what any float32, bf16 or fp16 reader
gets, and the other rules could not judge it.

**Why it matters.** One non-finite weight makes every output that depends on it non-finite
(IEEE 754 arithmetic propagates NaN through sums and products), so the model is broken for
every input that reaches that unit. Non-finite optimizer state means training diverged even if
the weights still look finite.

**Evidence.** Counts of NaN, +Inf and −Inf, the first positions (stored index), and, when the
tensor belongs to a layer, the units that hold them: the rows of the layer's canonical
``[out, in/groups, *kernel]`` view with a non-finite value, whatever the stored layout (ONNX
Conv ``[out, in/g, kh, kw]``, ConvTranspose ``[in, out/g, kh, kw]``, Keras kernels
``[kh, kw, in, out]``, a Gemm with ``transB = 0``). They come from the loader's map of stored
positions to the view when it has one, else from the view itself. A non-finite quantization
scale or weight-norm gain names the units whose weights it makes non-finite.

**Severity and score.** Always an error. Score = ``scoring.score(share, 1e6)``, where share is
the fraction of the tensor's elements that are non-finite, so a fully NaN tensor ranks first.

**What to do.** Do not ship the checkpoint. Go back to the last checkpoint whose audit passed,
and look for the step where the loss became NaN (learning rate, mixed-precision overflow,
division by a zero variance).
"""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np

from steelyard.dtypes import FLOAT_ITEMSIZE
from steelyard.findings import Finding, Severity
from steelyard.graph import Layer, Tensor, TensorRole
from steelyard.numbers import count
from steelyard.rules.base import AuditContext, NoSettings, RuleSettings, RuleSpec
from steelyard.rules.scoring import score

_MAX_POSITIONS = 5


def _owners(ctx: AuditContext) -> dict[str, list[tuple[Layer, str]]]:
    """Tensor name → (layer, how the tensor relates to the layer's units)."""
    owners: dict[str, list[tuple[Layer, str]]] = {}
    for layer in ctx.checkpoint.layers:
        owners.setdefault(layer.weight, []).append((layer, "weight"))
        if layer.bias:
            owners.setdefault(layer.bias, []).append((layer, "bias"))
        if layer.norm is not None:
            for name in (layer.norm.scale, layer.norm.shift, layer.norm.mean, layer.norm.var):
                if name:
                    owners.setdefault(name, []).append((layer, "per-unit"))
        for name in layer.aux:
            owners.setdefault(name, []).append((layer, "made-from"))
    return owners


def _view_rows(layer: Layer) -> np.ndarray:
    """Units whose canonical weights hold a non-finite value, read from the layer's own
    canonical view: the loader that built the view knows the stored layout (ONNX Conv
    [out, in/g, *k], ConvTranspose [in, out/g, *k], Keras kernels [*k, in, out], ...), so
    this needs no ``orient``. NaN and ±Inf survive the view's reshapes, transposes and
    widening to float32, and any scale or gain the view multiplies in."""
    view = np.asarray(layer.weight_view())
    return np.asarray(~np.isfinite(view.reshape(layer.units, -1)).all(axis=1))


def _units(layer: Layer, relation: str, bad: np.ndarray) -> tuple[int, ...] | None:
    try:
        if relation == "weight" and layer.orient is not None:
            rows = np.asarray(layer.orient(bad)).reshape(layer.units, -1).any(axis=1)
        elif relation in ("weight", "made-from"):
            rows = _view_rows(layer)
        elif (relation == "bias" and layer.gate is None and bad.size == layer.units) or (
            relation == "per-unit" and bad.size == layer.units
        ):
            rows = bad.reshape(layer.units)
        else:
            return None
    except ValueError:
        return None
    return tuple(int(u) for u in np.flatnonzero(rows))


def check(ctx: AuditContext, settings: RuleSettings[NoSettings]) -> Iterator[Finding]:
    """Yield one error per tensor holding NaN or ±Inf."""
    owners = _owners(ctx)
    candidates: list[tuple[str, Tensor, str]] = [
        (name, t, "model")
        for name, t in ctx.checkpoint.tensors.items()
        if t.role is TensorRole.PARAMETER
    ]
    state = ctx.checkpoint.optimizer
    if state is not None:
        for name, slots in state.slots.items():
            for slot_name, slot in (
                ("first moment", slots.first_moment),
                ("second moment", slots.second_moment),
            ):
                if slot is not None:
                    candidates.append((name, slot, f"optimizer {slot_name}"))
    for name, tensor, source in candidates:
        # The counts come from the audit's one pass over every tensor; only a tensor that
        # holds non-finite values is read again, for positions and units.
        found = ctx.stats.nonfinite_scan(tensor)
        if found is None:
            continue
        bad, nan, pos, neg = found.bad, found.nan, found.posinf, found.neginf
        total = nan + pos + neg
        positions = [list(map(int, p)) for p in np.argwhere(bad)[:_MAX_POSITIONS]]
        layers = owners.get(name, []) if source == "model" else []
        units: set[int] = set()
        layer_name: str | None = None
        for layer, relation in layers:
            hit = _units(layer, relation, bad)
            if hit:
                units.update(hit)
                layer_name = layer_name or layer.name
        if layers and layer_name is None:
            layer_name = layers[0][0].name
        what = f"{source} tensor {tensor.name!r}" if source != "model" else f"tensor {name!r}"
        yield Finding(
            rule=RULE.name,
            severity=Severity.ERROR,
            layer=layer_name,
            tensor=name if source == "model" else f"{name} ({source})",
            units=tuple(sorted(units)),
            score=score(total / max(1, bad.size), 1e6),
            message=(
                f"{what} holds {count(total)} non-finite value{'s' if total != 1 else ''} "
                f"({count(nan)} NaN, {count(pos)} +Inf, {count(neg)} −Inf) out of {count(bad.size)}"
                + (
                    f"; stored as {tensor.dtype}, values beyond the float32 range count as ±Inf"
                    if FLOAT_ITEMSIZE.get(tensor.dtype, 4) > 4
                    else ""
                )
            ),
            hint="do not ship this checkpoint; find the training step where values diverged "
            "and restart from the last checkpoint that passed",
            evidence={
                "nan": nan,
                "posinf": pos,
                "neginf": neg,
                "elements": int(bad.size),
                "first_positions": positions,
                "source": source,
            },
        )


RULE = RuleSpec(
    name="nonfinite",
    severity=Severity.ERROR,
    summary="NaN or ±Inf in a weight, bias, norm statistic or optimizer state breaks every output that depends on it",
    doc=__doc__ or "",
    whole=check,
    tensor_scan=True,
)
