"""``head-circuits``: attention heads that are idle, twins of another head, or dominate their
layer, judged on their query-key and output-value circuits.

**Which heads.** The heads of every attention block the transformer structure recognised
(``steelyard layers`` lists them as ``unit_groups``; see docs/transformers.md): query head
``h`` owns query rows ``W_Q,h [d_h, d]`` and output columns ``W_O,h [d, d_v]``, and reads the
key and value rows ``W_K,g``, ``W_V,g`` of its key/value head ``g`` (shared under grouped-query
attention). Blocks without a head count (no ``config.json`` or GGUF metadata) are not judged;
the report's notes say why.

**What it measures.** Per head: the Frobenius norms of its q, k, v rows and o columns, and of
its two circuits (Elhage et al. 2021, "A Mathematical Framework for Transformer Circuits",
Transformer Circuits Thread): the query-key circuit ``QK_h = W_Q,hᵀ·W_K,g`` (which positions
attend to which) and the output-value circuit ``OV_h = W_O,h·W_V,g`` (what the head writes into
the residual stream once it has attended). Both are ``d × d`` matrices of rank ``d_h`` and are
never formed: ``‖QK_h‖_F² = ⟨W_Q W_Qᵀ, W_K W_Kᵀ⟩`` and ``‖OV_h‖_F² = ⟨W_Oᵀ W_O, W_V W_Vᵀ⟩`` from
the small ``d_h × d_h`` Gram matrices, their singular values from the same Gram matrices, and a
seeded two-sided ``64 × 64`` sketch ``Ψ·A·Ω`` of each circuit that factorises per projection
(see ``rules/_circuits.py``), so each projection is read once, while its layer is in memory.
Attention's output is unchanged by ``W_Q → R·W_Q, W_K → R⁻ᵀ·W_K`` and ``W_V → S·W_V,
W_O → W_O·S⁻¹`` for any invertible ``R``, ``S`` on the head's own width (without rotary
embeddings; with them, for ``R`` commuting with the rotations); the circuits, and so every
measure here, are invariant under these symmetries, which raw rows are not. Rotary embeddings
make the query-key form position-dependent; ``QK_h`` is its value at relative position 0.
Biases are left out.

**Findings** (per block; ``median`` over the block's heads):

1. **idle head**: ``‖OV_h‖ ≤ idle-share × median ‖OV‖`` (idle-share 0.05): whatever the head
   attends to, it writes next to nothing; it can be pruned with no loss (Michel, Levy & Neubig
   2019, "Are Sixteen Heads Really Better than One?", NeurIPS; Voita et al. 2019, "Analyzing
   Multi-Head Self-Attention: Specialized Heads Do the Heavy Lifting, the Rest Can Be
   Pruned", ACL, found most heads of trained translation models prunable).
2. **twin heads**: two non-idle heads of one block whose circuits agree up to the symmetries:
   sketch cosine of both ``QK`` and ``OV`` at least ``twin-cosine`` (0.95) and singular values
   within ``twin-spectrum`` (0.1, relative distance ``‖σ_a − σ_b‖/max‖σ‖``) for both circuits.
   Such heads compute the same thing twice (a copied head, a head duplicated during
   initialisation or upcycling): one of them is redundant capacity.
3. **dominant head**: ``‖OV_h‖ ≥ dominant-ratio × median of the other heads' ‖OV‖``
   (dominant-ratio 10): one head carries the layer, which makes the layer fragile under
   pruning and quantization of that head (and can signal an attention sink or an outlier
   feature).

Findings name the head (``head 3 of model.layers.2.self_attn``; ``part`` ``head 3``) and are
located at the block's output projection, where the thresholds are resolved too (an
``[[override]]`` matching that layer applies to the whole block).

**Why it matters.** Heads are the unit in which attention is pruned, distilled and
quantized. Michel et al. 2019 and Voita et al. 2019 showed that many heads of trained models
can be removed with little loss, so finding the ones that already do nothing (idle) or
repeat another (twins) is the cheap part of compression; a head that dominates its layer is
the opposite case: removing or coarsely quantizing it would cost the most.

**Evidence.** ``block``, ``head`` (or ``heads``), ``kv_head``, ``ov_norm``, ``qk_norm``,
``median_ov_norm``, the head's ``q_norm``/``k_norm``/``v_norm``/``o_norm``; for twins
``ov_cosine``, ``qk_cosine`` (sketch estimates) and ``ov_spectrum_gap``, ``qk_spectrum_gap``.

**Severity and score.** Warning. Idle and dominant heads: ``scoring.score(1/H, ratio)`` with
``ratio`` ``idle-share × median / ‖OV_h‖`` or ``‖OV_h‖ / (dominant-ratio × median)``; twins:
``scoring.score(n/H, 1/max(gap, 1e-6)·twin-spectrum)`` for ``n`` heads in the cluster.

**What to do.** Prune idle heads (and the matching q/k/v rows and o columns), or check why
they died (too strong weight decay, a dead key/value head); deduplicate twin heads or retrain
from a less symmetric initialisation; for a dominant head check what it attends to before
compressing the layer.
"""

