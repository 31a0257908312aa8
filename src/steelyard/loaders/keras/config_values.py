"""Values read out of a parsed Keras config (JSON; parsing itself is
:func:`steelyard.loaders.base.parse_json`), with the nesting bound every walk over a config or
an HDF5 file keeps, and the natural order of Keras' numbered names."""

from __future__ import annotations

import math
import re
from collections.abc import Mapping
from typing import Any

#: Nesting deeper than this is refused (bounded recursion on hostile configs).
MAX_DEPTH = 32


def natural_key(text: str) -> list[Any]:
    """Sort key that orders ``vars/10`` after ``vars/9``."""
    # Numbers compare by length once leading zeros are gone, then digit by digit: the order of
    # int() without converting (which is quadratic in the digits and refused past 4300).
    out: list[Any] = []
    for part in re.split(r"([0-9]+)", text):
        if part.isascii() and part.isdigit():
            digits = part.lstrip("0") or "0"
            out.append((0, len(digits), digits))
        else:
            out.append((1, part))
    return out


def as_dict(value: Any) -> dict[str, Any]:
    """``value`` when it is a JSON object, else an empty dict."""
    return value if isinstance(value, dict) else {}


def number(value: Any) -> float | None:
    """``value`` as a finite float; None for anything else (booleans included)."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return None
    number = float(value)
    return number if math.isfinite(number) else None


def flag(config: Mapping[str, Any], key: str, default: bool) -> bool:
    """The boolean ``config[key]``, ``default`` when absent or not a boolean."""
    value = config.get(key, default)
    return value if isinstance(value, bool) else default


def class_name(entry: Mapping[str, Any]) -> str:
    """The ``class_name`` of a serialized object, without a registration package prefix."""
    value = entry.get("class_name")
    if not isinstance(value, str):
        return ""
    return value.rsplit(">", 1)[-1]
