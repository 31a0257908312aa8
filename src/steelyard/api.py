"""The library API: what the CLI calls, and what notebooks and tests call directly.

>>> import steelyard
>>> report = steelyard.audit("model.safetensors")      # doctest: +SKIP
>>> report.passed, report.to_json()                     # doctest: +SKIP
"""

from __future__ import annotations

import datetime as _dt
import os
from collections.abc import Callable, Sequence
from contextlib import AbstractContextManager, nullcontext
from dataclasses import dataclass, replace
from pathlib import Path
from typing import TYPE_CHECKING

from steelyard import budget as _budget
from steelyard import discovery
from steelyard.budget import Budget
from steelyard.checkpoint_audit import audit_checkpoint, default_jobs
from steelyard.digest import DEFAULT_DIGEST, digest_named
from steelyard.discovery import Plan
from steelyard.errors import LoadError, PolicyError, SteelyardError, UnreadableTensor
from steelyard.findings import FailOn
from steelyard.gradients import GradientSource, GradsKind, optimizer_source, sidecar_source
from steelyard.graph import Checkpoint
from steelyard.loaders import SUPPORTED
from steelyard.loaders import load as _load
from steelyard.loaders.meanwhile import meanwhile
from steelyard.policy import Policy, unmatched_globs
from steelyard.report import CheckpointAudit, InputError, Report
from steelyard.version import __version__

if TYPE_CHECKING:
    # Imported by compare() itself: an audit never imports the comparison package.
    from steelyard.comparison.report import CompareReport

    # Imported by timeline() itself: the timeline's records cost every command ~10 ms.
    from steelyard.run_timeline.result import Timeline


def _limits(budget: Budget | None, policy: Policy | None = None) -> AbstractContextManager[object]:
    """Run under ``budget``, else the policy's ``[budget]``, else the budget in force."""
    chosen = budget if budget is not None else (policy.budget if policy is not None else None)
    return _budget.using(chosen) if chosen is not None else nullcontext()


def load(path: str | Path, budget: Budget | None = None) -> Checkpoint:
    """Read a checkpoint's structure; tensors stay on disk until something reads them.

    Args:
        path: a checkpoint file, a shard index, or a folder holding one checkpoint.
        budget: what reading may cost (default: the budget in force, see
            :mod:`steelyard.budget`).

    Returns:
        The framework-neutral :class:`~steelyard.graph.Checkpoint` (layers, tensors, links).

    Raises:
        LoadError: when the file cannot be read safely (malformed, hostile, unsupported),
            with a message naming the file and the problem.
    """
    with _limits(budget):
        return _load(path)


def now() -> str:
    """The run's timestamp: ``SOURCE_DATE_EPOCH`` when set (reproducible builds), else now."""
    epoch = os.environ.get("SOURCE_DATE_EPOCH")
    if epoch is not None:
        try:
            moment = _dt.datetime.fromtimestamp(int(epoch), tz=_dt.timezone.utc)
        except (ValueError, OverflowError, OSError):
            raise SteelyardError(f"SOURCE_DATE_EPOCH={epoch!r} is not a Unix time") from None
    else:
        moment = _dt.datetime.now(tz=_dt.timezone.utc)
    return moment.replace(microsecond=0).isoformat().replace("+00:00", "Z")


def gradient_source(
    checkpoint: Checkpoint,
    grads: str | Path | Checkpoint | None,
    grads_kind: GradsKind = GradsKind.RMS,
) -> GradientSource | None:
    """The gradient support to use: the sidecar when given (checked against the checkpoint:
    one that matches none of its layers is an input error), else the checkpoint's optimizer."""
    if grads is None:
        return optimizer_source(checkpoint)
    sidecar = grads if isinstance(grads, Checkpoint) else _load(grads)
    return sidecar_source(sidecar.path, grads_kind, sidecar, checkpoint)


def _unreadable(where: str | Path, exc: UnreadableTensor) -> LoadError:
    """The input error for a tensor that turned out broken when a rule or comparison read it
    (tensors are read lazily); any other exception from the engine is a bug and passes on."""
    if isinstance(exc.cause, (MemoryError, RecursionError)):
        return LoadError(where, _exhausted(exc.cause))
    return LoadError(where, f"could not be read ({exc})")


