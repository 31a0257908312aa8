"""Shared fixtures: tiny checkpoints written with the reference libraries."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

REPO = Path(__file__).resolve().parent.parent
FIXTURES = REPO / "fixtures"


@pytest.fixture
def rng() -> np.random.Generator:
    """A seeded generator so every test is repeatable."""
    return np.random.default_rng(20261201)


def mlp_tensors(rng: np.random.Generator, widths: tuple[int, ...] = (6, 16, 4)) -> dict[str, np.ndarray]:
    """PyTorch-named weights of an MLP: fc1.weight [out, in], fc1.bias, fc2..."""
    tensors: dict[str, np.ndarray] = {}
    for index, (fan_in, fan_out) in enumerate(zip(widths[:-1], widths[1:]), 1):
        tensors[f"fc{index}.weight"] = (rng.normal(size=(fan_out, fan_in)) / np.sqrt(fan_in)).astype(np.float32)
        tensors[f"fc{index}.bias"] = (0.01 * rng.normal(size=fan_out)).astype(np.float32)
    return tensors
