"""What a gradient sidecar holds: its own module so that the command line can offer the
choices without importing numpy (``steelyard.gradients`` re-exports it)."""

from __future__ import annotations

from enum import Enum

__all__ = ["GradsKind"]


class GradsKind(str, Enum):
    """What a gradient sidecar holds per weight."""

    RMS = "rms"
    """Root mean square of the gradient over batches."""
    ABS = "abs"
    """Mean absolute gradient."""
    SQ = "sq"
    """Mean squared gradient."""
    FISHER = "fisher"
    """Diagonal empirical Fisher information (mean squared per-example gradient)."""
