"""The committed run (``fixtures/timeline_run``, trained by torch in
``fixtures/gen_timeline_run.py``): the timeline must show the planted events at the steps the
generator recorded in ``planted.json``, and its drift must equal numpy's computation on the
tensors as the reference ``safetensors`` package reads them."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from safetensors.numpy import load_file

import steelyard
from steelyard.findings import Severity
from steelyard.policy import Policy
from steelyard.run_timeline.result import Timeline
from tests.conftest import FIXTURES

RUN = FIXTURES / "timeline_run"
PLANTED = json.loads((RUN / "planted.json").read_text())


@pytest.fixture(scope="module")
def timeline() -> Timeline:
    return steelyard.timeline([RUN], policy=Policy(), created="2026-01-01T00:00:00Z")


def _steps(timeline: Timeline) -> list[int | None]:
    return [c.position.value for c in timeline.checkpoints]


def _series(timeline: Timeline, name: str) -> list:
    (series,) = [s for s in timeline.layers if s.name == name]
    return list(series.points)


def test_checkpoints_in_training_order(timeline: Timeline) -> None:
    assert _steps(timeline) == PLANTED["steps"]
    assert len(timeline.checkpoints) >= 10
    assert {c.position.source for c in timeline.checkpoints} == {"trainer_state"}


def test_planted_death_first_reported_at_its_step(timeline: Timeline) -> None:
    dead = PLANTED["dead_units"]
    (span,) = [s for s in timeline.findings if s.rule == "dead-unit" and s.layer == dead["layer"]]
    assert timeline.checkpoints[span.appeared].position.value == dead["first_step"]
    assert span.units_first == tuple(dead["units"])
    assert span.disappeared is None and span.present_at_end
    counts = [p.dead for p in _series(timeline, dead["layer"])]
    first = PLANTED["steps"].index(dead["first_step"])
    assert counts[:first] == [0] * first
    assert all(c >= len(dead["units"]) for c in counts[first:])


def test_planted_nan_first_appears_at_its_step(timeline: Timeline) -> None:
    planted = PLANTED["nonfinite"]
    first = PLANTED["steps"].index(planted["first_step"])
    counts = [p.nonfinite for p in _series(timeline, planted["layer"])]
    assert counts == [0] * first + [1] * (len(counts) - first)
    (span,) = [s for s in timeline.findings if s.rule == "nonfinite"]
    assert (span.layer, span.appeared, span.severity) == (planted["layer"], first, Severity.ERROR)
    # No other layer holds a non-finite value at any step.
    others = [p.nonfinite for s in timeline.layers if s.name != planted["layer"] for p in s.points if p]
    assert set(others) == {0}


def test_gate_fails_on_the_nan_present_at_the_end(timeline: Timeline) -> None:
    assert not timeline.passed and timeline.exit_code == 1
    assert {s.rule for s in timeline.failing()} == {"nonfinite"}


def _reference(a: np.ndarray, b: np.ndarray) -> tuple[float | None, float | None]:
    """numpy on the reference reader's arrays: ‖b−a‖_F/‖a‖_F and the cosine (float64)."""
    a64, b64 = a.astype(np.float64).ravel(), b.astype(np.float64).ravel()
    if not (np.isfinite(a64).all() and np.isfinite(b64).all()):
        return None, None
    change = float(np.linalg.norm(b64 - a64) / np.linalg.norm(a64))
    cosine = float(a64 @ b64 / (np.linalg.norm(a64) * np.linalg.norm(b64)))
    return change, cosine


def test_drift_equals_numpy_on_the_reference_reader(timeline: Timeline) -> None:
    weights = [load_file(c.path) for c in timeline.checkpoints]  # reference: safetensors
    checked = 0
    for series in timeline.layers:
        name = f"{series.name}.weight"
        for index, point in enumerate(series.points):
            assert point is not None
            if index == 0:
                assert point.from_previous is None and point.from_first is None
                continue
            for drift, ref in ((point.from_previous, index - 1), (point.from_first, 0)):
                assert drift is not None
                change, cosine = _reference(weights[ref][name], weights[index][name])
                if change is None:
                    assert drift.relative_change is None and drift.cosine is None
                    continue
                assert drift.relative_change == pytest.approx(change, rel=1e-9)
                assert drift.cosine == pytest.approx(cosine, rel=1e-9)
                checked += 1
    assert checked > 40


def test_fan_in_norms_equal_numpy(timeline: Timeline) -> None:
    for index, checkpoint in enumerate(timeline.checkpoints):
        tensors = load_file(checkpoint.path)  # reference: safetensors
        for series in timeline.layers:
            rows = np.linalg.norm(tensors[f"{series.name}.weight"].astype(np.float64), axis=1)
            rows = rows[np.isfinite(rows)]
            point = series.points[index]
            assert point is not None and point.fan_in_norm_median is not None
            assert point.fan_in_norm_median == pytest.approx(float(np.median(rows)), rel=1e-5)
            assert point.fan_in_norm_max == pytest.approx(float(rows.max()), rel=1e-5)


def test_killed_rows_are_zero_in_the_reference_reader() -> None:
    # The fixture itself: the planted units really are dead in the stored file (guards the
    # generator, not steelyard).
    dead = PLANTED["dead_units"]
    path = RUN / f"checkpoint-{dead['first_step']}" / "model.safetensors"
    tensors = load_file(str(path))
    assert not tensors["fc1.weight"][dead["units"]].any()
    assert (tensors["fc1.bias"][dead["units"]] < 0).all()
    assert math.isnan(float(load_file(str(RUN / "checkpoint-1200" / "model.safetensors"))["fc2.weight"][7, 11]))


def test_run_folder_and_listed_checkpoints_agree(timeline: Timeline) -> None:
    # The same files named one by one, shuffled, give the same document: order comes from
    # the training steps, not from how the files were named.
    listed = sorted(RUN.glob("checkpoint-*/model.safetensors"))
    shuffled = [listed[i] for i in np.random.default_rng(3).permutation(len(listed))]
    again = steelyard.timeline(shuffled, policy=Policy(), created="2026-01-01T00:00:00Z")
    assert again.to_json() == timeline.to_json()
