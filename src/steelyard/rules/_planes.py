"""Seeded Gaussian directions for the twin searches' projections, drawn once per process.

A projection onto random directions costs one BLAS product; drawing the directions cost as
much again (0.6M standard normals: 5.7 ms, one thread), and every layer of one width and
search plan needs the same ones. A generator fills an array in row-major order, so the first
``width`` rows of a wider draw are the values a draw of ``width`` rows gives: one kept draw
per (seed, columns) serves every width up to its own.
"""

from __future__ import annotations

import threading

import numpy as np

#: Largest draw kept (entries; 16 MiB of float32), and most draws kept, for the process.
_KEPT_ENTRIES = 2**22
_KEPT_SETS = 8

_lock = threading.Lock()
_kept: dict[tuple[tuple[int, ...], int], np.ndarray] = {}


def gaussian_planes(seed: tuple[int, ...], width: int, columns: int) -> np.ndarray:
    """``numpy.random.default_rng(seed).standard_normal((width, columns), dtype=float32)``,
    read-only, from the process's kept draw when one is wide enough."""
    key = (seed, columns)
    with _lock:
        drawn = _kept.get(key)
        if drawn is not None and drawn.shape[0] >= width:
            return drawn[:width]
    fresh = np.random.default_rng(seed).standard_normal((width, columns), dtype=np.float32)
    fresh.setflags(write=False)
    if fresh.size <= _KEPT_ENTRIES:
        with _lock:
            if len(_kept) >= _KEPT_SETS and key not in _kept:
                _kept.pop(next(iter(_kept)))  # the oldest
            _kept[key] = fresh
    return fresh
