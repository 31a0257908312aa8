"""Checkpoints and pages the HTML tests share: written with the reference safetensors package,
audited and compared through the public API, rendered once per test session."""

from __future__ import annotations

import itertools
from pathlib import Path

import numpy as np

import steelyard
from tests.conftest import mlp_tensors, write_safetensors

#: Layer names that try to escape their HTML and script contexts (invented hostile input).
HOSTILE_NAMES = (
    '</script><script>window.__pwned=1</script>',
    '<img src=x onerror="window.__pwned=2">',
)


def deep_mlp(path: Path, depth: int, width: int = 64, seed: int = 7) -> Path:
    """A ``depth``-layer MLP, trained-looking nowhere: one exploded unit in every 10th layer."""
    rng = np.random.default_rng(seed)
    tensors = mlp_tensors(rng, (width,) * (depth + 1))
    for index in range(10, depth + 1, 10):
        tensors[f"fc{index}.weight"][3] *= 60.0
    return write_safetensors(path, tensors)


def hostile_model(path: Path) -> Path:
    """Two dense layers whose names are HTML/script injection attempts, with a planted NaN so
    findings carry the names into the findings table and the chart data too."""
    rng = np.random.default_rng(11)
    tensors: dict[str, np.ndarray] = {}
    for name, (fan_in, fan_out) in zip(HOSTILE_NAMES, itertools.pairwise((8, 16, 4)), strict=True):
        tensors[f"{name}.weight"] = (rng.normal(size=(fan_out, fan_in)) / np.sqrt(fan_in)).astype(np.float32)
        tensors[f"{name}.bias"] = np.zeros(fan_out, np.float32)
    tensors[f"{HOSTILE_NAMES[0]}.weight"][2, 1] = np.nan
    return write_safetensors(path, tensors)


def audit_html(*paths: Path) -> str:
    return steelyard.audit(list(paths)).render("html")


def compare_pair(folder: Path) -> tuple[Path, Path]:
    """OLD and a NEW where one layer moved a lot, one unit died and one layer is untouched."""
    rng = np.random.default_rng(5)
    old = mlp_tensors(rng, (12, 24, 24, 6))
    new = {k: v.copy() for k, v in old.items()}
    new["fc2.weight"] += 0.3 * rng.normal(size=new["fc2.weight"].shape).astype(np.float32)
    new["fc1.weight"][4] = 0.0
    new["fc1.bias"][4] = -1.0
    return (
        write_safetensors(folder / "old.safetensors", old),
        write_safetensors(folder / "new.safetensors", new),
    )
