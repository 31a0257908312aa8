"""The weight families of bench/families.py draw what they claim.

A benchmark is only as good as its weights: each check compares a family's draw with the
published definition it names (small shapes, fixed seeds, no timing).
"""

from __future__ import annotations

import math
import sys
from collections.abc import Iterator
from pathlib import Path

import ml_dtypes
import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "bench"))
import _common  # bench/ is not a package

ROWS, COLS = 1024, 512


def excess_kurtosis(x: np.ndarray) -> float:
    """Fourth standardised moment minus 3 (0 for a Gaussian)."""
    z = x.astype(np.float64).ravel()
    z = z - z.mean()
    return float((z**4).mean() / (z**2).mean() ** 2 - 3.0)


def power_law_slope(values: np.ndarray) -> float:
    """Least-squares slope of log s_k against log k, k = 1, 2, ..."""
    k = np.arange(1, len(values) + 1)
    return float(np.polyfit(np.log(k), np.log(values), 1)[0])


@pytest.fixture
def blocked() -> Iterator[None]:
    """Draw in blocks of 128 rows, so the block-stacking of the factors is exercised."""
    saved = _common._DRAW_ELEMENTS
    _common._DRAW_ELEMENTS = 128 * COLS
    yield
    _common._DRAW_ELEMENTS = saved


@pytest.mark.parametrize("blocks", [False, True])
def test_power_law_part_has_the_claimed_spectrum(
    blocks: bool, monkeypatch: pytest.MonkeyPatch, request: pytest.FixtureRequest
) -> None:
    # With the noise switched off, the draw is the power-law part alone: its singular values
    # must follow s_k = 6 · edge · k^-1 over exactly 64 directions (a power law of exponent
    # 1, the decay reported for trained weight spectra by Martin & Mahoney, JMLR 22(165),
    # 2021), edge = σ(√rows + √cols), the Marchenko–Pastur edge of the noise (Marchenko &
    # Pastur, 1967).
    if blocks:
        request.getfixturevalue("blocked")
    monkeypatch.setattr(
        _common, "student_t", lambda rng, shape, dof: np.zeros(shape, dtype=np.float32)
    )
    draw = _common.family_matrix(np.random.default_rng(4), ROWS, COLS, "lowrank-heavytail")
    s = np.linalg.svd(draw.values.astype(np.float64), compute_uv=False)
    edge = (math.sqrt(ROWS) + math.sqrt(COLS)) / math.sqrt(COLS)
    assert power_law_slope(s[:64]) == pytest.approx(-1.0, abs=0.02)
    assert s[0] == pytest.approx(6.0 * edge, rel=0.02)
    assert s[64] < 1e-4 * s[0]  # rank 64, nothing more


def test_trained_like_spectrum_stands_out_of_the_noise() -> None:
    # With the noise on, the strongest directions stay far above the bulk edge, and the top
    # three keep roughly the k^-1 decay; a spike just above the edge is pushed upwards by the
    # noise (Benaych-Georges & Nadakuditi, Adv. Math. 227, 2011), hence the tolerance.
    draw = _common.family_matrix(np.random.default_rng(5), ROWS, COLS, "lowrank-heavytail")
    s = np.linalg.svd(draw.values.astype(np.float64), compute_uv=False)
    edge = (math.sqrt(ROWS) + math.sqrt(COLS)) / math.sqrt(COLS)
    assert s[0] > 4.0 * edge
    assert power_law_slope(s[:3]) == pytest.approx(-1.0, abs=0.2)
    # Pure noise of the same scale would have s_1 close to the edge (control).
    gaussian = _common._values(np.random.default_rng(5), (ROWS, COLS), "gaussian")
    assert np.linalg.svd(gaussian.astype(np.float64), compute_uv=False)[0] < 1.1 * edge


def test_student_t_noise_is_heavy_tailed_with_unit_variance() -> None:
    # Student-t with ν = 5: variance ν/(ν−2) before scaling (so 1 after), excess kurtosis
    # 6/(ν−4) = 6, and two-sided P(|T| > 4.032) = 0.01 (t-table critical value t_{0.995,5} =
    # 4.032; standard statistics tables, value from memory). A Gaussian gives 0.0018 at the
    # same scaled threshold.
    x = _common.student_t(np.random.default_rng(6), (1_000_000,), 5.0)
    assert x.var() == pytest.approx(1.0, rel=0.03)
    assert excess_kurtosis(x) > 1.0
    threshold = 4.032 * math.sqrt(3.0 / 5.0)
    assert np.mean(np.abs(x) > threshold) == pytest.approx(0.01, abs=0.0005)
    # The whole trained-like matrix stays heavy-tailed (the power-law part is not).
    draw = _common.family_matrix(np.random.default_rng(6), ROWS, COLS, "lowrank-heavytail")
    assert excess_kurtosis(draw.values) > 1.0


