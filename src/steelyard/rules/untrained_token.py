"""``untrained-token``: vocabulary tokens whose embedding or output-head rows were never
trained.

**Which matrices.** The rows of a language model's token matrices are tokens, not units: the
input embedding (an embedding layer, except position and token-type embeddings, recognised by
name) and the output head (a dense layer with as many units as the embedding has tokens, the
same width, named like a head: ``lm_head``, ``output``, ``embed_out``, or marked as the
graph's output). When no separate head is stored the embedding is taken as tied to it and
judged once. Findings name tokens by id and, when a ``tokenizer.json`` lies beside the model
and the optional ``tokenizers`` package is installed (``pip install 'steelyard[tokens]'``),
by their string; otherwise ids only, and a note says why.

**What it checks.** For a token matrix ``M[V, d]`` (row ``m_i`` per token) with mean row
``μ``, the centred rows ``c_i = m_i − μ`` and the top ``principal-directions`` (1) right
singular vectors ``v_1..v_k`` of the centred matrix, each token is tested, first match wins:

1. **zero row**: ``‖m_i‖ ≤ zero-norm × median_i ‖m_i‖`` (zero-norm 1e-3): never given a value (a new
   token initialised at zero, or a padding row);
2. **at the mean**: ``‖c_i‖ ≤ mean-distance × median_i ‖c_i‖`` (mean-distance 0.05): a row left where
   resizing the vocabulary with mean initialisation put it;
3. **identical rows**: rows bit-for-bit equal to another token's row (candidates are rows
   whose norms agree to float32 rounding, each confirmed exactly; in a table too large to
   cache, which is read by passes of row blocks and never assembled, by equal BLAKE3 digests
   of the two rows' bytes): two tokens that were never trained apart;
4. **under-trained (low residual)**: ``r_i ≤ residual-share × median_i r_i``
   (residual-share 0.5), where ``r_i = ‖c_i − Σ_k (c_i·v_k) v_k‖`` is what is left of the
   row once the mean and the principal direction(s) shared by all rows are removed.

Test 4 is the indicator of Land & Bartolo 2024 ("Fishing for Magikarp: Automatically
Detecting Under-trained Tokens in Large Language Models", EMNLP; arXiv 2405.05417; cited from
memory). A token that never occurs in training gets no gradient in the input embedding, and
in the output head only the softmax's push-down ``p_i·h``, which is nearly the same direction
for every such token; so its rows stay at their (small, weight-decayed) initial values plus a
component shared by all rows. The paper removes the first principal component of the
unembedding matrix (the constant component) and finds under-trained tokens far from the
trained ones in what is left; here "far" is measured by what remains of each row's length
against the median token. Rows identical to each other or at the mean are the simplest cases
of the same thing (a row that was never updated since it was set). Rows identical to their
*initial* values need the initial checkpoint: compare the two with ``steelyard compare``.

The principal directions are estimated from up to 2048 rows (seeded sample) by a randomised
range finder with 2 power iterations (Halko, Martinsson & Tropp 2011, "Finding structure with
randomness", SIAM Review), so a 256k × 8k matrix costs a few matrix products, not an SVD.

**Why it matters.** A prompt containing an under-trained token (a reserved or added special
token, a tokenizer artefact) drives the model with an input it never learned: the literature
reports hallucinated or unrelated output. Tokens added for fine-tuning (chat or tool-call
markers) that are still at their initial rows were not trained either: the fine-tune missed
them.

**Evidence.** ``matrix`` (``input embedding``, ``output head`` or ``tied embedding and head``),
``counts`` per test, ``tokens`` (up to ``max-listed`` (50): ``id``, ``text`` (None without a
tokenizer), ``test``, ``residual_ratio`` ``r_i / median r``), ``median_residual``,
``principal_directions``.

**Severity and score.** Warning. Score ``scoring.score(flagged/V, residual-share /
max(min flagged residual ratio, 1e-6))``.

**What to do.** Train the flagged tokens (include them in the fine-tuning data), or keep them
out of prompts (strip them in the tokenizer, mask their logits); for tokens added on purpose,
check that the fine-tune actually updated their rows.
"""