def audit_one(
    path: str | Path,
    policy: Policy,
    grads: str | Path | Checkpoint | None = None,
    grads_kind: GradsKind = GradsKind.RMS,
    jobs: int | None = None,
    budget: Budget | None = None,
    digest: str = DEFAULT_DIGEST.value,
) -> CheckpointAudit:
    """Load and audit one checkpoint (``jobs`` threads, default: the machine's cores; the
    files' ``digest``, ``blake3`` or ``sha256``, in the checkpoint block)."""
    algorithm = digest_named(digest).value
    with _limits(budget, policy):
        checkpoint = _load(path)
        source = gradient_source(checkpoint, grads, grads_kind)
        return _audited(checkpoint, policy, source, _jobs(jobs), algorithm)


def plan(
    paths: Sequence[str | Path], grads: str | Path | None = None, base: str | Path | None = None
) -> Plan:
    """What a run over ``paths`` audits (folders searched recursively) and what it skips;
    the side inputs (a gradient sidecar, an adapter's base model) are never targets."""
    sides: dict[str | Path, str] = {}
    if grads is not None:
        sides[grads] = "the --grads sidecar of this run"
    if base is not None:
        sides[base] = "the --base model of this run"
    return discovery.plan(paths, exclude=sides)


def expand_paths(paths: Sequence[str | Path]) -> list[Path]:
    """The checkpoints ``paths`` stand for (see :mod:`steelyard.discovery`)."""
    return discovery.plan(paths).targets


def _jobs(jobs: int | None) -> int:
    if jobs is None:
        return default_jobs()
    if jobs < 1:
        raise SteelyardError(f"jobs must be at least 1, not {jobs}")
    return jobs


def _containers_first(targets: Sequence[Path]) -> list[Path]:
    """ONNX models first: the files they read as external data are parts of them, not
    checkpoints of their own, and that must be known before those files come up."""
    return sorted(targets, key=lambda p: 0 if p.suffix == ".onnx" else 1)


def policy_in_force(policy: Policy | str | Path | None = None) -> Policy:
    """The policy a run uses: ``policy`` itself, the policy file at that path, or (None) the
    project's ``steelyard.toml`` / ``[tool.steelyard]`` found upwards from the working
    directory exactly as the CLI finds it, else the built-in defaults. Pass ``Policy()`` to
    use the defaults whatever files are around. Raises :class:`~steelyard.errors.PolicyError`
    for a broken policy file."""
    if isinstance(policy, Policy):
        return policy
    from steelyard.policy_file import load_policy

    return load_policy(Path(policy) if policy is not None else None)


def audit_many(
    paths: Sequence[str | Path] | Plan,
    policy: Policy | str | Path | None = None,
    grads: str | Path | None = None,
    grads_kind: GradsKind = GradsKind.RMS,
    created: str | None = None,
    on_checkpoint: Callable[[str], None] | None = None,
    jobs: int | None = None,
    unreadable_fails_gate: bool = False,
    budget: Budget | None = None,
    base: str | Path | None = None,
    digest: str = DEFAULT_DIGEST.value,
) -> Report:
    """Audit several checkpoints (files, shard indexes, folders) under one gate.

    Every checkpoint gets a result of its own: an audit, or an :class:`InputError` when it
    cannot be read; one broken file never ends the run. ``jobs`` is the number of worker
    threads per checkpoint (default: the machine's cores); the report is the same for every
    value. A ``grads`` sidecar gives support to the checkpoints whose layers it matches; one
    that matches no checkpoint of the run is an input error. Reading runs under ``budget``
    (else the policy's ``[budget]`` table, else the budget in force). With ``base``, every
    LoRA/DoRA adapter of the run is audited merged onto that base model (the other
    checkpoints as they are); a base that no adapter of the run uses is an input error.
    ``policy`` is resolved by :func:`policy_in_force` (by default, the project's policy file,
    as the CLI finds it). ``digest`` names the content hash of each checkpoint's identity:
    ``blake3`` (the default) or ``sha256`` (to match digests that registries and manifests
    publish); any other value is a :class:`~steelyard.errors.SteelyardError`.
    """
    algorithm = digest_named(digest).value
    chosen = policy_in_force(policy)
    with _limits(budget, chosen):
        return _audit_many(
            paths,
            chosen,
            _Sides(grads, grads_kind, base),
            created,
            on_checkpoint,
            jobs,
            unreadable_fails_gate,
            algorithm,
        )


