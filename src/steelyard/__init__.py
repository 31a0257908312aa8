"""steelyard: audit trained neural-network weight files before they ship.

The library API lives in :mod:`steelyard.api`; the names below are its public face.
"""

from __future__ import annotations

__version__ = "0.1.0"

from steelyard.api import audit, load

__all__ = ["__version__", "audit", "load"]
