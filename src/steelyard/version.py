"""The package version, in a module of its own so that any module can import it without
importing the package's public face (``steelyard/__init__`` imports the API, which would
make an import cycle). Keep it equal to ``version`` in pyproject.toml (tests/test_architecture.py)."""

from __future__ import annotations

__version__ = "0.1.0"