@dataclass(frozen=True)
class _Sides:
    """The side inputs of a run: a gradient sidecar and a base model for adapters."""

    grads: str | Path | None
    grads_kind: GradsKind
    base: str | Path | None


def _audit_many(
    paths: Sequence[str | Path] | Plan,
    chosen: Policy,
    sides: _Sides,
    created: str | None,
    on_checkpoint: Callable[[str], None] | None,
    jobs: int | None,
    unreadable_fails_gate: bool,
    digest: str,
) -> Report:
    grads, grads_kind = sides.grads, sides.grads_kind
    run = paths if isinstance(paths, Plan) else plan(paths, grads, sides.base)
    workers = _jobs(jobs)
    sidecar = _load(grads) if grads is not None else None
    base = _load(sides.base) if sides.base is not None else None
    base_used = False
    audits: list[CheckpointAudit] = []
    errors = list(run.errors)
    consumed: set[str] = set()
    sidecar_used = False
    for path in _containers_first(run.targets):
        if _same(path) in consumed:
            continue  # external data of an ONNX model audited above
        if on_checkpoint is not None:
            on_checkpoint(str(path))
        try:
            checkpoint, merged = _target(path, base)
            audit, used = _audit_target(
                checkpoint, chosen, sidecar, grads_kind, workers, run, digest
            )
        except LoadError as error:
            errors.append(InputError(str(error.path), error.reason))
            continue
        base_used |= merged
        sidecar_used |= used
        audits.append(audit)
        consumed |= {_same(f) for f in audit.checkpoint.get("files", ())}
    for part in run.maybe_parts:
        if _same(part) not in consumed:
            errors.append(
                InputError(str(part), f"is not a checkpoint steelyard can read; supported: {SUPPORTED}")
            )
    if sidecar is not None and audits and not sidecar_used:
        raise LoadError(sidecar.path, "gradient sidecar matches no layer of any checkpoint of this run")
    if base is not None and not base_used and (audits or not errors):
        raise LoadError(base.path, "--base was given but no checkpoint of this run is an adapter")
    return Report(
        tool_version=__version__,
        created=created or now(),
        fail_on=chosen.fail_on,
        policy_source=chosen.source,
        audits=tuple(sorted(audits, key=lambda a: str(a.checkpoint["path"]))),
        errors=tuple(sorted(errors, key=lambda e: e.path)),
        skipped=tuple(run.skipped),
        notes=tuple(_run_notes(run)),
        policy_notes=tuple(unmatched_globs(chosen, audits)),
        unreadable_fails_gate=unreadable_fails_gate,
    )


def _same(path: str | Path) -> str:
    return os.path.normcase(os.path.abspath(path))


def _target(path: Path, base: Checkpoint | None) -> tuple[Checkpoint, bool]:
    """The checkpoint to audit for ``path``, and whether it is an adapter merged onto
    ``base``."""
    if base is not None:
        from steelyard.loaders.adapter import is_adapter_file

        with open(path, "rb") as handle:
            head = handle.read(4096)
        if is_adapter_file(path, head):
            from steelyard.loaders.adapter import load_adapter

            return load_adapter(path, base=base), True
    # The audit's rule modules are imported while a sandboxed reader (HDF5) reads the file's
    # structure in its child, rather than after it.
    with meanwhile(_rule_modules):
        return _load(path), False


def _rule_modules() -> None:
    from steelyard.rules import registry

    registry()


def _audit_target(
    checkpoint: Checkpoint,
    policy: Policy,
    sidecar: Checkpoint | None,
    grads_kind: GradsKind,
    jobs: int,
    run: Plan,
    digest: str,
) -> tuple[CheckpointAudit, bool]:
    """One checkpoint's audit, and whether the sidecar gave it support."""
    if sidecar is None:
        return _audited(checkpoint, policy, optimizer_source(checkpoint), jobs, digest), False
    try:
        source = sidecar_source(sidecar.path, grads_kind, sidecar, checkpoint)
    except LoadError:
        if len(run.targets) == 1:
            raise
        # Several checkpoints: the sidecar was made for another one of them.
        audit = _audited(checkpoint, policy, optimizer_source(checkpoint), jobs, digest)
        note = f"gradient sidecar {sidecar.path} matches no layer of this checkpoint; not used"
        return replace(audit, notes=(*audit.notes, note)), False
    return _audited(checkpoint, policy, source, jobs, digest), True


