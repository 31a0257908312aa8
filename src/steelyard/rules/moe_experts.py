"""``moe-experts``: experts of a mixture-of-experts block that are idle or twins of another.

**Which experts.** The routed experts of every mixture-of-experts block the transformer
structure recognised (per-expert modules, stacked ``[experts, out, in]`` tensors split into one
layer per expert, GGUF ``ffn_*_exps``; see docs/transformers.md), with the block's router (one row per expert) when
it is stored. Shared experts are always active and are not judged.

**What it measures.** Per expert ``e`` with weight matrices ``W_e,p`` (gate, up, down): its
weight norm ``n_e = sqrt(Σ_p ‖W_e,p‖²_F)``, its fan-in norms (the rows' L2 norms: median and
largest per matrix, in the evidence), the norm of its router row ``‖r_e‖``, and its cosine
similarity to every other expert of the block, ``cos(e, f) = ⟨w_e, w_f⟩/(‖w_e‖‖w_f‖)`` over
the concatenated weights. The cosine is computed on the same seeded uniform sample of up to
``sample-elements`` (65536) positions in every expert (all of them when the expert is
smaller): a uniform sample estimates both inner products and norms without bias, with an
error of order ``1/sqrt(m)`` (under 0.01 for the default), far inside the twin threshold.

**Findings.**

1. **idle expert**: ``n_e ≤ idle-share × median n`` and, when a router is stored,
   ``‖r_e‖ ≤ idle-share × median ‖r‖`` (idle-share 0.05): the router (almost) never picks it
   over the others and it would write next to nothing if it did; its parameters are dead
   weight. (A test of whether a router row can *never* reach the top-k is not made: with no
   router bias, expert ``e`` wins for some input direction ``x`` iff the differences
   ``r_e − r_f`` admit an ``x`` with every ``(r_e − r_f)·x > 0``, i.e. iff 0 is not in their
   convex hull (Gordan's theorem of alternatives, 1873); for at most ``d + 1`` rows in general
   position that always holds, even for a zero row, and a bounded region of normalised inputs
   does not change it, since the test is homogeneous in ``x``. So such a test would almost
   never fire; the norms are what tell.) Router collapse, where a few experts receive all tokens and the rest stop
   learning, is the failure load-balancing losses were introduced against (Shazeer et al.
   2017, "Outrageously Large Neural Networks: The Sparsely-Gated Mixture-of-Experts Layer",
   ICLR; Fedus, Zoph & Shazeer 2022, "Switch Transformers", JMLR).
2. **twin experts**: ``cos(e, f) ≥ twin-cosine`` (0.98): two experts with (nearly) the same
   weights compute the same function. Experts initialised as copies of a dense model's
   feed-forward block ("sparse upcycling", Komatsuzaki et al. 2023, ICLR) start as exact
   twins and only become specialised if training moves them apart; twins that never diverged
   waste the block's capacity. Hidden units of an expert could be permuted without changing
   it; copies keep the same order, so the raw cosine is the test (a permuted twin is not found).

Findings name the expert (``expert 5 of model.layers.1.block_sparse_moe``; ``part``
``expert 5`` or ``experts 2,5``) and are located at the router (at the first expert's first
matrix when no router is stored), where the thresholds are resolved too; ``sample-elements``
is resolved per expert matrix.

**Why it matters.** Experts are most of a mixture-of-experts model's parameters and memory;
an expert the router never uses or one that duplicates another costs its full size and adds
no capacity, and a block with such experts behaves like a smaller one than its
configuration says (the model is under-using what it ships).

**Evidence.** ``block``, ``expert``/``experts``, ``weight_norm``, ``median_weight_norm``,
``router_norm``, ``median_router_norm``, ``fan_in`` (per matrix: median and largest row
norm), ``nearest`` (most similar other expert) and ``cosine``.

**Severity and score.** Warning. Idle: ``scoring.score(1/E, idle-share·median/n_e)``; twins:
``scoring.score(k/E, 1 + 100·(cos − twin-cosine))`` for ``k`` experts in the cluster.

**What to do.** Drop idle experts (and their router rows) or retrain with a load-balancing
loss; merge twin experts, or continue training with router noise or re-initialise one of
them so they can specialise.
"""

from __future__ import annotations

import functools
import threading
from collections.abc import Iterator
from dataclasses import dataclass, field

import numpy as np

from steelyard.findings import Finding, Severity
from steelyard.graph import Layer
from steelyard.numbers import measured as shown
from steelyard.rules.base import AuditContext, RuleSettings, RuleSpec, fraction, threshold
from steelyard.rules.scoring import score
from steelyard.stats.numerics import median_of
from steelyard.transformer.model import ExpertBlock

_SEED = 1701


@dataclass(frozen=True)
class MoeExpertsSettings:
    """Thresholds of ``moe-experts``."""

    idle_share: float = fraction(0.05)
    twin_cosine: float = fraction(0.98)
    sample_elements: int = threshold(65536)


