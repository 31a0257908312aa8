"""Coverage: how much of a checkpoint's parameters the layer rules actually saw.

A checkpoint whose tensors no loader convention recognises yields no layers, and every
layer rule then has nothing to look at. Coverage makes that visible in every report, and the
``uncovered-weights`` rule turns it into a gate condition, so an audit never passes a model
it did not look at.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from steelyard.graph import Checkpoint
from steelyard.numbers import count, percent, plural


@dataclass(frozen=True, slots=True)
class UncoveredTensor:
    """A counted tensor that no layer reads."""

    name: str
    shape: tuple[int, ...]
    parameters: int


@dataclass(frozen=True, slots=True)
class Coverage:
    """Parameters the layer rules saw, out of every counted parameter of the checkpoint."""

    parameters: int
    """Elements of every counted tensor (floating and quantized weights)."""
    covered: int
    """Elements of the counted tensors that some layer reads."""
    uncovered: tuple[UncoveredTensor, ...]
    """Every counted tensor in no layer, largest first (then by name)."""

    @property
    def share(self) -> float:
        """``covered / parameters``; 0 when the checkpoint holds no parameters at all."""
        return self.covered / self.parameters if self.parameters else 0.0


def coverage_of(checkpoint: Checkpoint) -> Coverage:
    """What the layer rules of an audit see of ``checkpoint``."""
    read = {name for layer in checkpoint.layers for name in layer.tensor_names}
    counted = checkpoint.counted
    covered = sum(t.size for t in counted if t.name in read)
    missing = sorted(
        (UncoveredTensor(t.name, t.shape, t.size) for t in counted if t.name not in read),
        key=lambda u: (-u.parameters, u.name),
    )
    return Coverage(
        parameters=sum(t.size for t in counted), covered=covered, uncovered=tuple(missing)
    )


def coverage_document(coverage: Coverage) -> dict[str, Any]:
    """The ``coverage`` object of the JSON documents, every uncovered tensor listed."""
    return {
        "parameters": coverage.parameters,
        "covered": coverage.covered,
        "share": coverage.share,
        "uncovered": [
            {"tensor": u.name, "shape": list(u.shape), "parameters": u.parameters}
            for u in coverage.uncovered
        ],
    }


def describe(coverage: Coverage) -> str:
    """One line for every report: what the layer rules saw, in the reports' one number rule
    (:mod:`steelyard.numbers`: a partial share never rounds to 0 % or 100 %)."""
    if coverage.parameters == 0:
        return "no parameters: nothing was checked"
    missing = len(coverage.uncovered)
    rest = "every counted tensor is in a layer" if not missing else f"{plural(missing, 'tensor')} in no layer"
    return f"layer rules saw {percent(coverage.share)} of {count(coverage.parameters)} parameters; {rest}"