def test_gaussian_family_is_the_initializer_draw() -> None:
    # i.i.d. N(0, 1/fan_in) (LeCun et al., "Efficient BackProp", 1998): variance 1/fan_in,
    # excess kurtosis 0.
    x = _common._values(np.random.default_rng(7), (ROWS, COLS), "gaussian")
    assert x.var() == pytest.approx(1.0 / COLS, rel=0.02)
    assert abs(excess_kurtosis(x)) < 0.05


@pytest.mark.parametrize(
    ("seed", "rows", "cols"), [(0, ROWS, COLS), (1, 256, 2048), (2, 192, 4096)]
)
def test_outlier_channels(seed: int, rows: int, cols: int) -> None:
    # Activation outlier features (Dettmers et al., LLM.int8(), NeurIPS 2022): a few hidden
    # channels far larger than the rest, the same channels in every matrix of a width.
    draw = _common.family_matrix(np.random.default_rng(seed), rows, cols, "outlier-channels")
    columns = np.linalg.norm(draw.values, axis=0)
    others = np.median(np.delete(columns, draw.outlier_columns))
    ratios = columns[draw.outlier_columns] / others
    assert len(draw.outlier_columns) >= 2
    assert np.all(ratios >= 20.0 * (1 - 1e-5)) and np.all(ratios <= 50.0 * (1 + 1e-5))
    row_norms = np.linalg.norm(draw.values, axis=1)
    assert np.all(row_norms[draw.outlier_rows] >= 3.0 * np.median(row_norms))
    other = _common.family_matrix(np.random.default_rng(seed + 10), 64, cols, "outlier-channels")
    assert np.array_equal(other.outlier_columns, draw.outlier_columns)
    # Without outliers the largest column is nowhere near (control).
    plain = _common.family_matrix(np.random.default_rng(seed), rows, cols, "lowrank-heavytail")
    plain_columns = np.linalg.norm(plain.values, axis=0)
    assert plain_columns.max() < 3.0 * np.median(plain_columns)


def test_outlier_factors_stay_in_range_for_every_width() -> None:
    # The planted factors (the column-norm ratios above) are 20–50 at every width.
    for cols in range(256, 8193, 64):
        channels, factors = _common.outlier_channels(cols)
        assert len(channels) == max(2, cols // 256) == len(set(channels.tolist()))
        assert np.all((factors >= 20.0) & (factors <= 50.0))


@pytest.mark.usefixtures("blocked")
def test_near_duplicate_rows() -> None:
    # 30 % of the rows are another row plus noise of 1e-3 of its norm: cosine >= 0.999 with
    # the source (cos = 1/√(1 + 1e-6) for orthogonal noise), also after rounding to bf16;
    # the remaining rows are not near copies of each other.
    draw = _common.family_matrix(np.random.default_rng(8), ROWS, COLS, "near-duplicate")
    x = draw.values
    assert len(draw.copies) == pytest.approx(0.3 * ROWS, abs=ROWS // 128)
    assert not set(draw.copies) & set(draw.sources)
    for stored in (x, x.astype(ml_dtypes.bfloat16).astype(np.float32)):
        unit = stored / np.linalg.norm(stored, axis=1, keepdims=True)
        cosine = np.sum(unit[draw.copies] * unit[draw.sources], axis=1)
        assert np.all(cosine >= 0.999)
    distance = np.linalg.norm(x[draw.copies] - x[draw.sources], axis=1)
    relative = distance / np.linalg.norm(x[draw.sources], axis=1)
    assert np.median(relative) == pytest.approx(1e-3, rel=0.1)
    originals = np.setdiff1d(np.arange(ROWS), draw.copies)
    unit = x[originals] / np.linalg.norm(x[originals], axis=1, keepdims=True)
    gram = unit @ unit.T
    np.fill_diagonal(gram, 0.0)
    assert np.abs(gram).max() < 0.95


def test_families_write_through_the_checkpoint_writer(tmp_path: Path) -> None:
    # Every family goes through write_checkpoint's bf16 path with the right shapes.
    from safetensors.numpy import load_file

    shape = _common.Shape(vocab=128, hidden=64, intermediate=96, layers=1)
    for family in _common.WEIGHTS:
        path = _common.write_checkpoint(tmp_path / family, shape, "bf16", 2**40, weights=family)
        tensors = load_file(str(path))
        assert {n: t.shape for n, t in tensors.items()} == dict(shape.tensors())
        assert all(t.dtype == np.dtype(ml_dtypes.bfloat16) for t in tensors.values())
