"""Running the rules over one checkpoint: loaders → graph → rules → findings → ranking."""

from __future__ import annotations

import hashlib
import os
from collections.abc import Callable, Iterable, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import fields
from typing import Any, Protocol, TypeVar

from steelyard.blas import blas_threads
from steelyard.coverage import coverage_of
from steelyard.digest import DEFAULT_DIGEST, Digest, digest_named
from steelyard.findings import Finding
from steelyard.gradients import GradientSource
from steelyard.graph import Checkpoint, Layer
from steelyard.inventory import checkpoint_block, layer_block, stored_type_of
from steelyard.policy import Policy
from steelyard.progress_events import layer_done
from steelyard.ranking import rank, rank_key
from steelyard.report import CheckpointAudit, LayerHealth, Suppressed
from steelyard.rules import AuditContext, RuleSettings, RuleSpec, registry
from steelyard.rules.base import RuleMeasurements, RuleNotes
from steelyard.rules.engine import apply_policy
from steelyard.stats import STREAM_BYTES, LayerStats
from steelyard.work_lanes import run_in_lanes

_HASH_CHUNK = 8 * 2**20

T = TypeVar("T")
R = TypeVar("R")


class _Hasher(Protocol):
    """What :func:`digest_of` needs of a hash object (hashlib's and blake3's both have it)."""

    def update(self, data: memoryview, /) -> object: ...

    def hexdigest(self) -> str: ...


def digest_of(files: Iterable[str], algorithm: str = DEFAULT_DIGEST.value) -> str:
    """The hex digest of the bytes of every file of the checkpoint, in order, with
    ``algorithm`` (``blake3``, the default, or ``sha256``; see :mod:`steelyard.digest`).

    BLAKE3 runs with the package's default settings, on the calling thread: the audit
    already overlaps hashing with its rule workers, so its own threads (``max_threads``)
    would only compete with them. Both libraries release the GIL on large updates."""
    hasher: _Hasher
    if digest_named(algorithm) is Digest.BLAKE3:
        # Imported here: start-up (``--version``, ``rules``) never pays for it.
        import blake3

        hasher = blake3.blake3()
    else:
        hasher = hashlib.sha256()
    # One reused buffer: a fresh 8 MiB bytes object per read costs page faults each time.
    buffer = memoryview(bytearray(_HASH_CHUNK))
    for name in files:
        with open(name, "rb", buffering=0) as handle:
            while count := handle.readinto(buffer):
                hasher.update(buffer[:count])
    return hasher.hexdigest()


def default_jobs() -> int:
    """Worker threads when none are asked for: the cores this process may run on."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):  # pragma: no cover - not every platform has affinity
        return max(1, os.cpu_count() or 1)


def _map(pool: ThreadPoolExecutor | None, work: Callable[[T], R], items: Sequence[T]) -> list[R]:
    """``[work(x) for x in items]``, on the pool when there is one; the result keeps the
    items' order. (Layer tasks, which need the costliest first, go through
    :func:`steelyard.work_lanes.run_in_lanes`.)"""
    if pool is None:
        return [work(item) for item in items]
    futures = [pool.submit(work, item) for item in items]
    return [future.result() for future in futures]


def _parameters(checkpoint: Checkpoint, layer: Layer) -> int:
    """Elements of the layer's tensors (what its share of the file is measured by)."""
    tensors = checkpoint.tensors
    return sum(tensors[name].size for name in layer.tensor_names if name in tensors)


#: Layers with at most this many weights cost mostly interpreter time (a few hundred small
#: numpy calls), not passes over memory: one worker runs them all (:mod:`steelyard.work_lanes`).
SMALL_LAYER = 2**20


def _streamed(layer: Layer) -> bool:
    """Whether the layer's float32 matrix is over the cache limit (streamed, never cached)."""
    return 4 * layer.units * layer.fan_in > STREAM_BYTES


def _small(layer: Layer) -> bool:
    # A streamed layer is never small (with the default limits it could not be; a lowered
    # STREAM_BYTES must not make it so).
    return layer.units * layer.fan_in <= SMALL_LAYER and not _streamed(layer)


def _task_groups(layers: Sequence[Layer]) -> list[tuple[int, ...]]:
    """The layer tasks of an audit, as positions in ``layers``: one per layer, except that the
    layers whose matrix is too large for the cache (embedding, head) form one task, in file
    order.

    Those layers are streamed by the shared pass, but a rule may still ask for one whole
    (``untrained-token`` reads the token matrices): run one after another they never hold
    two such working sets at once, while the other workers go on with the small layers
    (when each of them ran alone, every other worker waited meanwhile). Every layer keeps a
    one-thread BLAS: with two, OpenBLAS summed float32 products in an order that depended on
    whether the main thread (jobs 1) or a worker (jobs 2) called it, so the report depended
    on ``jobs`` (untrained-token's residuals differed in the 8th digit)."""
    large = [_streamed(layer) for layer in layers]
    chained = tuple(i for i, is_large in enumerate(large) if is_large)
    return ([chained] if chained else []) + [(i,) for i, is_large in enumerate(large) if not is_large]


