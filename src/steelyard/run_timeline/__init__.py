"""``steelyard timeline``: one run's checkpoints read in training order, each audited once,
reduced to per-layer summaries (fan-in norms, dead units, non-finite values, drift from the
previous and the first checkpoint) and followed finding by finding.

The package is named ``run_timeline`` because ``steelyard.timeline`` is the API function
(a subpackage of that name would replace the function on the package when imported, which
is why the comparison engine is ``steelyard.comparison``).

* :mod:`.ordering`: where each checkpoint sits in training, and the order read in
  (:mod:`.read_order` the choices);
* :mod:`.summary`: one audited checkpoint reduced to per-layer points and findings;
* :mod:`.drift`: relative change and cosine, read side by side in row blocks;
* :mod:`.spans`: each finding's first appearance, disappearance and return;
* :mod:`.engine`: the streaming loop;
* :mod:`.result`: the frozen :class:`Timeline` every renderer reads.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from steelyard.lazy_exports import attribute_loader

if TYPE_CHECKING:
    from steelyard.run_timeline.read_order import Order
    from steelyard.run_timeline.result import (
        TIMELINE_SCHEMA,
        CheckpointEntry,
        Drift,
        FindingSpan,
        LayerPoint,
        LayerSeries,
        Position,
        Timeline,
    )

#: Public name -> the module defining it, imported on first use (PEP 562): a command that
#: only needs ``Order`` (every command builds the ``--order`` choice) loads no timeline record.
_HOMES = {"Order": "read_order"} | {
    name: "result"
    for name in (
        "TIMELINE_SCHEMA",
        "CheckpointEntry",
        "Drift",
        "FindingSpan",
        "LayerPoint",
        "LayerSeries",
        "Position",
        "Timeline",
    )
}


__getattr__ = attribute_loader(__name__, _HOMES)
# Literal, so that linters and type checkers see the re-exports (tests check it equals _HOMES).
__all__ = [
    "TIMELINE_SCHEMA",
    "CheckpointEntry",
    "Drift",
    "FindingSpan",
    "LayerPoint",
    "LayerSeries",
    "Order",
    "Position",
    "Timeline",
]
