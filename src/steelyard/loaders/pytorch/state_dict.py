"""Finding the state dict in an unpickled checkpoint: under a known key (``state_dict``,
``model``, an EMA copy...), at the top level, or gathered from several entries; nested dicts
get dotted names and wrapper prefixes (``module.``, ``_orig_mod.``) are stripped.

Walks over the unpickled structure visit each container once, however often the pickle's memo
refers to it.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from steelyard import budget
from steelyard.errors import LoadError
from steelyard.loaders.pytorch.stand_ins import TensorRef

#: Walks over pickled containers stop here (a state dict is a few levels deep).
_MAX_WALK_DEPTH = 100

_MODEL_KEYS = (
    "state_dict",
    "model_state_dict",
    "model_state",
    "model",
    "module",
    "net",
    "network",
    "weights",
    "params",
    "model_weights",
)
EMA_KEYS = ("ema", "model_ema", "ema_model", "state_dict_ema", "ema_state_dict", "params_ema")
OPTIMIZER_KEYS = (
    "optimizer",
    "optimizer_state_dict",
    "optimizer_state",
    "optim",
    "optim_state_dict",
    "optim_state",
    "opt",
    "opt_state",
    "optimizer_states",
    "optimizers",
)
_PREFIXES = ("module.", "_orig_mod.")


@dataclass
class Found:
    """The tensors found in the unpickled tree and where they were."""

    tensors: dict[str, TensorRef]
    where: str | None
    """The key path of the state dict inside the checkpoint (None: the top level)."""
    container: Mapping[Any, Any] | None
    """The dict that held the state dict (where the optimizer would be), if any."""
    stripped: tuple[str, ...]
    skipped: list[str]
    parts: tuple[str, ...] = ()
    """The entries of the container whose tensors were used (one, or several gathered)."""


def brief(value: object) -> str:
    """A value shown for a message: short, and never ``repr`` of a huge integer."""
    if isinstance(value, int) and not isinstance(value, bool) and value.bit_length() > 128:
        # repr() of an integer of thousands of digits raises (sys.int_max_str_digits).
        return f"an integer of {value.bit_length():,} bits"
    if isinstance(value, str):
        text = repr(value[:40])
    else:
        text = repr(value) if isinstance(value, (int, float, bool)) else type(value).__name__
    return text if len(text) <= 40 else text[:37] + "..."


def _is_state_dict(value: object) -> bool:
    if not isinstance(value, Mapping) or not value:
        return False
    tensors = sum(1 for k, v in value.items() if isinstance(k, str) and isinstance(v, TensorRef))
    return tensors > 0 and 2 * tensors >= len(value)


class _Walk:
    """One walk over the unpickled structure: each container is judged and flattened once,
    however many memo references lead to it (a pickle can make a dict reachable along 2^n
    paths with n references)."""

    def __init__(self, path: Path) -> None:
        self.path = path
        self.ledger = budget.Ledger(path)
        self.flattened: set[int] = set()
        self.repeated = 0
        """Containers reached again (named once, by the first path that reached them)."""
        self._judged: dict[int, tuple[object, bool]] = {}

    def is_state_dict(self, value: object) -> bool:
        known = self._judged.get(id(value))
        if known is None:
            known = (value, _is_state_dict(value))  # keeps value alive: its id stays its own
            self._judged[id(value)] = known
        return known[1]

    def holds_tensors(self, value: Mapping[Any, Any]) -> bool:
        known = self._judged.get(~id(value))
        if known is None:
            known = (
                value,
                any(isinstance(k, str) and isinstance(v, TensorRef) for k, v in value.items()),
            )
            self._judged[~id(value)] = known
        return known[1]


def find_weights(root: object, path: Path) -> Found:
    """The state dict in an unpickled checkpoint, or LoadError when there is none."""
    walk = _Walk(path)
    found = _find_in(root, path, walk)
    if walk.repeated:
        found.skipped.append(
            f"{walk.repeated} references to a dict already read (each dict is read once)"
        )
    return found


def _find_in(root: object, path: Path, walk: _Walk) -> Found:
    if isinstance(root, TensorRef):
        return Found({"tensor": root}, None, None, (), [], ())
    if not isinstance(root, Mapping):
        raise LoadError(
            path, f"holds a pickled {type(root).__name__}, not a state dict or a checkpoint dict"
        )
    container: Mapping[Any, Any] = root
    where: list[str] = []
    for _depth in range(3):
        key = _model_key(container)
        if key is None:
            break
        value = container[key]
        if walk.is_state_dict(value):
            return _finish(_flatten(value, walk), ".".join([*where, key]), container, (key,))
        if not isinstance(value, Mapping):
            break
        where.append(key)
        container = value
    if walk.is_state_dict(root):
        return _finish(_flatten(root, walk), None, None)
    # No known key: gather every entry that is a state dict, except optimizer entries.
    parts = [
        k
        for k, v in root.items()
        if isinstance(k, str) and k not in OPTIMIZER_KEYS and walk.is_state_dict(v)
    ]
    if len(parts) == 1:
        return _finish(_flatten(root[parts[0]], walk), parts[0], root, (parts[0],))
    if parts:
        merged: dict[str, Any] = {}
        for part in parts:
            # A part that is the very dict of an earlier part (memo-shared) is not read again.
            for name, ref in _flatten(root[part], walk)[0].items():
                merged[f"{part}.{name}"] = ref
        return _finish((merged, []), None, root, tuple(parts))
    if walk.holds_tensors(root):
        # Tensors beside other values, under no known key: the top level is the state dict.
        return _finish(_flatten(root, walk), None, None)
    keys = ", ".join(brief(k) for k in list(root)[:8])
    raise LoadError(
        path,
        f"holds no state dict of tensors steelyard can find (top-level keys: {keys or 'none'})",
    )


def _model_key(container: Mapping[Any, Any]) -> str | None:
    for key in (*_MODEL_KEYS, *EMA_KEYS):
        if key in container and isinstance(container[key], Mapping):
            return key
    return None


def _flatten(mapping: Mapping[Any, Any], walk: _Walk) -> tuple[dict[str, Any], list[str]]:
    """Tensors of a state dict; nested dicts of tensors get dotted names. Each dict is read
    once (by the first path reaching it), so the walk is linear in the pickle's size."""
    path = walk.path
    out: dict[str, Any] = {}
    skipped: list[str] = []
    if id(mapping) in walk.flattened:
        walk.repeated += 1
        return out, skipped
    walk.flattened.add(id(mapping))
    stack: list[tuple[str, Mapping[Any, Any], int]] = [("", mapping, 0)]
    while stack:
        prefix, current, depth = stack.pop()
        if depth > _MAX_WALK_DEPTH:
            raise LoadError(path, "nests its state dict too deeply")
        walk.ledger.check_time("the state dict")
        nested: list[tuple[str, Mapping[Any, Any], int]] = []
        for key, value in current.items():
            name = f"{prefix}{key}" if isinstance(key, str) else None
            if name is not None and isinstance(value, TensorRef):
                out[name] = value
            elif name is not None and isinstance(value, Mapping) and walk.holds_tensors(value):
                if id(value) in walk.flattened:
                    walk.repeated += 1
                    continue
                walk.flattened.add(id(value))
                nested.append((f"{name}.", value, depth + 1))
            else:
                skipped.append(name if name is not None else brief(key))
        stack.extend(reversed(nested))
    return out, skipped


