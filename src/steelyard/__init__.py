"""steelyard: audit trained neural-network weight files before they ship.

The library API lives in :mod:`steelyard.api`; the names below are its public face.
"""

from __future__ import annotations

from steelyard.api import audit, compare, load, timeline
from steelyard.version import __version__

__all__ = ["__version__", "audit", "compare", "load", "timeline"]