from __future__ import annotations

import threading
from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from steelyard.findings import Finding, Severity
from steelyard.graph import Layer
from steelyard.numbers import measured as shown
from steelyard.rules import _circuits as circ
from steelyard.rules.base import AuditContext, RuleSettings, RuleSpec, fraction, threshold
from steelyard.rules.scoring import score
from steelyard.stats.numerics import median_of, power_of_two_toward_one, times_exactly
from steelyard.transformer.model import AttentionBlock

#: Largest row norms kept as they are for the float32 products (beyond [2^-40, 2^40] a power
#: of two brings them to about 1, as ``untrained-token`` does with its table).
_UNIT_RANGE = 2.0**40


@dataclass(frozen=True)
class HeadCircuitsSettings:
    """Thresholds of ``head-circuits``."""

    idle_share: float = fraction(0.05)
    twin_cosine: float = fraction(0.95)
    twin_spectrum: float = threshold(0.1)
    dominant_ratio: float = threshold(10.0)


@dataclass
class _Factors:
    """Per-projection factors collected from the layers (Gram and sketch per head)."""

    lock: threading.Lock = field(default_factory=threading.Lock)
    parts: dict[tuple[int, str], tuple[np.ndarray, np.ndarray]] = field(default_factory=dict)
    """Factors of blocks still waiting for a projection (a block's are dropped once judged)."""
    results: dict[int, list[Finding]] = field(default_factory=dict)
    """Block index → its findings, judged as soon as its last projection was read."""


def _roles(ctx: AuditContext) -> dict[str, list[tuple[int, str]]]:
    """Layer name → (block index, projection) pairs it holds."""

    def build() -> dict[str, list[tuple[int, str]]]:
        out: dict[str, list[tuple[int, str]]] = {}
        structure = ctx.checkpoint.transformer
        for index, block in enumerate(structure.attention if structure else ()):
            head = block.heads[0]
            for part, span in (("q", head.q), ("k", head.k), ("v", head.v), ("o", head.o)):
                out.setdefault(span.layer, []).append((index, part))
        return out

    return ctx.stats.shared(f"{RULE.name}:roles", build)


def _factors(ctx: AuditContext) -> _Factors:
    return ctx.stats.shared(f"{RULE.name}:factors", _Factors)


def _sketch(ctx: AuditContext, dim: int, left: bool) -> np.ndarray:
    return ctx.stats.shared(f"{RULE.name}:sketch:{dim}:{left}", lambda: circ.sketch_matrix(dim, left))