def _finish(
    flat: tuple[dict[str, Any], list[str]],
    where: str | None,
    container: Mapping[Any, Any] | None,
    parts: tuple[str, ...] = (),
) -> Found:
    tensors, skipped = flat
    stripped: list[str] = []
    # Prefixes are matched at a moving offset and cut once at the end: a name repeating
    # "module." a million times costs one pass over its characters, not a copy per prefix.
    start = 0
    changed = True
    while changed and tensors:
        changed = False
        for prefix in _PREFIXES:
            if all(name.startswith(prefix, start) for name in tensors):
                start += len(prefix)
                stripped.append(prefix)
                changed = True
    if start:
        tensors = {name[start:]: ref for name, ref in tensors.items()}
    return Found(tensors, where, container, tuple(stripped), skipped, parts)


def strip_prefixes(name: str, prefixes: tuple[str, ...]) -> str:
    """``name`` without the wrapper prefixes stripped from the state dict's names."""
    start = 0
    for prefix in prefixes:
        if name.startswith(prefix, start):
            start += len(prefix)
    return name[start:]


def stripped_notes(prefixes: tuple[str, ...]) -> list[str]:
    """One note per run of the same prefix (a hostile name may repeat one endlessly)."""
    notes: list[str] = []
    run = 0
    for index, prefix in enumerate(prefixes):
        run += 1
        if index + 1 < len(prefixes) and prefixes[index + 1] == prefix:
            continue
        times = "" if run == 1 else f" ({run:,} times)"
        notes.append(f"the {prefix!r} prefix was stripped from every tensor name{times}")
        run = 0
    return notes
