"""The orders a timeline's checkpoints can be read in, in a module of its own: the command
line builds its ``--order`` choice from it at start-up, and importing :mod:`.ordering` would
bring the timeline's records with it (about 10 ms of every command, ``--version`` included).
"""

from __future__ import annotations

from enum import Enum


class Order(str, Enum):
    """How the checkpoints of a timeline are ordered."""

    step = "step"
    """By training step (the default): every checkpoint must have one."""
    name = "name"
    """By path, numbers inside names compared as numbers (``ckpt-9`` before ``ckpt-10``)."""
    given = "given"
    """As named on the command line (folders in the order they were searched)."""
