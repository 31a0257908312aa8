"""Synthetic training runs written with the reference ``safetensors`` package (numpy only).

Each run is a random walk of weights: checkpoint k holds W_0 + Σ steps, so layers drift by
known, non-trivial amounts. Shapes, dtypes and folder layouts vary by argument, so tests
never depend on the committed fixture alone.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Sequence
from pathlib import Path

import numpy as np
from safetensors.numpy import save_file

#: name → shape of an MLP in PyTorch layout ([out, in]).
MLP = {"fc1.weight": (24, 10), "fc1.bias": (24,), "fc2.weight": (8, 24), "fc2.bias": (8,)}
#: A small conv net ([out, in, kh, kw]) and a linear head.
CONV = {
    "conv.weight": (12, 3, 3, 3),
    "conv.bias": (12,),
    "head.weight": (5, 12),
    "head.bias": (5,),
}

Edit = Callable[[int, dict[str, np.ndarray]], None]


def write_run(
    root: Path,
    steps: Sequence[int],
    shapes: dict[str, tuple[int, ...]] = MLP,
    seed: int = 7,
    folder: str = "checkpoint-{step}",
    file: str = "model.safetensors",
    trainer_state: bool = True,
    metadata: Callable[[int], dict[str, str]] | None = None,
    dtype: type | np.dtype = np.float32,
    edit: Edit | None = None,
) -> list[Path]:
    """Write one checkpoint per step; returns the weight files in step order. ``edit(step,
    tensors)`` may change the float32 tensors in place before a checkpoint is written (and
    the change carries on to later steps)."""
    rng = np.random.default_rng(seed)
    tensors = {
        name: (rng.normal(size=shape) / np.sqrt(max(1, int(np.prod(shape[1:]))))).astype(np.float32)
        for name, shape in shapes.items()
    }
    paths = []
    for step in steps:
        for value in tensors.values():
            value += (0.05 * rng.normal(size=value.shape)).astype(np.float32)
        if edit is not None:
            edit(step, tensors)
        where = root / folder.format(step=step)
        where.mkdir(parents=True, exist_ok=True)
        path = where / file.format(step=step)
        stored = {n: np.ascontiguousarray(v.astype(dtype)) for n, v in tensors.items()}
        save_file(stored, str(path), metadata=metadata(step) if metadata else None)
        if trainer_state:
            (where / "trainer_state.json").write_text(json.dumps({"global_step": step}))
        paths.append(path)
    return paths