def _spans(block: AttentionBlock, part: str) -> list[tuple[int, int]]:
    """One span per query head (q, o) or per key/value head (k, v)."""
    if part in ("q", "o"):
        return [(getattr(h, part).start, getattr(h, part).stop) for h in block.heads]
    seen: dict[int, tuple[int, int]] = {}
    for h in block.heads:
        span = getattr(h, part)
        seen.setdefault(h.kv_index, (span.start, span.stop))
    return [seen[g] for g in sorted(seen)]


def check_layer(ctx: AuditContext, settings: RuleSettings[HeadCircuitsSettings], layer: Layer) -> Iterator[Finding]:
    """Collect this layer's per-head factors; judge its block once all four projections are in
    (the findings are yielded by ``finish``, in block order)."""
    roles = _roles(ctx).get(layer.name)
    structure = ctx.checkpoint.transformer
    if not roles or structure is None:
        return
    matrix = ctx.stats.matrix(layer)
    norms = ctx.stats.row_norms(layer)
    if not np.isfinite(norms).all():
        ctx.notes.add(RULE.name, "heads not judged: the projection holds NaN or Inf", layer.name)
        return
    # Weights far from unit scale are brought to it by a power of two (exact) before the
    # float32 products: products of tiny weights are subnormals, which the CPU multiplies
    # 70 × slower (16 heads' Grams of weights near 1e-20: 110 against 1.5 ms), and those of
    # huge ones overflow into a float64 redo. Grams are scaled back in float64; sketches are
    # only compared by cosine, which one factor per projection leaves as it is.
    scale = power_of_two_toward_one(float(norms.max(initial=0.0)), _UNIT_RANGE)
    if scale != 1.0:
        matrix = times_exactly(matrix, scale)
    store = _factors(ctx)
    for index, part in roles:
        block = structure.attention[index]
        spans = _spans(block, part)
        size = spans[0][1] - spans[0][0]
        tiled = all(span == (spans[0][0] + i * size, spans[0][0] + (i + 1) * size) for i, span in enumerate(spans))
        first, last = spans[0][0], spans[-1][1]
        if part == "o":
            sketch = _sketch(ctx, matrix.shape[0], True)
            heads = (
                matrix[:, first:last].reshape(matrix.shape[0], len(spans), size).transpose(1, 0, 2)
                if tiled else np.stack([matrix[:, a:b] for a, b in spans])
            )
            factors = circ.column_factors(heads, sketch)
        else:
            # q is sketched on the left of QK (Ψ, so its factor is W_Q Ψᵀ), k and v on the right (Ω).
            sketch = _sketch(ctx, matrix.shape[1], part == "q")
            heads = (
                matrix[first:last].reshape(len(spans), size, matrix.shape[1])
                if tiled else np.stack([matrix[a:b] for a, b in spans])
            )
            factors = circ.row_factors(heads, sketch.T if part == "q" else sketch)
        if scale != 1.0:
            factors = (factors[0] / (scale * scale), factors[1])
        with store.lock:
            store.parts[(index, part)] = factors
            ready = all((index, p) in store.parts for p in "qkvo")
            parts = {p: store.parts.pop((index, p)) for p in "qkvo"} if ready else None
        if parts is not None:
            # Judged now, so a block's factors live only until its four projections are read.
            found = _judge_block(ctx, settings, block, parts)
            with store.lock:
                store.results[index] = found
    yield from ()


def _judge_block(
    ctx: AuditContext,
    settings: RuleSettings[HeadCircuitsSettings],
    block: AttentionBlock,
    parts: dict[str, tuple[np.ndarray, np.ndarray]],
) -> list[Finding]:
    out_layer = ctx.checkpoint.layer(block.output_layer)
    if out_layer is None or len(block.heads) < 2:
        return []
    heads = measure_block(block, parts)
    # Every head's circuit sizes, flagged or not, for the reports' heads-by-layers map.
    ctx.measurements.record(out_layer.name, "head-circuits.heads", {
        "block": block.name,
        "ov_norm": [float(f"{h.ov:.6g}") for h in heads],
        "qk_norm": [float(f"{h.qk:.6g}") for h in heads],
    })
    return list(_judge(block, out_layer, heads, settings.for_layer(out_layer)))