from __future__ import annotations

import json
import math
import re
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from steelyard.errors import SteelyardError
from steelyard.findings import Finding, Severity
from steelyard.graph import Layer, LayerKind
from steelyard.numbers import count as counted
from steelyard.rules.base import (
    AuditContext,
    RuleSettings,
    RuleSpec,
    fraction,
    layer_finding,
    threshold,
)
from steelyard.rules.scoring import score
from steelyard.safepath import read_beside
from steelyard.stats.numerics import distinct, median_of, power_of_two_toward_one, times_exactly
from steelyard.stats.passes import Blocks

_SAMPLE = 2048
_POWER = 2
_SEED = 0
#: Bytes of table rows per block of the (V × d)·(d × k) product (see :func:`_products`).
_PRODUCT_BYTES = 2**19
_NOT_TOKENS = re.compile(r"(pos|position|wpe|token_type|segment|type_emb)", re.IGNORECASE)
_HEAD_NAMES = re.compile(r"(^|[._])(lm_head|output|embed_out|head)$")
_TOKENIZER_BYTES = 64 * 2**20


@dataclass(frozen=True)
class UntrainedTokenSettings:
    """Thresholds of ``untrained-token``."""

    residual_share: float = fraction(0.5)
    principal_directions: int = threshold(1)
    mean_distance: float = threshold(0.05)
    zero_norm: float = threshold(1e-3)
    max_listed: int = threshold(50)


@dataclass(frozen=True)
class TokenMatrices:
    """Which layers hold token rows: input embeddings, the head, and whether it is tied."""

    embeddings: tuple[Layer, ...]
    head: Layer | None

    @property
    def tied(self) -> bool:
        """An embedding is present and no separate head is stored."""
        return bool(self.embeddings) and self.head is None

    def role(self, layer: Layer) -> str | None:
        """``input embedding``, ``output head``, ``tied embedding and head`` or None."""
        if self.head is not None and layer.name == self.head.name:
            return "output head"
        if any(layer.name == e.name for e in self.embeddings):
            return "tied embedding and head" if self.tied else "input embedding"
        return None


def token_matrices(layers: tuple[Layer, ...]) -> TokenMatrices:
    """The token matrices of a layer graph (see the page: names, shapes, output marks)."""
    embeddings = tuple(
        layer
        for layer in layers
        if layer.kind is LayerKind.EMBEDDING and layer.units >= 2 and not _NOT_TOKENS.search(layer.name)
    )
    head = None
    for vocab in embeddings:
        for layer in layers:
            if (
                layer.kind is LayerKind.DENSE
                and layer.units == vocab.units
                and layer.fan_in == vocab.fan_in
                and (_HEAD_NAMES.search(layer.name) or layer.is_output)
            ):
                head = layer
                break
        if head is not None:
            break
    return TokenMatrices(embeddings, head)


def _matrices(ctx: AuditContext) -> TokenMatrices:
    return ctx.stats.shared(f"{RULE.name}:matrices", lambda: token_matrices(ctx.checkpoint.layers))


