"""Where each checkpoint of a run sits in training, and the order the timeline reads them in.

A checkpoint's training step comes from, in this order of trust:

1. ``trainer_state.json`` in the checkpoint's folder (``global_step``), read through the
   confined side-file reader (:func:`steelyard.safepath.read_beside`): a regular file, no
   link, under the side-file cap. Common practice, no source: this is the file and key
   Hugging Face's Trainer writes into every ``checkpoint-<step>`` folder (from memory).
2. The file's own metadata: a safetensors ``__metadata__`` entry (or a shard index's
   ``metadata``) or a GGUF key whose last dotted part is ``step``, ``global_step`` or
   ``training_step``. No standard names such a key; these are the spellings we accept.
3. The name: the file's or its folders' names, such as ``checkpoint-1200``, ``step_500``,
   ``global_step800``, ``iter-30`` (a step) or ``epoch3`` (an epoch).

When two sources disagree the trusted one is used and the disagreement is noted. Nothing is
guessed: under ``--order step`` a checkpoint with no step, or steps counted in different
units (epochs and steps), is an input error naming the checkpoint; checkpoints sharing a step
keep the order they were given in, and the report says so.
"""

from __future__ import annotations

import itertools
import re
from collections import Counter
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from steelyard.errors import LoadError, SteelyardError
from steelyard.run_timeline.read_order import Order
from steelyard.run_timeline.result import Position

#: Step in a name: ``checkpoint-1200``, ``ckpt_3``, ``step500``, ``global_step-8``, ``iter_30``.
_STEP_NAME = re.compile(
    r"(?:^|[^a-z0-9])(?:checkpoint|ckpt|global[-_]?step|step|iteration|iter)s?[-_=.]?(\d+)(?!\d)"
)
#: Epoch in a name: ``epoch3``, ``epoch-12``, ``epochs_4``.
_EPOCH_NAME = re.compile(r"(?:^|[^a-z0-9])epochs?[-_=.]?(\d+)(?!\d)")
#: Metadata keys (last dotted part) that hold a training step.
STEP_KEYS = frozenset({"step", "global_step", "training_step"})
TRAINER_STATE = "trainer_state.json"
#: Largest step accepted from any source (beyond any real run; keeps JSON integers exact).
_MAX_STEP = 2**53


@dataclass(frozen=True, slots=True)
class Placed:
    """One checkpoint of the run with where it sits in training."""

    path: Path
    position: Position
    notes: tuple[str, ...] = ()


def _valid_step(value: Any) -> int | None:
    """A step from JSON or metadata: a non-negative integer (digits in a string too)."""
    if isinstance(value, bool):
        return None
    if isinstance(value, str) and value.strip().isdigit():
        value = int(value.strip())
    if isinstance(value, int) and 0 <= value <= _MAX_STEP:
        return value
    if isinstance(value, float) and value.is_integer() and 0 <= value <= _MAX_STEP:
        return int(value)
    return None


def step_from_names(names: Sequence[str]) -> Position | None:
    """The step or epoch in the first of ``names`` (innermost first) that holds one."""
    for name in names:
        lowered = name.lower()
        found = _STEP_NAME.search(lowered)
        if found:
            return Position(int(found.group(1)), "step", "name")
        found = _EPOCH_NAME.search(lowered)
        if found:
            return Position(int(found.group(1)), "epoch", "name")
    return None


def _names(path: Path, root: Path | None) -> list[str]:
    """The checkpoint's own name and its folders' names, innermost first: up to the folder
    the user named, or just the one folder holding a file named directly."""
    index = ".safetensors.index.json"
    stem = path.name[: -len(index)] if path.name.lower().endswith(index) else path.stem
    names = [stem]
    folder = path.parent
    if root is None or root == path:
        return [*names, folder.name]
    while folder != folder.parent:
        names.append(folder.name)
        if folder == root:
            break
        folder = folder.parent
    return names


def step_from_trainer_state(path: Path) -> tuple[Position | None, str | None]:
    """``global_step`` of the ``trainer_state.json`` beside ``path``, and a note when the file
    is there but holds no usable step."""
    from steelyard.loaders.base import parse_json
    from steelyard.safepath import read_beside

    try:
        raw = read_beside(path, TRAINER_STATE, "trainer state")
    except SteelyardError as refused:
        return None, f"{path.parent / TRAINER_STATE}: not used ({refused})"
    if raw is None:
        return None, None
    try:
        state = parse_json(raw, path.parent / TRAINER_STATE, "trainer state")
    except LoadError as broken:
        return None, f"{broken}; its step is not used"
    step = _valid_step(state.get("global_step")) if isinstance(state, dict) else None
    if step is None:
        return None, f"{path.parent / TRAINER_STATE}: has no integer global_step; not used"
    return Position(step, "step", "trainer_state"), None


def step_from_metadata(metadata: Mapping[str, Any]) -> Position | None:
    """A step from file metadata (keys in :data:`STEP_KEYS`, by their last dotted part)."""
    for key in sorted(metadata):
        if key.rsplit(".", 1)[-1].lower() in STEP_KEYS:
            step = _valid_step(metadata[key])
            if step is not None:
                return Position(step, "step", "metadata")
    return None


