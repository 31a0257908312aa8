"""Showing names from files safely: one function, :func:`shown`, for every human-readable output.

File paths and tensor or layer names come from the files audited, which may come from a
stranger. Printed raw, a newline in a name splits the one-line error into two (and can forge a
second ``steelyard:`` line), an escape sequence repaints the terminal, a bidirectional override
(U+202E) makes ``evil\u202etxt.pt`` read as another name, and characters XML forbids break a
JUnit file. :func:`shown` writes every such character as a Python-style escape, so the text
stays one line, inert and unambiguous; printable text, including non-ASCII letters, is
unchanged. JSON output is not passed through it: JSON escapes what it must and stays exact.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import fields, is_dataclass, replace
from enum import Enum
from typing import Any, TypeVar

from steelyard.findings import Finding

#: Format characters that reorder or hide text (Unicode bidi controls and invisible marks),
#: which ``str.isprintable`` does not all refuse. Unicode Standard Annex #9 (bidi controls),
#: and Trojan Source (Boucher & Anderson 2021) for why they matter.
_INVISIBLE = frozenset(
    chr(c)
    for c in (
        0x061C,  # Arabic letter mark
        0x200B, 0x200C, 0x200D, 0x200E, 0x200F,  # zero width, LRM, RLM
        0x202A, 0x202B, 0x202C, 0x202D, 0x202E,  # embeddings and overrides
        0x2066, 0x2067, 0x2068, 0x2069,  # isolates
        0xFEFF,  # zero-width no-break space / BOM
    )
)
_NAMED = {"\n": "\\n", "\r": "\\r", "\t": "\\t"}


def _escape(char: str) -> str:
    if char in _NAMED:
        return _NAMED[char]
    code = ord(char)
    if code < 0x100:
        return f"\\x{code:02x}"
    if code < 0x10000:
        return f"\\u{code:04x}"
    return f"\\U{code:08x}"


def shown(text: str) -> str:
    """``text`` with control characters (C0, DEL, C1), bidi and invisible format characters,
    unpaired surrogates and other non-printable code points written as escapes (``\\n``,
    ``\\x1b``, ``\\u202e``); everything printable is left as it is."""
    if text.isprintable() and not any(c in _INVISIBLE for c in text):
        return text
    return "".join(
        c if c == " " or (c.isprintable() and c not in _INVISIBLE) else _escape(c) for c in text
    )


T = TypeVar("T")


def shown_deep(value: T) -> T:
    """A copy of ``value`` (a report: dataclasses, mappings, tuples, lists) with every string
    passed through :func:`shown`, for renderers whose whole output is for people."""
    result: T = _deep(value, 0)
    return result


_MAX_DEPTH = 64
#: Fields of a finding its fingerprint (``Finding.id``) is computed from: kept exact, so an
#: id printed by a text renderer is the id in JSON and baselines. Renderers do not print them
#: raw (the tensor name reaches people through the escaped message).
_FINGERPRINTED = frozenset({"rule", "tensor", "part", "units"})


def _deep(value: Any, depth: int) -> Any:
    if isinstance(value, str) and not isinstance(value, Enum):
        return shown(value)
    if depth > _MAX_DEPTH or value is None or isinstance(value, (int, float, bool, Enum)):
        return value
    if is_dataclass(value) and not isinstance(value, type):
        changes = {}
        exact = _FINGERPRINTED if isinstance(value, Finding) else frozenset()
        for item in fields(value):
            if not item.init or item.name in exact:
                continue
            old = getattr(value, item.name)
            new = _deep(old, depth + 1)
            if new is not old:
                changes[item.name] = new
        return replace(value, **changes) if changes else value
    if isinstance(value, Mapping):
        return {_deep(k, depth + 1): _deep(v, depth + 1) for k, v in value.items()}
    if isinstance(value, tuple):
        return tuple(_deep(v, depth + 1) for v in value)
    if isinstance(value, list):
        return [_deep(v, depth + 1) for v in value]
    return value


__all__ = ["shown", "shown_deep"]