# ---- token strings --------------------------------------------------------------------------
class _Names:
    """Token strings from ``tokenizer.json`` beside the checkpoint, or a reason there are none."""

    def __init__(self, ctx: AuditContext) -> None:
        self.strings: dict[int, str] = {}
        self.why_not: str | None = None
        self._tokenizer: object | None = None
        source = Path(ctx.checkpoint.path)
        try:
            raw = read_beside(source if source.is_file() else source / "x", "tokenizer.json", "tokenizer", _TOKENIZER_BYTES)
        except SteelyardError as error:
            self.why_not = f"tokenizer.json beside the model was not read ({error})"
            return
        if raw is None:
            self.why_not = "no tokenizer.json beside the model: tokens are named by id only"
            return
        try:
            from tokenizers import Tokenizer
        except ImportError:
            self.why_not = (
                "tokens are named by id only: reading tokenizer.json needs the optional "
                "'tokenizers' package (pip install 'steelyard[tokens]')"
            )
            return
        try:
            json.loads(raw)  # a cheap structural check before the library parses it
            self._tokenizer = Tokenizer.from_str(raw.decode("utf-8"))
        except Exception as error:  # the library raises its own exception types
            self.why_not = f"tokenizer.json could not be read: {type(error).__name__}"

    def text(self, token: int) -> str | None:
        """The token's string, or None when unknown."""
        if self._tokenizer is None:
            return None
        return self._tokenizer.id_to_token(token)  # type: ignore[attr-defined]


def _names(ctx: AuditContext) -> _Names:
    return ctx.stats.shared(f"{RULE.name}:names", lambda: _Names(ctx))


# ---- the measurement ------------------------------------------------------------------------
def principal_directions(centred: np.ndarray, k: int, seed: int = _SEED) -> np.ndarray:
    """Top ``k`` right singular vectors ``[k, d]`` of ``centred`` (rows sampled down to 2048,
    randomised range finder with power iterations in float32; Halko et al. 2011)."""
    rows, d = centred.shape
    k = min(k, rows, d)
    if k <= 0:
        return np.zeros((0, d))
    rng = np.random.default_rng(seed)
    sample = centred if rows <= _SAMPLE else centred[np.sort(rng.choice(rows, _SAMPLE, replace=False))]
    if min(sample.shape) <= 64:
        return np.asarray(np.linalg.svd(np.asarray(sample, np.float64), full_matrices=False)[2][:k])
    sample = np.asarray(sample, np.float32)
    probes = min(d, k + 8)
    basis = np.linalg.qr(sample @ rng.standard_normal((d, probes)).astype(np.float32))[0]
    for _ in range(_POWER):
        basis = np.linalg.qr(sample @ (sample.T @ basis))[0]
    small = basis.T @ sample
    top = np.linalg.svd(small.astype(np.float64), full_matrices=False)[2][:k]
    return np.asarray(top / np.linalg.norm(top, axis=1, keepdims=True))


@dataclass(frozen=True)
class TokenRows:
    """Per-token measurements of one token matrix."""

    norms: np.ndarray
    centred_norms: np.ndarray
    residuals: np.ndarray
    duplicates: np.ndarray
    """True for rows bit-for-bit equal to another row."""


