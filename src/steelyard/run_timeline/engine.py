"""The timeline's streaming loop: each checkpoint is loaded, audited by the audit engine,
reduced to per-layer summaries and measured for drift, then dropped.

What stays in memory across the run: the per-layer summaries (a few numbers per layer and
checkpoint: the result itself), a few integers per finding (:mod:`.spans`), and the lazily
read structure (no weights) of two checkpoints besides the current one, the first and the
previous, which drift reads row block by row block (:mod:`.drift`). No weight array outlives
the checkpoint being processed, so memory does not grow with the number of checkpoints.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, field, replace

from steelyard.checkpoint_audit import audit_checkpoint
from steelyard.digest import DEFAULT_DIGEST, digest_in
from steelyard.errors import LoadError, UnreadableTensor
from steelyard.gradients import optimizer_source
from steelyard.graph import Checkpoint
from steelyard.loaders import load
from steelyard.policy import Policy
from steelyard.report import CheckpointAudit
from steelyard.run_timeline.drift import measure
from steelyard.run_timeline.ordering import Placed
from steelyard.run_timeline.result import CheckpointEntry, LayerPoint, LayerSeries, Timeline
from steelyard.run_timeline.spans import SpanTracker
from steelyard.run_timeline.summary import Snapshot, snapshot
from steelyard.stats import LayerStats
from steelyard.version import __version__


@dataclass
class _Series:
    """A layer's points so far (None where a checkpoint lacks it)."""

    kind: str
    units: int
    fan_in: int
    points: list[LayerPoint | None] = field(default_factory=list)
    shape_now: tuple[int, int] | None = None
    """(units, fan_in) in the latest checkpoint that has the layer."""


@dataclass(frozen=True)
class RunSettings:
    """How the run is audited and labelled."""

    policy: Policy
    order: str
    created: str
    jobs: int = 1
    notes: tuple[str, ...] = ()
    """Notes from ordering (ties, disagreeing sources)."""
    digest: str = DEFAULT_DIGEST.value
    """The content hash of each checkpoint's identity: ``blake3`` or ``sha256``."""


def _audited(
    checkpoint: Checkpoint, settings: RunSettings
) -> tuple[CheckpointAudit, LayerStats]:
    """The audit engine's result for one checkpoint, and the statistics it read through."""
    stats = LayerStats(checkpoint)
    audit = audit_checkpoint(
        checkpoint,
        settings.policy,
        optimizer_source(checkpoint),
        jobs=settings.jobs,
        stats=stats,
        digest=settings.digest,
    )
    return audit, stats