def _audited(
    checkpoint: Checkpoint,
    policy: Policy,
    source: GradientSource | None,
    jobs: int,
    digest: str,
) -> CheckpointAudit:
    try:
        return audit_checkpoint(checkpoint, policy, source, jobs=jobs, digest=digest)
    except UnreadableTensor as exc:
        raise _unreadable(checkpoint.path, exc) from exc
    except (MemoryError, RecursionError) as exc:
        # A checkpoint too large or too deeply nested for a reader without an explicit check:
        # this checkpoint's own input error (the run goes on), never a crash.
        raise LoadError(checkpoint.path, _exhausted(exc)) from exc


def _exhausted(exc: BaseException) -> str:
    problem = "too large" if isinstance(exc, MemoryError) else "too deeply nested"
    return f"is {problem} to read within this process's limits ({type(exc).__name__})"


def _run_notes(run: Plan) -> list[str]:
    if not run.ignored_files:
        return []
    noun = "file" if run.ignored_files == 1 else "files"
    return [
        f"{run.ignored_files:,} other {noun} in the folders searched (configs, tokenizers, "
        "documents) are not weight files and were not audited"
    ]


def audit(
    path: str | Path | Sequence[str | Path],
    grads: str | Path | None = None,
    policy: Policy | str | Path | None = None,
    grads_kind: GradsKind = GradsKind.RMS,
    jobs: int | None = None,
    budget: Budget | None = None,
    base: str | Path | None = None,
    *,
    fail_on: str | FailOn | None = None,
    baseline: str | Path | None = None,
    digest: str = DEFAULT_DIGEST.value,
) -> Report:
    """Audit checkpoints as ``steelyard audit`` does: ``report.passed`` is the gate,
    ``report.to_json()`` the document.

    Args:
        path: a file, a shard index, a folder (every checkpoint in it), or a list of them.
        grads: a sidecar of per-weight gradient statistics with the model's tensor names.
        policy: resolved by :func:`policy_in_force`: by default the project's policy file,
            found as the CLI finds it; a path names a file; ``Policy()`` means the defaults.
        grads_kind: what the sidecar holds.
        jobs: worker threads (default: the machine's cores); the report does not depend on it.
        budget: what reading may cost (see :mod:`steelyard.budget`).
        base: the base model a LoRA/DoRA adapter is merged onto.
        fail_on: the gate, overriding the policy's (``error``, ``warning``, ``info``,
            ``never``), as ``--fail-on`` does.
        baseline: an earlier baseline file or JSON report: findings in it are reported but
            not gated on, as ``--baseline`` does (baselines match findings by checkpoint path
            and finding id, never by the file digest).
        digest: the content hash of each checkpoint's identity, as ``--digest``: ``blake3``
            (the default) or ``sha256`` (to match digests that registries and manifests
            publish); the checkpoint block carries it under that name.

    Returns:
        The :class:`~steelyard.report.Report` of the run.

    Raises:
        LoadError: when ``path`` is one file and it cannot be read (in a folder or a list,
            each checkpoint gets its own result instead: see :func:`audit_many`).
        PolicyError: for a broken policy file or an unknown ``fail_on``.
        SteelyardError: for an unknown ``digest``.
    """
    algorithm = digest_named(digest).value
    chosen = policy_in_force(policy)
    if fail_on is not None:
        try:
            gate = FailOn(fail_on)
        except ValueError:
            raise PolicyError(f"fail_on {fail_on!r}: use error, warning, info or never") from None
        chosen = replace(chosen, fail_on=gate.value)
    single = isinstance(path, (str, Path))
    paths: list[str | Path] = [path] if isinstance(path, (str, Path)) else list(path)
    report = audit_many(
        paths,
        policy=chosen,
        grads=grads,
        grads_kind=grads_kind,
        jobs=jobs,
        budget=budget,
        base=base,
        digest=algorithm,
    )
    if single and report.errors and not report.audits and not Path(paths[0]).is_dir():
        error = report.errors[0]
        raise LoadError(error.path, error.reason)
    if baseline is not None:
        from steelyard.baseline import apply_baseline, read_baseline

        report = apply_baseline(report, read_baseline(Path(baseline)))
    return report


