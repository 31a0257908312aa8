"""steelyard: audit trained neural-network weight files before they ship.

The library API lives in :mod:`steelyard.api`; the names below are its public face. They are
imported when first used, so that ``import steelyard`` (and ``steelyard --version``) does not
pay for numpy and the loaders.
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING, Any

from steelyard.version import __version__

if TYPE_CHECKING:
    from steelyard.api import audit, compare, load, timeline

__all__ = ["__version__", "audit", "compare", "load", "timeline"]

_API = frozenset({"audit", "compare", "load", "timeline"})


def __getattr__(name: str) -> Any:
    """The API functions and the package's modules, imported on first use (PEP 562)."""
    if name in _API:
        return getattr(importlib.import_module("steelyard.api"), name)
    try:
        return importlib.import_module(f"steelyard.{name}")
    except ModuleNotFoundError as missing:
        if missing.name != f"steelyard.{name}":
            raise
        raise AttributeError(f"module 'steelyard' has no attribute {name!r}") from None