def run_rules(
    checkpoint: Checkpoint,
    policy: Policy,
    gradients: GradientSource | None,
    rules: dict[str, RuleSpec] | None = None,
    jobs: int = 1,
    notes: RuleNotes | None = None,
    stats: LayerStats | None = None,
    measurements: RuleMeasurements | None = None,
    pool: ThreadPoolExecutor | None = None,
) -> tuple[list[Finding], list[Suppressed], LayerStats]:
    """Every rule's findings that the policy keeps (policy severities applied), the findings
    the policy's ignore entries silenced, and the statistics. What rules could not do goes to
    ``notes``.

    Per-layer rules run layer by layer: each task runs every such rule enabled on one layer
    while that layer's data is in memory, then releases it, so each tensor is read once.
    Whole-checkpoint rules (and the per-layer rules' ``finish``) run afterwards, one at a
    time. ``jobs`` > 1 runs layer tasks on that many threads, every one with a one-thread
    BLAS; the layers too large for the matrix cache are one task, run one after another, so
    two of them never hold their working sets at once; one worker runs all the small layers
    and the others only the rest (:mod:`steelyard.work_lanes`); numpy, BLAS, file reads and
    hashing release the GIL in the heavy loops, so threads rather than processes. The
    findings are collected in the same order as with one, so the report does not depend on
    ``jobs``.
    ``pool`` (of ``jobs`` threads) is the caller's when it has work of its own on it.
    """
    # A comparison passes the statistics it measures change from, so each layer is read once.
    stats = stats if stats is not None else LayerStats(checkpoint)
    context = AuditContext(
        checkpoint=checkpoint,
        stats=stats,
        policy=policy,
        gradients=gradients,
        notes=notes if notes is not None else RuleNotes(),
        measurements=measurements if measurements is not None else RuleMeasurements(),
    )
    specs = list((rules or registry()).values())
    settings: dict[str, RuleSettings[Any]] = {spec.name: RuleSettings(spec, policy) for spec in specs}
    hooked = [spec for spec in specs if spec.per_layer is not None]

    # Bytes of the file per parameter, so progress can say how much of it was read.
    per_parameter = checkpoint.file_size / max(1, checkpoint.parameters)

    def one_layer(layer: Layer) -> list[list[Finding]]:
        try:
            out: list[list[Finding]] = []
            for spec in hooked:
                assert spec.per_layer is not None
                rule_settings = settings[spec.name]
                # A rule never runs where the policy switched it off.
                enabled = rule_settings.enabled(layer)
                out.append(list(spec.per_layer(context, rule_settings, layer)) if enabled else [])
            # The report row's norm summary, here so that it runs on the workers too.
            stats.spread(layer)
            return out
        finally:
            stats.release(layer)
            layer_done(checkpoint.path, round(per_parameter * _parameters(checkpoint, layer)))

    def some_layers(group: tuple[int, ...]) -> list[list[list[Finding]]]:
        return [one_layer(checkpoint.layers[i]) for i in group]

    def whole(spec: RuleSpec) -> list[Finding]:
        rule_settings = settings[spec.name]
        if spec.whole is not None:
            on = rule_settings.enabled_anywhere()
            return list(spec.whole(context, rule_settings)) if on else []
        # ``finish`` always runs: it may report what the rule could not do (a note).
        return list(spec.finish(context, rule_settings)) if spec.finish else []

    own = pool is None and jobs > 1
    if own:
        pool = ThreadPoolExecutor(max_workers=jobs)
    try:
        # One BLAS thread per worker: the workers already keep every core busy, and two BLAS
        # calls that each start a thread per core from two workers make four threads fight
        # over two cores (a freshly initialised 322M checkpoint took 5.4 s with two workers
        # that way, 3.2 s with one BLAS thread each, and 3.9 s on one worker).
        with blas_threads(1):
            per_layer: list[list[list[Finding]]] = [[] for _ in checkpoint.layers]
            if hooked:
                groups = _task_groups(checkpoint.layers)
                done = run_in_lanes(
                    pool, jobs, some_layers, groups,
                    cost=lambda group: sum(_parameters(checkpoint, checkpoint.layers[i]) for i in group),
                    small=lambda group: all(_small(checkpoint.layers[i]) for i in group),
                )
                for group, outcomes in zip(groups, done, strict=True):
                    for i, outcome in zip(group, outcomes, strict=True):
                        per_layer[i] = outcome
            if any(spec.tensor_scan for spec in specs):
                _map(pool, stats.nonfinite, stats.scan_targets())
        # Whole-checkpoint rules scan every layer themselves: one after another, because two
        # at once hold two working sets while BLAS already keeps every core busy.
        rest = [whole(spec) for spec in specs]
    finally:
        if own and pool is not None:
            pool.shutdown(wait=True, cancel_futures=True)

    findings: list[Finding] = []
    suppressed: list[Suppressed] = []
    for index, spec in enumerate(specs):
        produced: list[Finding] = []
        if spec.per_layer is not None:
            column = hooked.index(spec)
            for results in per_layer:
                produced += results[column]
        produced += rest[index]
        kept, silenced = apply_policy(
            settings[spec.name],
            produced,
            policy=policy,
            checkpoint=checkpoint.path,
            locate=checkpoint.layer,
        )
        findings += kept
        suppressed += silenced
    return findings, suppressed, stats