def compare(
    old: str | Path,
    new: str | Path,
    policy: Policy | str | Path | None = None,
    created: str | None = None,
    budget: Budget | None = None,
    digest: str = DEFAULT_DIGEST.value,
) -> CompareReport:
    """Compare two checkpoints: ``report.passed`` is the gate, ``report.to_json()`` the
    ``steelyard.compare/1`` document.

    Args:
        old: the earlier checkpoint (file, shard index or folder).
        new: the later one, in the same or another format (a GGUF or quantized export too).
        policy: resolved by :func:`policy_in_force` (by default, the project's policy file).
        created: the run's timestamp for the report (default: ``SOURCE_DATE_EPOCH`` or now).
        budget: what reading may cost (see :mod:`steelyard.budget`).
        digest: the content hash of both checkpoints' identities, ``blake3`` (the default)
            or ``sha256``, as ``--digest``.

    Returns:
        The :class:`~steelyard.comparison.report.CompareReport`.

    Raises:
        LoadError: when either checkpoint cannot be read.
        PolicyError: for a broken policy file.
        SteelyardError: for an unknown ``digest``.
    """
    from steelyard.comparison import compare_checkpoints
    from steelyard.comparison.report import CompareReport

    algorithm = digest_named(digest).value
    chosen = policy_in_force(policy)
    with _limits(budget, chosen):
        before = _load(old)
        after = _load(new)
        try:
            comparison = compare_checkpoints(before, after, chosen, digest=algorithm)
        except UnreadableTensor as exc:
            raise _unreadable(f"{before.path} or {after.path}", exc) from exc
        except (MemoryError, RecursionError) as exc:
            raise LoadError(f"{before.path} or {after.path}", _exhausted(exc)) from exc
    return CompareReport(
        tool_version=__version__,
        created=created or now(),
        fail_on=chosen.fail_on,
        policy_source=chosen.source,
        comparison=comparison,
        frozen=tuple(chosen.frozen),
    )


def timeline(
    paths: str | Path | Sequence[str | Path],
    order: str = "step",
    policy: Policy | str | Path | None = None,
    created: str | None = None,
    on_checkpoint: Callable[[str], None] | None = None,
    jobs: int | None = None,
    budget: Budget | None = None,
    digest: str = DEFAULT_DIGEST.value,
) -> Timeline:
    """Follow one training run's checkpoints as ``steelyard timeline`` does: each audited
    once, per layer the fan-in norms, dead units, non-finite values and drift, and for each
    finding where it appeared and went away. ``timeline.passed`` is the gate (findings of the
    last checkpoint at or above ``fail_on``), ``timeline.to_json()`` the
    ``steelyard.timeline/1`` document.

    Args:
        paths: one path (a run folder) or a list of checkpoints and folders.
        order: ``"step"`` (training step from trainer_state.json, file metadata or names),
            ``"name"`` or ``"given"``.
        policy: resolved by :func:`policy_in_force`.
        created: the run's timestamp for the report (default: ``SOURCE_DATE_EPOCH`` or now).
        on_checkpoint: called with each checkpoint's path before it is read (progress).
        jobs: worker threads per checkpoint's audit.
        budget: what reading may cost (see :mod:`steelyard.budget`).
        digest: the content hash of each checkpoint's identity, ``blake3`` (the default) or
            ``sha256``, as ``--digest``.

    Returns:
        The :class:`~steelyard.run_timeline.result.Timeline`.

    Raises:
        LoadError: when a checkpoint cannot be read.
        SteelyardError: for fewer than two checkpoints, an unknown ``order`` or ``digest``,
            or checkpoints that share no layer.
    """
    from steelyard.run_timeline.engine import RunSettings, build_timeline
    from steelyard.run_timeline.ordering import arrange
    from steelyard.run_timeline.read_order import Order

    try:
        chosen_order = Order(order)
    except ValueError:
        raise SteelyardError(f"order {order!r}: use step, name or given") from None
    algorithm = digest_named(digest).value
    chosen = policy_in_force(policy)
    with _limits(budget, chosen):
        named = [paths] if isinstance(paths, (str, Path)) else list(paths)
        placed, notes = arrange(named, chosen_order)
        if len(placed) < 2:
            where = ", ".join(str(p) for p in named) or "no paths"
            raise SteelyardError(
                f"{where}: a timeline needs at least two checkpoints, found {len(placed)}"
            )
        settings = RunSettings(
            chosen, chosen_order.value, created or now(), _jobs(jobs), tuple(notes), algorithm
        )
        return build_timeline(placed, settings, on_checkpoint)