def file_metadata(path: Path) -> Mapping[str, Any]:
    """The metadata a weight file stores about itself, read from its header only:
    safetensors ``__metadata__``, a shard index's ``metadata``, GGUF key/values. Empty for
    other formats. A broken header raises the loader's :class:`LoadError`."""
    name = path.name.lower()
    if name.endswith(".safetensors"):
        from steelyard.loaders.safetensors import _Shard

        return _Shard(path).metadata
    if name.endswith(".safetensors.index.json"):
        from steelyard.loaders.base import MAX_METADATA_BYTES, parse_json
        from steelyard.safepath import read_side_file

        index = parse_json(read_side_file(path, "shard index", MAX_METADATA_BYTES), path, "index")
        meta = index.get("metadata") if isinstance(index, dict) else None
        return meta if isinstance(meta, dict) else {}
    if name.endswith(".gguf"):
        from steelyard.budget import Ledger
        from steelyard.loaders.gguf.header import read_header

        return {
            k: v
            for k, v in read_header(path, Ledger(path)).metadata.items()
            if isinstance(v, (int, str))
        }
    return {}


def place(path: Path, root: Path | None, alone: bool = True) -> Placed:
    """Where ``path`` sits in training, from the most trusted source that says. A
    ``trainer_state.json`` is the checkpoint's only when the checkpoint is ``alone`` in its
    folder: one beside several checkpoints of the run says nothing about which is which."""
    if not path.exists():
        raise LoadError(path, "does not exist")
    try:
        stored = step_from_metadata(file_metadata(path))
    except OSError as exc:
        raise LoadError(path, f"cannot be read ({exc.strerror})") from None
    named = step_from_names(_names(path, root))
    state, problem = step_from_trainer_state(path)
    if state is not None and not alone:
        state, problem = (
            None,
            (
                f"{path.parent / TRAINER_STATE}: not used, the folder holds several checkpoints "
                "of the run"
            ),
        )
    notes = [problem] if problem else []
    chosen = state or stored or named
    for other in (stored, named):
        if chosen is None or other is None or other is chosen:
            continue
        if other.unit == chosen.unit and other.value != chosen.value:
            notes.append(
                f"{path}: {chosen.source} says {chosen.unit} {chosen.value}, {other.source} "
                f"says {other.unit} {other.value}; {chosen.source} is used"
            )
    return Placed(path, chosen or Position(None, None, None), tuple(notes))


def _natural(text: str) -> list[tuple[int, int | str]]:
    """Sort key comparing digit runs as numbers: ``ckpt-9`` before ``ckpt-10``."""
    return [(0, int(p)) if p.isdigit() else (1, p) for p in re.split(r"(\d+)", text) if p]


def ordered(placed: Sequence[Placed], order: Order) -> tuple[list[Placed], list[str]]:
    """The checkpoints in timeline order, and notes on ties. Under :attr:`Order.step` a
    missing step or mixed units is a :class:`SteelyardError` naming the checkpoints."""
    if order is Order.given:
        return list(placed), []
    if order is Order.name:
        return sorted(placed, key=lambda p: _natural(str(p.path))), []
    missing = [str(p.path) for p in placed if p.position.value is None]
    if missing:
        more = f" and {len(missing) - 3} more" if len(missing) > 3 else ""
        raise SteelyardError(
            f"{', '.join(missing[:3])}{more}: no training step found (no trainer_state.json, "
            "step metadata or name such as checkpoint-1200); use --order name or --order given"
        )
    units = sorted({str(p.position.unit) for p in placed})
    if len(units) > 1:
        example = {str(p.position.unit): str(p.path) for p in placed}
        shown = ", ".join(f"{u} for {example[u]}" for u in units)
        raise SteelyardError(
            f"training positions are counted in different units ({shown}); "
            "use --order name or --order given"
        )
    result = sorted(placed, key=lambda p: p.position.value or 0)  # stable: ties keep order
    notes: list[str] = []
    for before, after in itertools.pairwise(result):
        if before.position.value == after.position.value:
            notes.append(
                f"{before.path} and {after.path} are both at {after.position.unit} "
                f"{after.position.value}; kept in the order given"
            )
    return result, notes


def arrange(paths: Sequence[str | Path], order: Order) -> tuple[list[Placed], list[str]]:
    """The checkpoints ``paths`` stand for (folders searched as the audit searches them), each
    placed in training, in timeline order, with the notes ordering produced. Unreadable or
    empty inputs are a :class:`LoadError` naming the first one."""
    from steelyard.discovery import plan

    run = plan(paths)
    if run.errors:
        first = run.errors[0]
        raise LoadError(first.path, first.reason)
    roots = {str(Path(p)): Path(p) for p in paths}
    folders = Counter(target.parent.resolve() for target in run.targets)
    placed = []
    for target in run.targets:
        root = next((r for r in roots.values() if r.is_dir() and r in target.parents), None)
        placed.append(place(target, root, alone=folders[target.parent.resolve()] == 1))
    result, notes = ordered(placed, order)
    # The same shared-folder note comes once, not once per checkpoint.
    for item in placed:
        notes += [n for n in item.notes if n not in notes]
    result = [Placed(p.path, p.position) for p in result]
    notes += [f"{s.path}: not read ({s.reason})" for s in run.skipped]
    return result, notes
