"""Which checkpoints a run audits: files named on the command line, and what folders hold.

A folder is one checkpoint only when it *is* one: a shard set with its index, or a folder
whose only weight files form one model. Otherwise every checkpoint inside it, recursively, is
audited, and every weight file that is not is listed with the reason, so that nothing is
skipped without a line saying so. The rules are documented in ``docs/ci.md``.

Discovery never follows a symbolic link and never reads outside the folders it is given:
every file found in a folder passes :func:`steelyard.safepath.entry_problem` (a regular file,
no link, no FIFO, socket or device) before anything opens it, and each one refused is listed
as skipped with the reason. It reads only the first bytes of candidate files (to tell a
checkpoint by its content) and the shard indexes.
"""

from __future__ import annotations

import os
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

from steelyard.errors import LoadError
from steelyard.loaders import sniff_format
from steelyard.loaders.base import parse_json
from steelyard.report import InputError, Skipped
from steelyard.safepath import entry_problem, read_side_file

#: File endings of the checkpoint formats steelyard reads (content decides the loader).
WEIGHT_SUFFIXES = frozenset(
    {
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
        ".jit",
        ".gguf",
    }
)

#: Weight-file endings of formats steelyard does not read yet: listed as skipped, never
#: passed silently.
UNREAD_SUFFIXES = frozenset(
    {".tflite", ".pb", ".mlmodel", ".msgpack", ".npy", ".pkl", ".pt2", ".joblib"}
)

#: Endings other files share (``.ts`` is also TypeScript): a checkpoint only by content.
CONTENT_ONLY_SUFFIXES = frozenset({".ts", ".pts"})
#: Endings of the configuration, tokenizer and documentation files that sit beside exported
#: models (``config.json``, ``tokenizer.json``, ``README.md``...): never an ONNX model's
#: external data, so never an unreadable input of a folder walk. An ONNX model that names
#: such a file still reads it. Common practice, no source.
NOT_DATA_SUFFIXES = frozenset(
    {".json", ".txt", ".md", ".yaml", ".yml", ".toml", ".cfg", ".ini", ".py", ".csv",
     ".html", ".jinja", ".model", ".tiktoken", ".png", ".jpg", ".jpeg", ".svg", ".gitattributes"}
)

INDEX_SUFFIX = ".safetensors.index.json"

#: Training state that sits beside the weights in trainer output folders (optimizer,
#: scheduler, random-number state, arguments): not a model. Common practice, no source
#: (these are the names Hugging Face's Trainer writes, from memory).
_TRAINING_STATE = re.compile(
    r"^(optimizer|scheduler|scaler|training_args|rng_state(_\d+)?)\.(pt|pth|bin)$"
)
_SIDECAR = re.compile(r"\.grads\.[A-Za-z0-9]+$")
_SHARD = re.compile(r"-\d{5}-of-\d{5}\.safetensors$")
#: Bounds on what a folder walk may cost.
MAX_ENTRIES = 200_000
_MAX_INDEX_BYTES = 64 * 2**20


@dataclass
class Plan:
    """What a run audits, what it does not, and why."""

    targets: list[Path] = field(default_factory=list)
    """Checkpoints to audit: files and shard indexes, in the order found."""
    maybe_parts: list[Path] = field(default_factory=list)
    """Files that are no checkpoint by content but sit beside an ONNX model: its external
    data when it reads them, an unreadable input otherwise (decided after the audit)."""
    skipped: list[Skipped] = field(default_factory=list)
    errors: list[InputError] = field(default_factory=list)
    ignored_files: int = 0
    """Files of other kinds (configs, tokenizers, readmes) in the folders walked."""


def plan(
    paths: Sequence[str | Path], exclude: Sequence[str | Path] | Mapping[str | Path, str] = ()
) -> Plan:
    """The checkpoints ``paths`` stand for. ``exclude`` (the run's side inputs: a ``--grads``
    sidecar, a ``--base`` model; files or folders) is never audited, and listed as skipped
    with its reason when a searched folder holds it."""
    result = Plan()
    reasons = (
        dict(exclude)
        if isinstance(exclude, Mapping)
        else dict.fromkeys(exclude, "the --grads sidecar of this run")
    )
    excluded = {_key(Path(p)): reason for p, reason in reasons.items()}
    for raw in paths:
        path = Path(raw)
        if path.is_dir() and not path.is_symlink():
            before = (len(result.targets), len(result.errors), len(result.maybe_parts))
            _walk(path, result, excluded, path)
            if (len(result.targets), len(result.errors), len(result.maybe_parts)) == before:
                # Fail closed: a folder that was named but holds nothing to audit is an
                # input error, not an empty pass.
                result.errors.append(
                    InputError(str(path), "is a folder holding no checkpoint steelyard can read")
                )
        else:
            # Named on the command line: audited as given (a missing or broken file becomes
            # an error entry of its own).
            result.targets.append(path)
    # A file named twice (directly and through its folder) is one checkpoint, audited once.
    seen: set[str] = set()
    unique: list[Path] = []
    for target in result.targets:
        if _key(target) in seen:
            result.skipped.append(Skipped(str(target), "named more than once; audited once"))
            continue
        seen.add(_key(target))
        unique.append(target)
    result.targets = unique
    return result


