"""References between the layers of a Keras functional config: ``input_layers`` and
``output_layers`` (``[layer, node, tensor]``) and each layer's ``inbound_nodes``, in both
serializations (Keras 2: ``[[layer, node, tensor, kwargs], ...]``; Keras 3: call arguments
holding ``__keras_tensor__`` objects with a ``keras_history``). A reference is
``(layer name, output index)``; anything malformed is refused through ``fail``.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from typing import Any

from steelyard.errors import LoadError
from steelyard.loaders.keras.config_values import MAX_DEPTH, as_dict

#: Builds the error for a malformed config (it names the file).
Fail = Callable[[str], LoadError]


def output_refs(value: Any, what: str, fail: Fail) -> list[tuple[str, int]]:
    """``["x", 0, 0]`` or ``[["x", 0, 0], …]`` → ``[("x", 0)]``."""
    if not isinstance(value, list):
        raise fail(f"{what} is not a list")
    if value and isinstance(value[0], str):
        value = [value]
    out: list[tuple[str, int]] = []
    for item in value:
        if not isinstance(item, list) or not item or not isinstance(item[0], str):
            raise fail(f"{what} entry {item!r} is not [layer, node, tensor]")
        tensor = item[2] if len(item) > 2 else 0
        if isinstance(tensor, bool) or not isinstance(tensor, int):
            raise fail(f"{what} entry {item!r} has a non-integer tensor index")
        out.append((item[0], tensor))
    return out


def inbound_refs(entry: Mapping[str, Any], name: str, fail: Fail) -> list[tuple[str, int]]:
    """The references of one layer entry's ``inbound_nodes``, first occurrences in order."""
    nodes = entry.get("inbound_nodes", [])
    if not isinstance(nodes, list):
        raise fail(f"layer {name!r}: inbound_nodes is not a list")
    refs: list[tuple[str, int]] = []
    for node in nodes:
        if isinstance(node, dict):  # Keras 3: {"args": [...], "kwargs": {...}}
            _history(node.get("args", []), refs, name, 0, fail)
        elif isinstance(node, list):  # Keras 2: [[layer, node, tensor, kwargs], ...]
            for item in node:
                if isinstance(item, list) and item and isinstance(item[0], str):
                    tensor = item[2] if len(item) > 2 else 0
                    if isinstance(tensor, bool) or not isinstance(tensor, int):
                        raise fail(f"layer {name!r}: inbound tensor index is not an int")
                    refs.append((item[0], tensor))
                elif isinstance(item, dict):
                    _history(item, refs, name, 0, fail)
                else:
                    raise fail(f"layer {name!r}: malformed inbound node {item!r}")
        else:
            raise fail(f"layer {name!r}: malformed inbound node")
    return list(dict.fromkeys(refs))  # first occurrences, in order; linear


def _history(value: Any, refs: list[tuple[str, int]], name: str, depth: int, fail: Fail) -> None:
    if depth > MAX_DEPTH:
        raise fail(f"layer {name!r}: inbound arguments nested too deeply")
    if isinstance(value, list):
        for item in value:
            _history(item, refs, name, depth + 1, fail)
    elif isinstance(value, dict):
        if value.get("class_name") == "__keras_tensor__":
            history = as_dict(value.get("config")).get("keras_history")
            if (
                not isinstance(history, list)
                or len(history) < 3
                or not isinstance(history[0], str)
                or isinstance(history[2], bool)
                or not isinstance(history[2], int)
            ):
                raise fail(f"layer {name!r}: malformed keras_history {history!r}")
            refs.append((history[0], history[2]))
        else:
            for item in value.values():
                _history(item, refs, name, depth + 1, fail)