def _products(block: np.ndarray, probes: np.ndarray) -> np.ndarray:
    """``block @ probes.T`` (float32) in row blocks of about ``_PRODUCT_BYTES``: numpy hands
    the whole tall product to BLAS, which then passes over the table once per probe; a block
    of 512 KiB stays in the cache for every probe (one BLAS thread: 32,000 × 256 with two
    probes 4.4 → 2.3 ms, 8,000 × 512 1.2 → 0.4 ms, 8,000 × 4,096 16.2 → 6.3 ms; blocks of
    1 MiB were as slow as the whole table at width 256). The sums may differ from the
    whole product's in the last float32 bit, from BLAS's choice of kernel."""
    rows = max(1, _PRODUCT_BYTES // (4 * max(1, block.shape[1])))
    out = np.empty((block.shape[0], probes.shape[0]), dtype=np.float32)
    for start in range(0, block.shape[0], rows):
        np.matmul(block[start : start + rows], probes.T, out=out[start : start + rows])
    return out


def _stable_order(values: np.ndarray) -> np.ndarray:
    """``numpy.argsort(values, kind="stable")``, exactly: numpy's default sort (half the time
    of its stable one on 32,000 norms, 1.3 against 2.6 ms) and then every run of equal values
    put back in index order, as a stable sort leaves it (equal norms are rare)."""
    order = np.argsort(values)
    ordered = values[order]
    ties = np.flatnonzero(ordered[1:] == ordered[:-1])
    if ties.size:
        # runs of consecutive tie positions: [first, last + 1] of the order array each
        breaks = np.flatnonzero(np.diff(ties) > 1)
        for first, last in zip(
            ties[np.concatenate(([0], breaks + 1))], ties[np.concatenate((breaks, [ties.size - 1]))],
            strict=True,
        ):
            order[first : last + 2] = np.sort(order[first : last + 2])
    return order


def measure(matrix: np.ndarray, k: int, row_squares: np.ndarray | None = None) -> TokenRows:
    """Norms, centred norms, residuals after removing ``k`` principal directions, and exact
    duplicate rows of ``M[V, d]``; ``row_squares`` (Σ m_ij² per row) when already known.

    One product ``M·[μ, v_1..v_k]`` gives everything: ``‖c_i‖² = ‖m_i‖² − 2 m_i·μ + ‖μ‖²`` and
    ``c_i·v = m_i·v − μ·v``, combined in float64."""
    rows = matrix.shape[0]
    original = np.asarray(matrix, dtype=np.float32)
    squares = (
        np.einsum("ij,ij->i", original, original, dtype=np.float64) if row_squares is None
        else np.asarray(row_squares, np.float64)
    )
    scale, squares_at_scale = _table_scale(squares)
    block = original if scale == 1.0 else times_exactly(original, scale)
    # One float32 BLAS product: 4× faster than numpy's buffered float64 reduction on a
    # 8000 × 512 table, and the same mean to about 1e-6 of its size (measured).
    mean = (np.ones(rows, np.float32) @ block).astype(np.float64) / max(1, rows)
    sample_rows = _sampled_rows(rows)
    # Centred in place: a second 4 MiB temporary made the allocator hand its pages back
    # and fault them in again on every call (4 ms against 0.5 ms per 8000 × 512 table).
    centred = block[sample_rows]
    centred -= mean.astype(np.float32)
    directions = principal_directions(centred, k)
    probes = np.vstack([mean[None, :], directions]).astype(np.float32)
    products = _products(block, probes).astype(np.float64)
    c2, residuals = _lengths(products, mean, directions, squares_at_scale, scale)
    block = original  # duplicates are the stored rows' bits
    norms = np.sqrt(squares)
    # Identical rows have equal norms up to the summation order: candidates are neighbours in
    # norm order within 2e-7 (float32 summation order), confirmed bit for bit.
    duplicates = np.zeros(rows, dtype=bool)
    pairs_first, pairs_second = _candidate_pairs(norms)
    # The pairs compared in chunks of about 4 MiB: one call per chunk rather than per pair
    # (a table of i.i.d. bf16 rows has ~100 such near-ties, each once ~10 small numpy calls).
    per_chunk = max(1, 2**20 // max(1, block.shape[1]))
    for start in range(0, pairs_first.size, per_chunk):
        first = pairs_first[start : start + per_chunk]
        second = pairs_second[start : start + per_chunk]
        same = (block[first].view(np.uint32) == block[second].view(np.uint32)).all(axis=1)
        duplicates[first[same]] = True
        duplicates[second[same]] = True
    return TokenRows(norms, np.sqrt(c2), residuals, duplicates)


def _table_scale(squares: np.ndarray) -> tuple[float, np.ndarray]:
    """(power-of-two scale, rows' sums of squares at it) for measuring a table.

    Every measurement is a ratio to the table's own medians, so a table whose float32 sums
    could overflow or vanish is measured scaled by a power of two (exact) and the lengths are
    scaled back at the end: the largest row norm is brought to [0.5, 1) when it lies outside
    [2^-40, 2^40], where float32 products of rows could overflow or vanish (a table near the
    top of the float32 range, or of subnormals)."""
    largest = math.sqrt(float(np.max(squares))) if squares.size else 0.0
    scale = power_of_two_toward_one(largest, 2.0**40)
    return scale, squares if scale == 1.0 else squares * (scale * scale)


def _sampled_rows(rows: int) -> np.ndarray:
    """The rows the principal directions are estimated from: all, or ``_SAMPLE`` seeded."""
    if rows <= _SAMPLE:
        return np.arange(rows)
    return np.sort(np.random.default_rng(_SEED).choice(rows, _SAMPLE, replace=False))


def _candidate_pairs(norms: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Rows that may be identical: neighbours in norm order whose norms agree within 2e-7
    (identical rows have equal norms up to the float32 summation order)."""
    order = _stable_order(norms)
    ordered = norms[order]
    close = np.flatnonzero(np.diff(ordered) <= 2e-7 * np.maximum(ordered[1:], 1e-30))
    return order[close], order[close + 1]


def _lengths(
    products: np.ndarray,
    mean: np.ndarray,
    directions: np.ndarray,
    squares: np.ndarray,
    scale: float,
) -> tuple[np.ndarray, np.ndarray]:
    """(‖c_i‖², r_i) from the rows' products with ``[μ, v_1..v_k]`` (float64) and their sums
    of squares, at ``scale``; returned at the table's own scale."""
    c2 = np.maximum(squares - 2.0 * products[:, 0] + float(mean @ mean), 0.0)
    projected = products[:, 1:] - (directions @ mean)[None, :]
    residuals = np.sqrt(np.maximum(c2 - np.einsum("ij,ij->i", projected, projected), 0.0))
    if scale != 1.0:
        c2 /= scale * scale
        residuals /= scale
    return c2, residuals


def measure_blocks(
    blocks: Blocks,
    shape: tuple[int, int],
    k: int,
    row_squares: np.ndarray,
) -> TokenRows:
    """:func:`measure` of a token table too large to hold in float32, read in two passes of
    row blocks (:meth:`steelyard.stats.LayerStats.streamed`): the first sums the mean row,
    picks the sampled rows and digests the rows that may be duplicates, the second makes the
    products with the mean and the principal directions. The mean is summed block by block
    (float32 products added in float64), so lengths agree with :func:`measure`'s to float32
    summation order. Candidate duplicates are confirmed by equal BLAKE3 digests of their
    bytes (a 256-bit digest: a false match is as likely as a collision of the hash) instead
    of a byte comparison, which would need both rows at once."""
    import blake3

    rows, width = shape
    squares = np.asarray(row_squares, np.float64)
    scale, squares_at_scale = _table_scale(squares)
    sample_rows = _sampled_rows(rows)
    norms = np.sqrt(squares)
    first, second = _candidate_pairs(norms)
    candidates = distinct(np.concatenate((first, second)))
    digests = np.empty(candidates.size, dtype="S32")
    total = np.zeros(width, np.float64)
    centred = np.empty((sample_rows.size, width), np.float32)
    for a, b, block in blocks():
        at_scale = block if scale == 1.0 else times_exactly(block, scale)
        total += (np.ones(b - a, np.float32) @ at_scale).astype(np.float64)
        lo, hi = np.searchsorted(sample_rows, (a, b))
        centred[lo:hi] = at_scale[sample_rows[lo:hi] - a]
        lo, hi = np.searchsorted(candidates, (a, b))
        for at in range(lo, hi):  # the stored rows' bits, as measure compares them
            digests[at] = blake3.blake3(block[candidates[at] - a].tobytes()).digest()
    mean = total / max(1, rows)
    centred -= mean.astype(np.float32)
    directions = principal_directions(centred, k)
    probes = np.vstack([mean[None, :], directions]).astype(np.float32)
    products32 = np.empty((rows, probes.shape[0]), np.float32)
    for a, b, block in blocks():
        at_scale = block if scale == 1.0 else times_exactly(block, scale)
        products32[a:b] = _products(at_scale, probes)
    products = products32.astype(np.float64)
    c2, residuals = _lengths(products, mean, directions, squares_at_scale, scale)
    duplicates = np.zeros(rows, dtype=bool)
    same = digests[np.searchsorted(candidates, first)] == digests[np.searchsorted(candidates, second)]
    duplicates[first[same]] = True
    duplicates[second[same]] = True
    return TokenRows(norms, np.sqrt(c2), residuals, duplicates)


def _classify(found: TokenRows, limits: UntrainedTokenSettings) -> dict[int, tuple[str, float]]:
    """Token → (test, residual ratio) for every flagged token."""
    out: dict[int, tuple[str, float]] = {}
    median_norm = median_of(found.norms)
    median_centred = median_of(found.centred_norms)
    median_residual = median_of(found.residuals)
    ratio = found.residuals / median_residual if median_residual > 0 else np.ones_like(found.residuals)
    tests = (
        ("zero row", found.norms <= limits.zero_norm * median_norm),
        ("at the mean", found.centred_norms <= limits.mean_distance * median_centred),
        ("identical rows", found.duplicates),
        ("low residual", ratio <= limits.residual_share),
    )
    for name, mask in tests:
        for token in np.flatnonzero(mask):
            out.setdefault(int(token), (name, float(ratio[token])))
    return out


def check_layer(
    ctx: AuditContext, settings: RuleSettings[UntrainedTokenSettings], layer: Layer
) -> Iterator[Finding]:
    """One finding per token matrix with tokens that look never trained."""
    matrices = _matrices(ctx)
    role = matrices.role(layer)
    if role is None or layer.units < 4:
        return
    limits = settings.for_layer(layer)
    norms = ctx.stats.row_norms(layer)
    if not np.isfinite(norms).all():
        ctx.notes.add(RULE.name, "not judged: the token matrix holds NaN or Inf", layer.name)
        return
    k, squares = limits.principal_directions, np.square(norms)
    streamed = ctx.stats.streamed(layer)  # a table too large to cache is never assembled
    if streamed is not None:
        found = measure_blocks(streamed, (layer.units, layer.fan_in), k, squares)
    else:
        found = measure(ctx.stats.matrix(layer), k, squares)
    flagged = _classify(found, limits)
    if not flagged:
        return
    names = _names(ctx)
    if names.why_not is not None:
        ctx.notes.add(RULE.name, names.why_not)
    tokens = sorted(flagged)
    counts: dict[str, int] = {}
    for test, _ratio in flagged.values():
        counts[test] = counts.get(test, 0) + 1
    listed = [
        {"id": t, "text": names.text(t), "test": flagged[t][0], "residual_ratio": flagged[t][1]}
        for t in tokens[: max(1, limits.max_listed)]
    ]
    shown = ", ".join(
        f"{item['id']} {item['text']!r}" if item["text"] is not None else str(item["id"])
        for item in listed[:12]
    )
    more = f" and {counted(len(tokens) - 12)} more" if len(tokens) > 12 else ""
    lowest = min(ratio for _test, ratio in flagged.values())
    by_test = ", ".join(f"{name} {counted(n)}" for name, n in counts.items())
    yield layer_finding(
        RULE.name,
        layer,
        severity=Severity.WARNING,
        units=tokens,
        score=score(len(tokens) / layer.units, limits.residual_share / max(lowest, 1e-6)),
        message=(
            f"{counted(len(tokens))} of {counted(layer.units)} tokens look never trained in the {role} "
            f"({by_test}): {shown}{more}"
        ),
        hint="train these tokens (put them in the fine-tuning data) or keep them out of "
        "prompts (strip them in the tokenizer, mask their logits)",
        evidence={
            "matrix": role,
            "counts": counts,
            "tokens": listed,
            "median_residual": median_of(found.residuals),
            "principal_directions": limits.principal_directions,
        },
    )


RULE = RuleSpec(
    name="untrained-token",
    severity=Severity.WARNING,
    settings=UntrainedTokenSettings,
    summary="a token whose rows were never trained makes the model behave unpredictably "
    "whenever it appears in a prompt",
    doc=__doc__ or "",
    per_layer=check_layer,
)
