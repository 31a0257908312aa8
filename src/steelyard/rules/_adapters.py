"""The adapter a checkpoint carries, for the rules, without importing the adapter loader for
the checkpoints that are none: that package and its dataclasses cost about 8 ms of every
audit's start-up."""

from __future__ import annotations

import sys
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from steelyard.graph import Checkpoint
    from steelyard.loaders.adapter.model import AdapterInfo

#: The module that defines the adapter checkpoint's class.
_HOME = "steelyard.loaders.adapter.model"


def adapter_of(checkpoint: Checkpoint) -> AdapterInfo | None:
    """The adapter information of ``checkpoint``, or None when it is not an adapter. An
    adapter checkpoint is an instance of a class of ``_HOME``, so none exists before that
    module is imported, and then it answers."""
    home = sys.modules.get(_HOME)
    if home is None:
        return None
    info: AdapterInfo | None = home.adapter_of(checkpoint)
    return info