@dataclass(frozen=True)
class _Head:
    index: int
    kv: int
    ov: float
    qk: float
    norms: dict[str, float]
    ov_sketch: np.ndarray
    qk_sketch: np.ndarray
    grams: tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]
    """``(G_O, G_V, G_Q, G_K)`` of the head: its spectra are computed only for twin candidates."""

    @property
    def ov_spectrum(self) -> np.ndarray:
        """Singular values of the output-value circuit."""
        return circ.circuit_spectrum(self.grams[0], self.grams[1])

    @property
    def qk_spectrum(self) -> np.ndarray:
        """Singular values of the query-key circuit."""
        return circ.circuit_spectrum(self.grams[2], self.grams[3])


def measure_block(block: AttentionBlock, parts: dict[str, tuple[np.ndarray, np.ndarray]]) -> list[_Head]:
    """Per-head norms, circuit norms, spectra and sketches from the collected factors."""
    gq, sq = parts["q"]
    gk, sk = parts["k"]
    gv, sv = parts["v"]
    go, so = parts["o"]
    out = []
    for h in block.heads:
        g = h.kv_index
        out.append(
            _Head(
                index=h.index,
                kv=g,
                ov=circ.circuit_norm(go[h.index], gv[g]),
                qk=circ.circuit_norm(gq[h.index], gk[g]),
                norms={
                    "q_norm": float(np.sqrt(np.trace(gq[h.index]))),
                    "k_norm": float(np.sqrt(np.trace(gk[g]))),
                    "v_norm": float(np.sqrt(np.trace(gv[g]))),
                    "o_norm": float(np.sqrt(np.trace(go[h.index]))),
                },
                ov_sketch=circ.product(so[h.index], sv[g]),
                qk_sketch=circ.product(sq[h.index].T, sk[g]),
                grams=(go[h.index], gv[g], gq[h.index], gk[g]),
            )
        )
    return out


def finish(ctx: AuditContext, settings: RuleSettings[HeadCircuitsSettings]) -> Iterator[Finding]:
    """Every judged block's findings, in block order (whatever order threads finished in)."""
    structure = ctx.checkpoint.transformer
    store = _factors(ctx)
    for index in range(len(structure.attention) if structure else 0):
        yield from store.results.get(index, ())


def _finding(layer: Layer, part: str, score_: float, message: str, hint: str, evidence: dict[str, object]) -> Finding:
    return Finding(
        rule=RULE.name, severity=Severity.WARNING, layer=layer.name, tensor=layer.weight, units=(),
        score=score_, message=message, hint=hint, evidence=evidence, part=part,
    )


def _judge(block: AttentionBlock, layer: Layer, heads: list[_Head], limits: HeadCircuitsSettings) -> Iterator[Finding]:
    ov = np.array([h.ov for h in heads])
    median = median_of(ov)
    count = len(heads)
    idle = {h.index for h in heads if h.ov <= limits.idle_share * median}

    def evidence(h: _Head) -> dict[str, object]:
        return {"block": block.name, "head": h.index, "kv_head": h.kv, "ov_norm": h.ov, "qk_norm": h.qk,
                "median_ov_norm": median, **h.norms}

    for h in heads:
        if h.index in idle:
            yield _finding(
                layer, f"head {h.index}",
                score(1 / count, limits.idle_share * median / max(h.ov, 1e-30)),
                f"head {h.index} of {block.name} is idle: its output-value circuit norm "
                f"{shown(h.ov)} is {shown(h.ov / median if median else 0)}× the block's median "
                f"{shown(median)}",
                "prune the head (its rows of the query, key and value projections and its columns "
                "of the output projection) or find out why it died",
                evidence(h),
            )
        others = np.delete(ov, heads.index(h))
        rest = median_of(others) if len(others) else 0.0
        if rest > 0 and h.ov >= limits.dominant_ratio * rest:
            yield _finding(
                layer, f"head {h.index}",
                score(1 / count, h.ov / max(limits.dominant_ratio * rest, 1e-30)),
                f"head {h.index} of {block.name} dominates its block: output-value circuit norm "
                f"{shown(h.ov)} is {shown(h.ov / rest)}× the other heads' median {shown(rest)}",
                "check what the head attends to before pruning or quantizing this layer",
                evidence(h),
            )
    yield from _twins(block, layer, [h for h in heads if h.index not in idle], limits, count)


