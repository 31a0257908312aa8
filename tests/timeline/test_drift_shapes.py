"""Drift and per-layer series on runs generated here in several shapes, dtypes and formats,
checked against numpy on the arrays the reference readers return (``safetensors`` for
safetensors files, ``numpy.load`` for NPZ)."""

from __future__ import annotations

from pathlib import Path

import ml_dtypes  # the safetensors numpy backend needs it for BF16 (FORMATS.md)
import numpy as np
import pytest
from safetensors.numpy import load_file

import steelyard
from steelyard import streaming
from steelyard.policy import Policy
from steelyard.run_timeline.result import Timeline
from tests.timeline._runs import CONV, MLP, write_run

CREATED = "2026-01-01T00:00:00Z"


def _canonical(array: np.ndarray) -> np.ndarray:
    """[out, in, *kernel] flattened to [out, fan_in] (PyTorch layout; common practice)."""
    return array.astype(np.float64).reshape(array.shape[0], -1)


def _expected(a: np.ndarray, b: np.ndarray) -> tuple[float, float]:
    a64, b64 = _canonical(a).ravel(), _canonical(b).ravel()
    return (
        float(np.linalg.norm(b64 - a64) / np.linalg.norm(a64)),
        float(a64 @ b64 / (np.linalg.norm(a64) * np.linalg.norm(b64))),
    )


def _check(timeline: Timeline, arrays: list[dict[str, np.ndarray]]) -> int:
    checked = 0
    for series in timeline.layers:
        for index, point in enumerate(series.points):
            if point is None or index == 0:
                continue
            for drift, ref in ((point.from_previous, index - 1), (point.from_first, 0)):
                key = f"{series.name}.weight"
                if key not in arrays[ref] or arrays[ref][key].shape != arrays[index][key].shape:
                    assert drift is None
                    continue
                assert drift is not None
                change, cosine = _expected(arrays[ref][key], arrays[index][key])
                assert drift.relative_change == pytest.approx(change, rel=1e-9)
                assert drift.cosine == pytest.approx(cosine, rel=1e-9)
                checked += 1
    return checked


@pytest.mark.parametrize("shapes", [MLP, CONV], ids=["mlp", "conv"])
@pytest.mark.parametrize("dtype", [np.float32, np.float16, ml_dtypes.bfloat16], ids=["f32", "f16", "bf16"])
def test_drift_equals_numpy(tmp_path: Path, shapes: dict, dtype: type) -> None:
    paths = write_run(tmp_path, [10, 20, 30, 40], shapes=shapes, dtype=dtype, seed=11)
    timeline = steelyard.timeline([tmp_path], policy=Policy(), created=CREATED)
    arrays = [load_file(str(p)) for p in paths]  # reference: safetensors
    assert _check(timeline, arrays) == 2 * 3 * 2  # 2 layers x 3 checkpoints x (previous, first)


def test_many_row_blocks_give_the_same_drift(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # Blocks of a few rows: the side-by-side pass must add up to the whole-matrix numbers.
    shapes = {"big.weight": (97, 33), "big.bias": (97,), "out.weight": (3, 97)}
    paths = write_run(tmp_path, [1, 2, 3], shapes=shapes, seed=5)
    whole = steelyard.timeline([tmp_path], policy=Policy(), created=CREATED)
    monkeypatch.setattr(streaming, "CHUNK_BYTES", 4 * 33 * 5)  # five rows per block
    blocked = steelyard.timeline([tmp_path], policy=Policy(), created=CREATED)
    arrays = [load_file(str(p)) for p in paths]
    assert _check(blocked, arrays) == _check(whole, arrays) > 0


def test_npz_run_read_whole(tmp_path: Path) -> None:
    # NPZ members have no span reader, so drift reads each layer whole (the other path).
    rng = np.random.default_rng(2)
    base = {k: rng.normal(size=s).astype(np.float32) for k, s in MLP.items()}
    paths = []
    for step in (5, 15, 25):
        for value in base.values():
            value += 0.1 * rng.normal(size=value.shape).astype(np.float32)
        path = tmp_path / f"weights_step_{step}.npz"
        np.savez(path, **base)  # reference writer: numpy
        paths.append(path)
    timeline = steelyard.timeline(paths, policy=Policy(), created=CREATED)
    arrays = [dict(np.load(p)) for p in paths]  # reference reader: numpy
    assert [c.position.value for c in timeline.checkpoints] == [5, 15, 25]
    assert _check(timeline, arrays) == 2 * 2 * 2


def test_layers_that_come_and_go(tmp_path: Path) -> None:
    # A head added at step 3 and a layer resized at step 4: points are absent (None) where
    # the layer is, drift only against checkpoints of the same shape, and the reshape noted.
    def edit(step: int, tensors: dict[str, np.ndarray]) -> None:
        if step == 3:
            tensors["extra.weight"] = np.ones((4, 8), np.float32)
        if step == 4:
            tensors["fc2.weight"] = np.ones((6, 24), np.float32)
            tensors["fc2.bias"] = np.zeros(6, np.float32)

    paths = write_run(tmp_path, [1, 2, 3, 4, 5], edit=edit, seed=9)
    timeline = steelyard.timeline([tmp_path], policy=Policy(), created=CREATED)
    series = {s.name: s for s in timeline.layers}
    assert [p is not None for p in series["extra"].points] == [False, False, True, True, True]
    fc2 = series["fc2"].points
    assert fc2[3] is not None and fc2[3].from_previous is None and fc2[3].from_first is None
    assert fc2[4] is not None and fc2[4].from_previous is not None and fc2[4].from_first is None
    assert [n for n in timeline.notes if "fc2" in n and "6x24" in n and "8x24 before" in n]
    assert _check(timeline, [load_file(str(p)) for p in paths]) > 0


def test_dead_units_and_nonfinite_series_follow_planted_events(tmp_path: Path) -> None:
    # Planted in a numpy run: rows of fc1 zeroed from step 30, an Inf in fc2 from step 40.
    def edit(step: int, tensors: dict[str, np.ndarray]) -> None:
        if step >= 30:
            tensors["fc1.weight"][[2, 5]] = 0.0
        if step == 40:
            tensors["fc2.weight"][1, 3] = np.inf

    write_run(tmp_path, [10, 20, 30, 40, 50], edit=edit, seed=4)
    timeline = steelyard.timeline([tmp_path], policy=Policy(), created=CREATED)
    series = {s.name: s for s in timeline.layers}
    assert [p.dead for p in series["fc1"].points if p] == [0, 0, 2, 2, 2]
    assert [p.nonfinite for p in series["fc2"].points if p] == [0, 0, 0, 1, 1]
    spans = {(s.rule, s.layer): s for s in timeline.findings}
    assert spans[("dead-unit", "fc1")].appeared == 2
    assert spans[("dead-unit", "fc1")].units_first == (2, 5)
    assert spans[("nonfinite", "fc2")].appeared == 3


def test_a_finding_that_goes_away_and_comes_back(tmp_path: Path) -> None:
    def edit(step: int, tensors: dict[str, np.ndarray]) -> None:
        tensors["fc2.weight"][0, 0] = np.nan if step in (2, 3, 5) else 0.5

    write_run(tmp_path, [1, 2, 3, 4, 5], edit=edit, seed=8)
    timeline = steelyard.timeline([tmp_path], policy=Policy(), created=CREATED)
    (span,) = [s for s in timeline.findings if s.rule == "nonfinite"]
    assert (span.appeared, span.disappeared, span.spans) == (1, 3, ((1, 2), (4, 4)))
    assert span.present_at_end
