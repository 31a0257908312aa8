"""Shared fixtures: tiny checkpoints written with the reference libraries."""

from __future__ import annotations

import itertools
from pathlib import Path

import numpy as np
import pytest

REPO = Path(__file__).resolve().parent.parent
FIXTURES = REPO / "fixtures"


def pytest_addoption(parser: pytest.Parser) -> None:
    """``--update-golden`` rewrites tests/golden/ from the current output."""
    parser.addoption("--update-golden", action="store_true", help="refresh golden report files")


@pytest.fixture
def update_golden(request: pytest.FixtureRequest) -> bool:
    """Whether golden files should be rewritten instead of compared."""
    return bool(request.config.getoption("--update-golden"))


@pytest.fixture
def rng() -> np.random.Generator:
    """A seeded generator so every test is repeatable."""
    return np.random.default_rng(20261201)


def mlp_tensors(rng: np.random.Generator, widths: tuple[int, ...] = (6, 16, 4)) -> dict[str, np.ndarray]:
    """PyTorch-named weights of an MLP: fc1.weight [out, in], fc1.bias, fc2..."""
    tensors: dict[str, np.ndarray] = {}
    for index, (fan_in, fan_out) in enumerate(itertools.pairwise(widths), 1):
        tensors[f"fc{index}.weight"] = (rng.normal(size=(fan_out, fan_in)) / np.sqrt(fan_in)).astype(np.float32)
        tensors[f"fc{index}.bias"] = (0.01 * rng.normal(size=fan_out)).astype(np.float32)
    return tensors


def write_safetensors(path: Path, tensors: dict[str, np.ndarray]) -> Path:
    """Write with the reference safetensors package."""
    import safetensors.numpy

    safetensors.numpy.save_file({k: np.ascontiguousarray(v) for k, v in tensors.items()}, path)
    return path


@pytest.fixture
def unhealthy_file(tmp_path: Path, rng: np.random.Generator) -> Path:
    """A small MLP with a NaN, a dead unit, an unused unit and an exploded fan-in norm."""
    tensors = mlp_tensors(rng, (6, 16, 4))
    tensors["fc1.weight"][3] = 0.0
    tensors["fc1.weight"][5] *= 40.0
    tensors["fc2.weight"][:, 9] = 0.0
    tensors["fc2.bias"][1] = np.nan
    return write_safetensors(tmp_path / "unhealthy.safetensors", tensors)


@pytest.fixture
def healthy_file(tmp_path: Path, rng: np.random.Generator) -> Path:
    """A small MLP with nothing planted."""
    return write_safetensors(tmp_path / "healthy.safetensors", mlp_tensors(rng, (6, 16, 4)))