def _cosines(sketches: np.ndarray) -> np.ndarray:
    """Pairwise cosines of the rows of ``sketches`` (0 where a row is zero)."""
    rows = sketches.astype(np.float64)
    gram = rows @ rows.T
    length = np.sqrt(np.diag(gram))
    scale = np.outer(length, length)
    return np.divide(gram, scale, out=np.zeros_like(gram), where=scale > 0)


def _twins(block: AttentionBlock, layer: Layer, heads: list[_Head], limits: HeadCircuitsSettings, count: int) -> Iterator[Finding]:
    parent = {h.index: h.index for h in heads}

    def root(i: int) -> int:
        while parent[i] != i:
            i = parent[i]
        return i

    pairs: list[dict[str, Any]] = []
    if len(heads) < 2:
        return
    ov_all = _cosines(np.stack([h.ov_sketch.ravel() for h in heads]))
    qk_all = _cosines(np.stack([h.qk_sketch.ravel() for h in heads]))
    for i, a in enumerate(heads):
        for j in range(i + 1, len(heads)):
            b = heads[j]
            ov_cos, qk_cos = float(ov_all[i, j]), float(qk_all[i, j])
            if ov_cos < limits.twin_cosine or qk_cos < limits.twin_cosine:
                continue
            ov_gap = circ.spectrum_gap(a.ov_spectrum, b.ov_spectrum)
            qk_gap = circ.spectrum_gap(a.qk_spectrum, b.qk_spectrum)
            if max(ov_gap, qk_gap) > limits.twin_spectrum:
                continue
            parent[root(b.index)] = root(a.index)
            pairs.append({"heads": [a.index, b.index], "ov_cosine": round(ov_cos, 4), "qk_cosine": round(qk_cos, 4),
                          "ov_spectrum_gap": round(ov_gap, 4), "qk_spectrum_gap": round(qk_gap, 4)})
    clusters: dict[int, list[int]] = {}
    for h in heads:
        if any(h.index in p["heads"] for p in pairs):
            clusters.setdefault(root(h.index), []).append(h.index)
    for members in clusters.values():
        members.sort()
        mine = [p for p in pairs if p["heads"][0] in members]
        gap = max(max(float(p["ov_spectrum_gap"]), float(p["qk_spectrum_gap"])) for p in mine)
        named = ", ".join(str(m) for m in members[:-1]) + f" and {members[-1]}"
        yield _finding(
            layer, "heads " + ",".join(str(m) for m in members),
            score(len(members) / count, limits.twin_spectrum / max(gap, 1e-6)),
            f"heads {named} of {block.name} are twins: their query-key and output-value "
            f"circuits agree (cosine ≥ {limits.twin_cosine}, up to the attention's symmetries)",
            "keep one of the twin heads (prune the others) or retrain them apart",
            {"block": block.name, "heads": members, "pairs": mine},
        )


RULE = RuleSpec(
    name="head-circuits",
    severity=Severity.WARNING,
    settings=HeadCircuitsSettings,
    summary="idle and duplicated attention heads are wasted capacity, and a head that dwarfs "
    "its layer makes the layer fragile under pruning and quantization",
    doc=__doc__ or "",
    per_layer=check_layer,
    finish=finish,
)
