"""``tomllib`` on Python 3.11+, its ``tomli`` backport on 3.10."""

from __future__ import annotations

import sys

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - exercised on 3.10 only
    import tomli as tomllib

__all__ = ["tomllib"]
