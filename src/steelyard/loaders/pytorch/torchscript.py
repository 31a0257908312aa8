"""TorchScript archives (``torch.jit.save``): the module state, named as ``state_dict()``
names it, found in the pickled module tree; the archive's code (``code/*.py``) is read as text
only to learn which attributes each class declares as parameters and buffers, never run.
"""

from __future__ import annotations

import math
import re
import zipfile
from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from pathlib import Path

from steelyard.errors import LoadError
from steelyard.graph import Checkpoint, Format, TensorRole
from steelyard.loaders.base import file_size
from steelyard.loaders.conventions import inferred_checkpoint
from steelyard.loaders.pytorch.stand_ins import ScriptObject, TensorRef
from steelyard.loaders.pytorch.storages import StorageTable, make_tensor, zip_member

_CLASS_LINE = re.compile(r"^class\s+([A-Za-z_]\w*)\s*\(")
_LIST_LINE = re.compile(r"^\s+(__parameters__|__buffers__)\s*=\s*\[(.*)\]\s*$")
_MAX_CODE_BYTES = 10_000_000


@dataclass
class _Declared:
    """What a TorchScript class's code declares as module state."""

    parameters: set[str]
    buffers: set[str]

    @property
    def state(self) -> set[str]:
        """Attributes ``state_dict()`` lists: parameters and buffers."""
        return self.parameters | self.buffers


def script_code(
    archive: zipfile.ZipFile, members: Mapping[str, zipfile.ZipInfo], prefix: str, path: Path
) -> dict[str, _Declared]:
    """Class qualname → its declared parameters and buffers, read from code/*.py as text
    (never run)."""
    declared: dict[str, _Declared] = {}
    budget = _MAX_CODE_BYTES
    folder = f"{prefix}code/"
    for name, info in members.items():
        if not name.startswith(folder) or not name.endswith(".py"):
            continue
        if info.file_size > budget:
            break
        budget -= info.file_size
        text = zip_member(archive, info, path, info.file_size).decode("utf-8", "replace")
        module = name[len(folder) : -3].replace("/", ".")
        current: str | None = None
        for line in text.splitlines():
            match = _CLASS_LINE.match(line)
            if match:
                current = f"{module}.{match.group(1)}"
                declared.setdefault(current, _Declared(set(), set()))
                continue
            listed = _LIST_LINE.match(line)
            if current is not None and listed:
                names = set(re.findall(r'"([^"]+)"', listed.group(2)))
                entry = declared[current]
                (entry.parameters if listed.group(1) == "__parameters__" else entry.buffers).update(
                    names
                )
    return declared


def script_checkpoint(
    path: Path,
    root: object,
    constants: object,
    storages: tuple[StorageTable, StorageTable],
    order: str,
    declared: Mapping[str, _Declared],
) -> Checkpoint:
    """The module state of a TorchScript archive, named as ``state_dict()`` names it.

    Only parameters and buffers are state. Tensors of the code (``constants.pkl``, which the
    code calls ``CONSTANTS.c<i>``) and plain tensor attributes are not: ``state_dict()`` leaves
    them out, and so does the checkpoint (its notes say how many there were).
    """
    walked = _walk_script(root, declared)
    tensors = {
        name: make_tensor(ref, name, None, storages[0].source, order)
        for name, ref in walked.named.items()
    }
    notes = ["TorchScript archive: tensors named from its module tree (its code was not run)"]
    code_tensors = (
        [v for v in constants if isinstance(v, TensorRef)] if isinstance(constants, tuple) else []
    )
    for index, ref in enumerate(code_tensors):
        # Checked like any tensor (a view outside its storage is a malformed file), never read.
        make_tensor(ref, f"CONSTANTS.c{index}", TensorRole.BOOKKEEPING, storages[1].source, order)
    elements = sum(math.prod(ref.size) for ref in code_tensors)
    if code_tensors:
        notes.append(
            f"{_count(len(code_tensors), 'tensor')} ({_count(elements, 'value')}) in "
            "constants.pkl: constants of the archive's code, not module state, not counted"
        )
    if walked.lists:
        notes.append(f"{walked.lists} tensors held only in lists were named <attribute>.<index>")
    if walked.attributes:
        notes.append(
            f"{_count(len(walked.attributes), 'tensor attribute')} neither parameter nor "
            f"buffer (e.g. {walked.attributes[0]!r}): not module state, not counted"
        )
    if walked.unread:
        notes.append(
            f"{walked.unread} objects of custom TorchScript classes (e.g. packed weights) "
            "could not be read"
        )
    if walked.missing:
        notes.append(
            f"{len(walked.missing)} declared parameters were not found in the module tree "
            f"(e.g. {walked.missing[0]!r})"
        )
    if not tensors:
        if code_tensors:
            raise LoadError(
                path,
                f"is a TorchScript archive whose only tensors are "
                f"{_count(len(code_tensors), 'constant')} of its code "
                f"({_count(elements, 'value')}), not module state (a torch.jit.freeze output?); "
                "save the module before freezing it",
            )
        raise LoadError(path, "is a TorchScript archive with no tensors steelyard can find")
    return inferred_checkpoint(path, Format.PYTORCH, tensors, (path,), file_size(path), notes)