@dataclass(frozen=True)
class _Part:
    """What one expert matrix contributes: squared norm, fan-in norms, sampled weights."""

    squared: float
    fan_in_median: float
    fan_in_max: float
    sample: np.ndarray


@dataclass
class _Store:
    lock: threading.Lock = field(default_factory=threading.Lock)
    parts: dict[tuple[int, int, str], _Part] = field(default_factory=dict)
    """Measurements of blocks still waiting for an expert matrix (dropped once judged)."""
    results: dict[int, list[Finding]] = field(default_factory=dict)
    """Block index → its findings, judged as soon as its last expert matrix was measured."""
    remaining: dict[int, int] = field(default_factory=dict)
    """Block index → expert matrices not measured yet."""


@functools.lru_cache(maxsize=32)
def _positions(size: int, count: int) -> np.ndarray:
    """The same seeded positions for every expert matrix of that size (drawn once)."""
    if count <= 0 or size <= count:
        return np.arange(size)
    return np.sort(np.random.default_rng((_SEED, size)).choice(size, count, replace=False))


def _measure(matrix: np.ndarray, count: int, rows: np.ndarray | None = None) -> _Part:
    """``rows``: the matrix's row norms when already known (the statistics' one pass)."""
    if rows is None:
        rows = np.sqrt(np.einsum("ij,ij->i", matrix, matrix, dtype=np.float64))
    rows = np.asarray(rows, dtype=np.float64)
    flat = matrix.reshape(-1)
    return _Part(
        squared=float(np.sum(rows**2)),
        fan_in_median=median_of(rows) if rows.size else 0.0,
        fan_in_max=float(rows.max()) if rows.size else 0.0,
        sample=np.ascontiguousarray(flat[_positions(flat.size, count)], dtype=np.float32),
    )


def _roles(ctx: AuditContext) -> dict[str, list[tuple[int, int, str]]]:
    def build() -> dict[str, list[tuple[int, int, str]]]:
        out: dict[str, list[tuple[int, int, str]]] = {}
        structure = ctx.checkpoint.transformer
        for b, block in enumerate(structure.experts if structure else ()):
            for expert in block.experts:
                for part in expert.parts:
                    out.setdefault(part.layer, []).append((b, expert.index, part.role))
        return out

    return ctx.stats.shared(f"{RULE.name}:roles", build)


def _store(ctx: AuditContext) -> _Store:
    return ctx.stats.shared(f"{RULE.name}:store", _Store)


def check_layer(ctx: AuditContext, settings: RuleSettings[MoeExpertsSettings], layer: Layer) -> Iterator[Finding]:
    """Measure this expert matrix while it is in memory (the findings come in ``finish``)."""
    roles = _roles(ctx).get(layer.name)
    if not roles:
        return
    rows = ctx.stats.row_norms(layer)
    if not np.isfinite(rows).all():
        ctx.notes.add(RULE.name, "expert not judged: it holds NaN or Inf", layer.name)
        return
    part = _measure(ctx.stats.matrix(layer), settings.for_layer(layer).sample_elements, rows)
    store = _store(ctx)
    structure = ctx.checkpoint.transformer
    assert structure is not None
    for key in roles:
        block = structure.experts[key[0]]
        with store.lock:
            if key not in store.parts:
                left = store.remaining.get(key[0], sum(len(e.parts) for e in block.experts)) - 1
                store.remaining[key[0]] = left
            store.parts[key] = part
            taken = None
            if store.remaining[key[0]] == 0:
                wanted = [(key[0], e.index, p.role) for e in block.experts for p in e.parts]
                taken = {k: store.parts.pop(k) for k in wanted}
        if taken is not None:
            # Judged now, so a block's samples live only until its last expert is measured.
            found = _judge_block(ctx, settings, block, taken)
            with store.lock:
                store.results[key[0]] = found
    yield from ()


def finish(ctx: AuditContext, settings: RuleSettings[MoeExpertsSettings]) -> Iterator[Finding]:
    """Every judged block's findings in block order; a note for blocks never completed."""
    structure = ctx.checkpoint.transformer
    store = _store(ctx)
    for b, block in enumerate(structure.experts if structure else ()):
        if b in store.results:
            yield from store.results[b]
        elif len(block.experts) >= 2:
            ctx.notes.add(RULE.name, f"{block.name}: not every expert could be measured; block not judged")


def _judge_block(
    ctx: AuditContext,
    settings: RuleSettings[MoeExpertsSettings],
    block: ExpertBlock,
    parts: dict[tuple[int, int, str], _Part],
) -> list[Finding]:
    where = ctx.checkpoint.layer(block.router or "") or ctx.checkpoint.layer(
        block.experts[0].parts[0].layer if block.experts[0].parts else ""
    )
    if where is None or len(block.experts) < 2:
        return []
    b = next(iter(parts))[0]
    measured = [
        sorted(((p.role, parts[(b, e.index, p.role)]) for p in e.parts), key=lambda item: item[0])
        for e in block.experts
    ]
    router = None
    router_layer = ctx.checkpoint.layer(block.router) if block.router else None
    if router_layer is not None:
        router = np.asarray(ctx.stats.row_norms(router_layer), dtype=np.float64)
    # Every expert's size, flagged or not, for the reports' experts-by-layers map.
    ctx.measurements.record(where.name, "moe-experts.experts", {
        "block": block.name,
        "weight_norm": [float(f"{np.sqrt(sum(p.squared for _, p in parts)):.6g}") for parts in measured],
        "router_norm": None if router is None else [float(f"{v:.6g}") for v in router],
    })
    return list(_judge(block, where, measured, router, settings.for_layer(where)))


