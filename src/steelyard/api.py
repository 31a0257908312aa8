"""The library API: what the CLI calls, and what notebooks and tests call directly.

>>> import steelyard
>>> report = steelyard.audit("model.safetensors")      # doctest: +SKIP
>>> report.passed, report.to_json()                     # doctest: +SKIP
"""

from __future__ import annotations

import datetime as _dt
import os
import struct
import zipfile
from collections.abc import Callable, Sequence
from pathlib import Path

from steelyard import __version__
from steelyard.audit import audit_checkpoint, default_jobs
from steelyard.compare.report import CompareReport
from steelyard.errors import LoadError, SteelyardError
from steelyard.gradients import GradientSource, GradsKind, optimizer_source, sidecar_source
from steelyard.graph import Checkpoint
from steelyard.loaders import load as _load
from steelyard.loaders import resolve
from steelyard.policy import Policy
from steelyard.report import CheckpointAudit, Report


def load(path: str | Path) -> Checkpoint:
    """Read a checkpoint's structure; tensors stay on disk until something reads them."""
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
    checkpoint: Checkpoint, grads: str | Path | None, grads_kind: GradsKind = GradsKind.RMS
) -> GradientSource | None:
    """The gradient support to use: the sidecar when given, else the checkpoint's optimizer."""
    if grads is not None:
        return sidecar_source(str(grads), grads_kind, _load(grads))
    return optimizer_source(checkpoint)


def audit_one(
    path: str | Path,
    policy: Policy,
    grads: str | Path | None = None,
    grads_kind: GradsKind = GradsKind.RMS,
    jobs: int | None = None,
) -> CheckpointAudit:
    """Load and audit one checkpoint (``jobs`` threads, default: the machine's cores)."""
    checkpoint = _load(path)
    source = gradient_source(checkpoint, grads, grads_kind)
    try:
        return audit_checkpoint(checkpoint, policy, source, jobs=_jobs(jobs))
    except (OSError, ValueError, EOFError, zipfile.BadZipFile, struct.error) as exc:
        # Tensors are read lazily, so a file can turn out broken only when a rule reads it.
        raise LoadError(
            checkpoint.path, f"could not be read ({type(exc).__name__}: {exc})"
        ) from exc


#: File endings a folder is searched for when it is not itself one checkpoint.
CHECKPOINT_SUFFIXES = (
    ".safetensors",
    ".onnx",
    ".keras",
    ".h5",
    ".hdf5",
    ".npz",
    ".pt",
    ".pth",
    ".bin",
    ".ckpt",
)


def expand_paths(paths: Sequence[str | Path]) -> list[Path]:
    """Files to audit: a folder that is one checkpoint (a shard set) stays one; any other
    folder stands for the checkpoints inside it (recursively, sorted)."""
    out: list[Path] = []
    for raw in paths:
        path = Path(raw)
        if not path.is_dir():
            out.append(path)
            continue
        try:
            out.append(resolve(path))
            continue
        except LoadError:
            pass
        indexes = sorted(path.rglob("*.safetensors.index.json"))
        sharded = {p.parent for p in indexes}
        found = [*indexes]
        for candidate in sorted(path.rglob("*")):
            if candidate.is_symlink() or not candidate.is_file():
                continue
            if candidate.suffix in CHECKPOINT_SUFFIXES and not (
                candidate.suffix == ".safetensors" and candidate.parent in sharded
            ):
                found.append(candidate)
        if not found:
            raise LoadError(path, "is a folder holding no checkpoint files")
        out.extend(sorted(found))
    return out


def _jobs(jobs: int | None) -> int:
    if jobs is None:
        return default_jobs()
    if jobs < 1:
        raise SteelyardError(f"jobs must be at least 1, not {jobs}")
    return jobs


def audit_many(
    paths: Sequence[str | Path],
    policy: Policy | None = None,
    grads: str | Path | None = None,
    grads_kind: GradsKind = GradsKind.RMS,
    created: str | None = None,
    on_checkpoint: Callable[[str], None] | None = None,
    jobs: int | None = None,
) -> Report:
    """Audit several checkpoints under one gate.

    ``jobs`` is the number of worker threads per checkpoint (default: the machine's cores);
    the report is the same for every value.
    """
    chosen = policy or Policy()
    audits: list[CheckpointAudit] = []
    for path in paths:
        if on_checkpoint is not None:
            on_checkpoint(str(path))
        audits.append(audit_one(path, chosen, grads, grads_kind, jobs))
    return Report(
        tool_version=__version__,
        created=created or now(),
        fail_on=chosen.fail_on,
        policy_source=chosen.source,
        audits=tuple(audits),
    )


def audit(
    path: str | Path,
    grads: str | Path | None = None,
    policy: Policy | None = None,
    grads_kind: GradsKind = GradsKind.RMS,
    jobs: int | None = None,
) -> Report:
    """Audit one checkpoint: ``report.passed`` is the gate, ``report.to_json()`` the document."""
    return audit_many([path], policy=policy, grads=grads, grads_kind=grads_kind, jobs=jobs)


def compare(
    old: str | Path,
    new: str | Path,
    policy: Policy | None = None,
    created: str | None = None,
) -> CompareReport:
    """Compare two checkpoints: ``report.passed`` is the gate, ``report.to_json()`` the
    ``steelyard.compare/1`` document."""
    from steelyard.compare import compare_checkpoints

    chosen = policy or Policy()
    before = _load(old)
    after = _load(new)
    try:
        comparison = compare_checkpoints(before, after, chosen)
    except (OSError, ValueError, EOFError, zipfile.BadZipFile, struct.error) as exc:
        # Tensors are read lazily, so a file can turn out broken only when it is compared.
        raise LoadError(
            f"{before.path} or {after.path}", f"could not be read ({type(exc).__name__}: {exc})"
        ) from exc
    return CompareReport(
        tool_version=__version__,
        created=created or now(),
        fail_on=chosen.fail_on,
        policy_source=chosen.source,
        comparison=comparison,
        frozen=tuple(chosen.frozen),
    )