def _count(number: int, noun: str) -> str:
    return f"{number:,} {noun}{'' if number == 1 else 's'}"


@dataclass
class _Walked:
    named: dict[str, TensorRef]
    """Module state by ``state_dict()`` name."""
    unread: int
    lists: int
    missing: list[str]
    attributes: list[str]
    """Tensor attributes of declared classes that are neither parameters nor buffers."""


def _walk_script(root: object, declared: Mapping[str, _Declared]) -> _Walked:
    named: dict[str, TensorRef] = {}
    seen: set[tuple[str, int, tuple[int, ...], tuple[int, ...]]] = set()
    unread = lists = 0
    missing: list[str] = []
    attributes: list[str] = []
    visited: set[int] = set()

    def objects() -> Iterator[tuple[str, ScriptObject, int]]:
        stack: list[tuple[str, object, int]] = [("", root, 0)]
        while stack:
            prefix, obj, depth = stack.pop()
            if isinstance(obj, ScriptObject) and id(obj) not in visited and depth <= 100:
                visited.add(id(obj))
                yield prefix, obj, depth
                if isinstance(obj.state, dict):
                    children = [
                        (f"{prefix}{k}.", v, depth + 1)
                        for k, v in obj.state.items()
                        if isinstance(k, str) and isinstance(v, ScriptObject)
                    ]
                    stack.extend(reversed(children))

    found = list(objects())
    for prefix, obj, _depth in found:
        if not isinstance(obj.state, dict):
            unread += 1
            continue
        # The class's code says which attributes are state; without code, every tensor is.
        known = declared.get(obj.qualname)
        for key, value in obj.state.items():
            if isinstance(key, str) and isinstance(value, TensorRef):
                if known is not None and key not in known.state:
                    attributes.append(f"{prefix}{key}")
                    continue
                named[f"{prefix}{key}"] = value
                seen.add(value.identity)
    # Lists (an LSTM's _flat_weights) mostly repeat named tensors: keep only the new ones, and
    # only for classes whose code is missing (for the others a list attribute is not state).
    for prefix, obj, _depth in found:
        if not isinstance(obj.state, dict):
            continue
        known = declared.get(obj.qualname)
        for key, value in obj.state.items():
            if not isinstance(key, str) or not isinstance(value, list):
                continue
            for index, item in enumerate(value):
                if isinstance(item, TensorRef) and item.identity not in seen:
                    if known is not None:
                        attributes.append(f"{prefix}{key}.{index}")
                        continue
                    named[f"{prefix}{key}.{index}"] = item
                    seen.add(item.identity)
                    lists += 1
        if known is not None:
            # Over the object's own attributes, not every declared parameter: many objects of
            # a class declaring many parameters would otherwise cost objects x parameters.
            missing.extend(
                sorted(
                    f"{prefix}{key}"
                    for key, value in obj.state.items()
                    if isinstance(key, str)
                    and key in known.parameters
                    and value is not None
                    and f"{prefix}{key}" not in named
                )
            )
    return _Walked(named, unread, lists, missing, attributes)
