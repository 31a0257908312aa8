"""The library API: what the CLI calls, and what notebooks and tests call directly."""

from __future__ import annotations

from pathlib import Path

from steelyard.graph import Checkpoint
from steelyard.loaders import load as _load


def load(path: str | Path) -> Checkpoint:
    """Read a checkpoint's structure; tensors stay on disk until something reads them."""
    return _load(path)


def audit(path: str | Path, grads: str | Path | None = None, policy: object | None = None) -> object:
    """Audit one checkpoint (implemented with the rules)."""
    raise NotImplementedError