def _finding(layer: Layer, part: str, score_: float, message: str, hint: str, evidence: dict[str, object]) -> Finding:
    return Finding(
        rule=RULE.name, severity=Severity.WARNING, layer=layer.name, tensor=layer.weight, units=(),
        score=score_, message=message, hint=hint, evidence=evidence, part=part,
    )


def _judge(
    block: ExpertBlock, layer: Layer, measured: list[list[tuple[str, _Part]]],
    router: np.ndarray | None, limits: MoeExpertsSettings,
) -> Iterator[Finding]:
    count = len(measured)
    norms = np.array([np.sqrt(sum(p.squared for _, p in parts)) for parts in measured])
    vectors = [np.concatenate([p.sample for _, p in parts]) for parts in measured]
    lengths = np.array([np.linalg.norm(v.astype(np.float64)) for v in vectors])
    same_shape = len({v.size for v in vectors}) == 1
    cosine = np.zeros((count, count))
    if same_shape:
        stacked = np.stack(vectors)
        gram = (stacked @ stacked.T).astype(np.float64)  # float32 products: ~1e-6 relative
        scale = np.outer(lengths, lengths)
        cosine = np.divide(gram, scale, out=np.zeros_like(gram), where=scale > 0)
    np.fill_diagonal(cosine, -np.inf)
    median = median_of(norms)
    router_median = median_of(router) if router is not None else None

    def evidence(e: int) -> dict[str, object]:
        nearest = int(np.argmax(cosine[e]))
        return {
            "block": block.name, "expert": e, "weight_norm": float(norms[e]), "median_weight_norm": median,
            "router_norm": float(router[e]) if router is not None else None, "median_router_norm": router_median,
            "fan_in": {role: {"median": p.fan_in_median, "max": p.fan_in_max} for role, p in measured[e]},
            "nearest": nearest, "cosine": round(float(cosine[e, nearest]), 4),
        }

    for e in range(count):
        quiet = norms[e] <= limits.idle_share * median
        unrouted = router is None or router_median is None or router[e] <= limits.idle_share * router_median
        if quiet and unrouted:
            yield _finding(
                layer, f"expert {e}", score(1 / count, limits.idle_share * median / max(float(norms[e]), 1e-30)),
                f"expert {e} of {block.name} is idle: weight norm {shown(norms[e])} is "
                f"{shown(norms[e] / median if median else 0)}× the median expert's"
                + (
                    f", router row {shown(router[e])} vs median {shown(router_median)}"
                    if router is not None and router_median is not None
                    else ""
                ),
                "drop the expert and the router's row for it, or retrain with a load-balancing "
                "loss",
                evidence(e),
            )
    yield from _twins(block, layer, cosine, limits, evidence)


def _twins(block: ExpertBlock, layer: Layer, cosine: np.ndarray, limits: MoeExpertsSettings, evidence: object) -> Iterator[Finding]:
    count = cosine.shape[0]
    parent = list(range(count))

    def root(i: int) -> int:
        while parent[i] != i:
            i = parent[i]
        return i

    for a in range(count):
        for b in range(a + 1, count):
            if cosine[a, b] >= limits.twin_cosine:
                parent[root(b)] = root(a)
    clusters: dict[int, list[int]] = {}
    for e in range(count):
        if np.max(cosine[e]) >= limits.twin_cosine:
            clusters.setdefault(root(e), []).append(e)
    for members in clusters.values():
        lowest = min(float(cosine[a, b]) for a in members for b in members if a < b)
        named = ", ".join(str(m) for m in members[:-1]) + f" and {members[-1]}"
        yield _finding(
            layer, "experts " + ",".join(str(m) for m in members),
            score(len(members) / count, 1 + 100 * (lowest - limits.twin_cosine)),
            f"experts {named} of {block.name} are twins: weight cosine {lowest:.4f} "
            f"(at least {limits.twin_cosine}); they compute nearly the same function",
            "merge the twin experts, or re-initialise one and keep training so they specialise",
            {"block": block.name, "experts": members, "cosine": round(lowest, 4)},
        )


RULE = RuleSpec(
    name="moe-experts",
    severity=Severity.WARNING,
    settings=MoeExpertsSettings,
    summary="idle and duplicated experts waste a mixture-of-experts model's capacity and "
    "memory without adding anything it computes",
    doc=__doc__ or "",
    per_layer=check_layer,
    finish=finish,
)