class _Run:
    """The state kept between checkpoints (see the module docstring for why it is bounded)."""

    def __init__(self) -> None:
        self.series: dict[str, _Series] = {}
        self.tracker = SpanTracker()
        self.entries: list[CheckpointEntry] = []
        self.notes: list[str] = []
        self.audit_notes: dict[str, list[int]] = {}
        self.first: Checkpoint | None = None
        self.previous: Checkpoint | None = None

    def _measured(
        self, checkpoint: Checkpoint, settings: RunSettings
    ) -> tuple[CheckpointAudit, Snapshot, dict[str, LayerPoint]]:
        """The checkpoint's audit, its snapshot, and its points with drift; a tensor that
        turns out unreadable, or a reader out of memory, is this checkpoint's input error."""
        try:
            audit, stats = _audited(checkpoint, settings)
            taken = snapshot(checkpoint, audit, stats)
            del stats  # the audit's cached matrices go with it
            points: dict[str, LayerPoint] = {}
            for layer in checkpoint.layers:
                from_previous, from_first = measure(checkpoint, layer, self.previous, self.first)
                points[layer.name] = replace(
                    taken.points[layer.name], from_previous=from_previous, from_first=from_first
                )
        except UnreadableTensor as exc:
            raise LoadError(checkpoint.path, f"could not be read ({exc})") from exc
        except (MemoryError, RecursionError) as exc:
            problem = "too large" if isinstance(exc, MemoryError) else "too deeply nested"
            raise LoadError(
                checkpoint.path,
                f"is {problem} to read within this process's limits ({type(exc).__name__})",
            ) from exc
        return audit, taken, points

    def add(self, placed: Placed, checkpoint: Checkpoint, settings: RunSettings) -> None:
        """Audit, reduce and measure one checkpoint, the next in timeline order."""
        index = len(self.entries)
        previous = self.previous
        names = {layer.name for layer in checkpoint.layers}
        if previous is not None and not names & {layer.name for layer in previous.layers}:
            raise LoadError(
                checkpoint.path,
                f"shares no layer name with the checkpoint before it ({previous.path}); "
                "a timeline follows the layers of one model",
            )
        audit, taken, points = self._measured(checkpoint, settings)
        for layer in checkpoint.layers:
            series = self.series.get(layer.name)
            if series is None:
                series = self.series[layer.name] = _Series(
                    layer.kind.value, layer.units, layer.fan_in, [None] * index
                )
            shape = (layer.units, layer.fan_in)
            if series.shape_now is not None and series.shape_now != shape:
                self.notes.append(
                    f"layer {layer.name} is {shape[0]}x{shape[1]} from {checkpoint.path} on, "
                    f"{series.shape_now[0]}x{series.shape_now[1]} before; drift is measured "
                    "only against checkpoints of the same shape"
                )
            series.shape_now = shape
            series.points.append(points[layer.name])
        for series in self.series.values():
            if len(series.points) == index:
                series.points.append(None)
        self.tracker.add(taken.findings)
        for note in audit.notes:
            self.audit_notes.setdefault(note, []).append(index)
        self.entries.append(
            CheckpointEntry(
                index=index,
                path=str(placed.path),
                format=checkpoint.format.value,
                digest=digest_in(audit.checkpoint) or (settings.digest, ""),
                parameters=checkpoint.parameters,
                position=placed.position,
                findings=len(audit.findings),
            )
        )
        if self.first is None:
            self.first = checkpoint
        self.previous = checkpoint


def build_timeline(
    placed: Sequence[Placed],
    settings: RunSettings,
    on_checkpoint: Callable[[str], None] | None = None,
) -> Timeline:
    """Read the checkpoints in the order given, one at a time, into a :class:`Timeline`.

    Any checkpoint that cannot be read, or that shares no layer with the one before it, ends
    the run with a :class:`LoadError` naming it (a timeline with a hole would mislead)."""
    run = _Run()
    for item in placed:
        if on_checkpoint is not None:
            on_checkpoint(str(item.path))
        run.add(item, load(item.path), settings)
    return Timeline(
        tool_version=__version__,
        created=settings.created,
        order=settings.order,
        fail_on=settings.policy.fail_on,
        policy_source=settings.policy.source,
        checkpoints=tuple(run.entries),
        layers=tuple(
            LayerSeries(name, s.kind, s.units, s.fan_in, tuple(s.points))
            for name, s in run.series.items()
        ),
        findings=run.tracker.spans(),
        notes=(
            *settings.notes,
            *dict.fromkeys(run.notes),
            *_grouped(run.audit_notes, run.entries),
        ),
    )


def _grouped(notes: dict[str, list[int]], entries: Sequence[CheckpointEntry]) -> list[str]:
    """Each audit note once, with the checkpoints it came from (most repeat in every one)."""
    out = []
    for note, indexes in notes.items():
        if len(indexes) == len(entries):
            out.append(f"{note} (every checkpoint)")
            continue
        where = [_label(entries[i]) for i in indexes]
        shown = ", ".join(where[:6]) + (f" and {len(where) - 6} more" if len(where) > 6 else "")
        out.append(f"{note} (checkpoints {shown})")
    return out


def _label(entry: CheckpointEntry) -> str:
    value, unit = entry.position.value, entry.position.unit
    if value is None:
        return f"#{entry.index}"
    return f"at step {value}" if unit == "step" else f"at {unit} {value}"