#: Layer-health fields every row has; the others are filled by rules (``RuleSpec.health``).
_MEASURED = ("layer", "fan_in_norm", "norm_histogram", "norm_percentiles", "norm_outliers", "measured")
_RULE_FILLED = tuple(f for f in fields(LayerHealth) if f.name not in _MEASURED)


def _health(
    layer: Layer,
    stats: LayerStats,
    findings: list[Finding],
    specs: list[RuleSpec],
    graded: bool,
    measured: RuleMeasurements,
) -> LayerHealth:
    spread = stats.spread(layer)
    # A column no rule of this run fills is empty: None where the report allows it, else 0.
    columns: dict[str, Any] = {
        f.name: None if "None" in str(f.type) else 0 for f in _RULE_FILLED
    }
    mine = [f for f in findings if f.layer == layer.name]
    for spec in specs:
        for column in spec.health:
            if column.needs_gradients and not graded:
                continue
            columns[column.field] = column.measure(layer, [f for f in mine if f.rule == spec.name])
    return LayerHealth(
        layer=layer_block(layer, stored_type_of(stats.checkpoint, layer)),
        fan_in_norm=(spread.low, spread.median, spread.high),
        norm_histogram=spread.histogram,
        norm_percentiles=spread.percentiles,
        norm_outliers=spread.outliers,
        measured=measured.of(layer.name),
        **columns,
    )


def audit_checkpoint(
    checkpoint: Checkpoint,
    policy: Policy,
    gradients: GradientSource | None,
    rules: dict[str, RuleSpec] | None = None,
    jobs: int = 1,
    stats: LayerStats | None = None,
    digest: str = DEFAULT_DIGEST.value,
) -> CheckpointAudit:
    """Audit one loaded checkpoint (``jobs`` worker threads; the result does not depend on it),
    reading through ``stats`` when given (their checkpoint must be ``checkpoint``). The
    checkpoint block carries the files' ``digest`` (``blake3`` or ``sha256``) under that
    algorithm's name."""
    algorithm = digest_named(digest).value
    files = checkpoint.files or (checkpoint.path,)
    notes = RuleNotes()
    measured = RuleMeasurements()
    if jobs > 1:
        # Hashing is a sequential pass over every byte: the first task of the workers, so it
        # overlaps the rules (hashlib and blake3 release the GIL on large updates) without a
        # thread of its own. On two cores a third thread cost more than it overlapped (300m,
        # i.i.d. weights: 1.29 s with a hashing thread, 1.14 s without; peak RSS 371 -> 232
        # MiB; docs/performance.md, section D, "Fifth session").
        with ThreadPoolExecutor(max_workers=jobs) as pool:
            hashing = pool.submit(digest_of, files, algorithm)
            findings, suppressed, stats = run_rules(
                checkpoint, policy, gradients, rules, jobs, notes, stats, measured, pool
            )
            identity = hashing.result()
    else:
        findings, suppressed, stats = run_rules(
            checkpoint, policy, gradients, rules, 1, notes, stats, measured
        )
        identity = digest_of(files, algorithm)
    ranked = rank(findings)
    specs = list((rules or registry()).values())
    block = dict(checkpoint_block(checkpoint))
    block[algorithm] = identity
    block["files"] = list(files)
    health = tuple(
        _health(layer, stats, findings, specs, gradients is not None, measured)
        for layer in checkpoint.layers
    )
    return CheckpointAudit(
        checkpoint=block,
        layers=health,
        findings=ranked,
        gradient_source=gradients.description if gradients else None,
        notes=(
            *checkpoint.notes,
            *(gradients.notes if gradients else ()),
            *notes.lines([layer.name for layer in checkpoint.layers]),
        ),
        ignored=len(suppressed),
        coverage=coverage_of(checkpoint),
        suppressed=tuple(sorted(suppressed, key=lambda s: rank_key(s.finding))),
    )