def single(path: Path) -> Path:
    """The one checkpoint ``path`` is: itself for a file, the folder's only checkpoint for
    a folder (its shard index, or its one weight file); otherwise a clear error."""
    if not path.is_dir():
        return path
    found = Plan()
    _walk(path, found, {}, path)
    if len(found.targets) == 1:
        return found.targets[0]
    if not found.targets:
        raise LoadError(path, "is a folder holding no checkpoint steelyard can read")
    names = ", ".join(str(p.relative_to(path)) for p in found.targets[:4])
    more = f" and {len(found.targets) - 4} more" if len(found.targets) > 4 else ""
    raise LoadError(
        path,
        f"is a folder holding {len(found.targets)} checkpoints ({names}{more}); name one",
    )


def _key(path: Path) -> str:
    return os.path.normcase(os.path.abspath(path))


def _walk(folder: Path, result: Plan, excluded: dict[str, str], root_folder: Path) -> None:
    files: list[Path] = []
    entries = 0
    for root, dirs, names in os.walk(folder, followlinks=False):
        base = Path(root)
        dirs.sort()
        kept: list[str] = []
        for name in dirs:
            sub = base / name
            if sub.is_symlink():
                result.skipped.append(Skipped(str(sub), "symbolic link to a folder, not followed"))
            elif name.startswith("."):
                result.skipped.append(Skipped(str(sub), "hidden folder, not searched"))
            elif _key(sub) in excluded:
                result.skipped.append(Skipped(str(sub), excluded[_key(sub)]))
            else:
                kept.append(name)
        dirs[:] = kept
        for name in sorted(names):
            entries += 1
            if entries > MAX_ENTRIES:
                raise LoadError(folder, f"holds more than {MAX_ENTRIES:,} files; name the checkpoints")
            files.append(base / name)
    _classify(root_folder, files, result, excluded)


def _classify(
    folder: Path, found: list[Path], result: Plan, excluded: dict[str, str]
) -> None:
    files: list[Path] = []
    for path in found:
        problem = entry_problem(path, folder)
        if problem is None:
            files.append(path)
        elif path.is_symlink() and not _weightish(path):
            result.ignored_files += 1  # a linked config or tokenizer: not opened, counted
        else:
            # A linked weight file (wherever it leads), a FIFO, socket or device: never
            # opened, and listed with the reason.
            result.skipped.append(Skipped(str(path), problem))
    in_sets: set[Path] = set()
    for index in (f for f in files if f.name.endswith(INDEX_SUFFIX)):
        in_sets |= _shards_of(index)
    onnx_folders = {f.parent for f in files if f.suffix == ".onnx"}
    for path in files:
        name = path.name
        if _key(path) in excluded:
            result.skipped.append(Skipped(str(path), excluded[_key(path)]))
        elif name.endswith(INDEX_SUFFIX):
            result.targets.append(path)
        elif path in in_sets:
            continue  # audited as part of its shard set
        elif _SIDECAR.search(name):
            result.skipped.append(Skipped(str(path), "gradient sidecar; pass it with --grads"))
        elif _TRAINING_STATE.match(name):
            result.skipped.append(Skipped(str(path), "training state, not model weights"))
        elif path.suffix in UNREAD_SUFFIXES:
            result.skipped.append(
                Skipped(str(path), f"{path.suffix} files are a format steelyard does not read")
            )
        elif _SHARD.search(name):
            result.errors.append(
                InputError(
                    str(path),
                    "is one shard of a sharded set whose *.safetensors.index.json is missing; "
                    "a part of a model cannot be audited alone",
                )
            )
        elif path.suffix in WEIGHT_SUFFIXES:
            if sniff_format(path) is None and path.parent in onnx_folders:
                result.maybe_parts.append(path)
            else:
                result.targets.append(path)
        elif path.suffix in CONTENT_ONLY_SUFFIXES:
            if sniff_format(path) is not None:
                result.targets.append(path)
            else:
                result.ignored_files += 1
        elif (
            path.parent in onnx_folders
            and path.suffix.lower() not in NOT_DATA_SUFFIXES
            and sniff_format(path) is None
        ):
            # ``model.onnx.data``, ``weights.pb``…: external data, decided after the audit.
            result.maybe_parts.append(path)
        else:
            result.ignored_files += 1


def _weightish(path: Path) -> bool:
    name = path.name
    return (
        path.suffix in WEIGHT_SUFFIXES
        or path.suffix in UNREAD_SUFFIXES
        or path.suffix in CONTENT_ONLY_SUFFIXES
        or name.endswith(INDEX_SUFFIX)
    )


def _shards_of(index: Path) -> set[Path]:
    """The shard files an index names (empty when it cannot be read: the audit will say)."""
    try:
        document = parse_json(read_side_file(index, "index", _MAX_INDEX_BYTES), index, "index")
    except LoadError:
        return set()
    weight_map = document.get("weight_map") if isinstance(document, dict) else None
    if not isinstance(weight_map, dict):
        return set()
    return {
        index.parent / name
        for name in set(weight_map.values())
        if isinstance(name, str) and "/" not in name and "\\" not in name and name not in ("..", ".")
    }
