"""``untrained-layer``: fresh initializer draws are flagged, trained or spiked matrices are not.

References: the initializers are drawn with numpy from their published formulas (Glorot &
Bengio 2010; He et al. 2015; PyTorch's documented U(±1/√fan_in) default; Keras's truncated
normal at ±2 standard deviations); the KS statistic and the CDFs against ``scipy.stats``; the
Marchenko–Pastur edge and the Tracy–Widom scale against ``numpy.linalg.svd`` of sampled
matrices, with the Tracy–Widom β=1 mean −1.21 and standard deviation 1.27 (Tracy & Widom
1996, "On orthogonal and symplectic matrix ensembles", Comm. Math. Phys. 177); real PyTorch
initialisations from ``fixtures/real/torch`` when present.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest
from safetensors.numpy import save_file

from steelyard.checkpoint_audit import run_rules
from steelyard.findings import Finding, Severity
from steelyard.loaders import load
from steelyard.policy import Policy
from steelyard.rules._initializers import (
    TRUNCATED_KURTOSIS,
    TRUNCATED_STD,
    Candidate,
    candidates,
    erf,
)
from steelyard.rules._significance import equivalence_p, holm, smallest_claimable
from steelyard.rules._spectrum import (
    SPECTRUM_ENTRIES,
    WHOLE_ENTRIES,
    edge_check,
    edge_fluctuation,
    mp_edge,
    row_stride,
    top_singular_value,
)
from steelyard.rules.base import RuleMeasurements, RuleNotes
from steelyard.rules.untrained_layer import (
    RULE,
    SPREAD_ROWS,
    Ecdf,
    ks_distance,
    ks_limit,
    quartiles,
    row_spread,
    scale_z,
    spread_limit,
)

TORCH_FIXTURES = Path(__file__).resolve().parents[2] / "fixtures" / "real" / "torch"
FAN_OUT, FAN_IN = 256, 512


def _run(path: Path, policy: Policy | None = None, notes: RuleNotes | None = None) -> list[Finding]:
    findings, _, _ = run_rules(
        load(path), policy or Policy(), None, rules={RULE.name: RULE}, notes=notes
    )
    return findings


def _save(tmp_path: Path, tensors: dict[str, np.ndarray]) -> Path:
    path = tmp_path / "model.safetensors"
    save_file({k: np.ascontiguousarray(v, dtype=np.float32) for k, v in tensors.items()}, str(path))
    return path


def _truncated(rng: np.random.Generator, std: float, shape: tuple[int, ...]) -> np.ndarray:
    """Keras-style truncated normal: pre-truncation std = std/0.8796…, redraw beyond ±2 of it."""
    wide = std / 0.87962566103423978  # reference: the constant in Keras's VarianceScaling
    out = rng.normal(0.0, wide, size=shape)
    while True:
        bad = np.abs(out) > 2 * wide
        if not bad.any():
            return out
        out[bad] = rng.normal(0.0, wide, size=int(bad.sum()))


# name → numpy draw of a [FAN_OUT, FAN_IN] Dense kernel by the published formula
_AVG = math.sqrt(2.0 / (FAN_IN + FAN_OUT))
DRAWS: dict[str, Callable[[np.random.Generator], np.ndarray]] = {
    # PyTorch Linear: kaiming_uniform(a=√5) → U(±1/√fan_in) (PyTorch nn.Linear docs)
    "pytorch-default": lambda r: r.uniform(-1, 1, (FAN_OUT, FAN_IN)) / math.sqrt(FAN_IN),
    # Glorot & Bengio 2010, eq. 16: U(±√(6/(fan_in+fan_out)))
    "glorot-uniform": lambda r: (
        r.uniform(-1, 1, (FAN_OUT, FAN_IN)) * math.sqrt(6 / (FAN_IN + FAN_OUT))
    ),
    "glorot-normal": lambda r: r.normal(0, _AVG, (FAN_OUT, FAN_IN)),
    "glorot-truncated-normal": lambda r: _truncated(r, _AVG, (FAN_OUT, FAN_IN)),
    # He et al. 2015: N(0, 2/fan_in); uniform variant ±√(6/fan_in)
    "he-normal": lambda r: r.normal(0, math.sqrt(2 / FAN_IN), (FAN_OUT, FAN_IN)),
    "he-uniform": lambda r: r.uniform(-1, 1, (FAN_OUT, FAN_IN)) * math.sqrt(6 / FAN_IN),
    "he-truncated-normal": lambda r: _truncated(r, math.sqrt(2 / FAN_IN), (FAN_OUT, FAN_IN)),
    # Radford et al. 2018: N(0, 0.02)
    "normal-0.02": lambda r: r.normal(0, 0.02, (FAN_OUT, FAN_IN)),
}


def test_truncated_normal_constant() -> None:
    scipy_stats = pytest.importorskip("scipy.stats")
    # reference: scipy.stats.truncnorm and the literal constant Keras and JAX use
    assert scipy_stats.truncnorm(-2, 2).std() == pytest.approx(TRUNCATED_STD, rel=1e-12)
    assert pytest.approx(0.87962566103423978, rel=1e-12) == TRUNCATED_STD


def test_cdfs_and_ks_statistic_match_scipy() -> None:
    scipy_stats = pytest.importorskip("scipy.stats")
    rng = np.random.default_rng(1)
    x = np.sort(rng.normal(0, 0.7, 3000))
    references = [
        (Candidate("u", "uniform", 0.9), scipy_stats.uniform(-0.9, 1.8)),
        (Candidate("n", "normal", 0.6), scipy_stats.norm(0, 0.6)),
        (Candidate("t", "truncated", 0.5), scipy_stats.truncnorm(-2, 2, loc=0, scale=0.5)),
    ]
    for candidate, frozen in references:
        # reference: scipy.stats CDFs and scipy.stats.kstest. The normal CDFs use the
        # Abramowitz & Stegun 7.1.26 erf (|error| <= 1.5e-7, so <= 7.5e-8 on a CDF).
        np.testing.assert_allclose(candidate.cdf(x), frozen.cdf(x), atol=1e-7)
        expected = scipy_stats.kstest(x, frozen.cdf).statistic
        assert ks_distance(x, candidate.cdf) == pytest.approx(expected, abs=1e-7)
        # the bound from every 100th order statistic: below D, and by at most the gap / n
        probe = np.arange(0, x.size, 100)
        bound = ks_distance(x, candidate.cdf, probe)
        assert expected - 100 / x.size - 1e-7 <= bound <= expected + 1e-7
        assert candidate.std == pytest.approx(frozen.std(), rel=1e-9)


@pytest.mark.parametrize("stored", ["bf16", "float16", "float32", "signed-zeros"])
def test_ecdf_at_distinct_values_is_the_statistic_over_every_order_statistic(stored: str) -> None:
    # The definition, D = max_i max((i+1)/n − F(x_(i)), F(x_(i)) − i/n) over every order
    # statistic (Kolmogorov 1933), evaluated directly; the compressed form must give the same
    # float. Rounding to bf16 by ml_dtypes (the reference bf16 implementation on PyPI).
    import ml_dtypes

    rng = np.random.default_rng(23)
    merged = 0
    for trial in range(40):
        n = int(rng.integers(300, 25_000))
        x = (rng.standard_normal(n) * rng.uniform(0.005, 0.1)).astype(np.float32)
        if stored == "bf16":
            x = x.astype(ml_dtypes.bfloat16).astype(np.float32)
        elif stored == "float16":
            x = x.astype(np.float16).astype(np.float32)
        elif stored == "signed-zeros":
            x = x.astype(ml_dtypes.bfloat16).astype(np.float32)
            x[: n // 10] = 0.0
            x[n // 10 : n // 5] = -0.0
        ordered = np.sort(x.astype(np.float64))
        steps = np.arange(n + 1) / n
        ecdf = Ecdf(ordered)
        runs = 1 + int(np.count_nonzero(np.diff(ordered.view(np.uint64))))  # equal bits
        assert ecdf.values.size == (runs if 2 * (runs - 1) <= n else n)
        merged += ecdf.values.size < n
        for candidate in (
            Candidate("n", "normal", 0.02),
            Candidate("u", "uniform", 0.05 + trial / 1000),
            Candidate("t", "truncated", 0.03),
        ):
            values = candidate.cdf(ordered)
            expected = max((steps[1:] - values).max(), (values - steps[:-1]).max())
            assert ecdf.distance(candidate.cdf) == expected
            assert ks_distance(ordered, candidate.cdf) == expected
    if stored in ("bf16", "signed-zeros"):
        assert merged > 30  # a bf16 sample is mostly ties
    if stored == "float32":
        assert merged == 0


def test_erf_meets_its_published_error_bound() -> None:
    # reference: Python's math.erf; bound from Abramowitz & Stegun (1964), formula 7.1.26
    x = np.linspace(-7.0, 7.0, 200_001)
    exact = np.array([math.erf(v) for v in x])
    error = np.abs(erf(x) - exact)
    assert error.max() <= 1.5e-7
    assert error.max() > 1e-9  # it is the approximation, not math.erf itself
    np.testing.assert_array_equal(erf(-x), -erf(x))  # odd


def test_ks_limit_is_the_alpha_0001_critical_value_with_a_floor() -> None:
    # reference: asymptotic Kolmogorov critical value c(α) = sqrt(−ln(α/2)/2)
    c = math.sqrt(-math.log(0.001 / 2) / 2)
    assert ks_limit(100, 0.02) == pytest.approx(1.95 / 10)
    assert abs(c - 1.95) < 0.005
    assert ks_limit(20000, 0.02) == 0.02


@pytest.mark.parametrize("name", sorted(DRAWS))
def test_fresh_draws_are_flagged_with_the_right_initializer(tmp_path: Path, name: str) -> None:
    rng = np.random.default_rng(sorted(DRAWS).index(name))
    weight = DRAWS[name](rng)
    findings = _run(_save(tmp_path, {"fc1.weight": weight, "fc1.bias": np.zeros(FAN_OUT)}))
    assert len(findings) == 1
    found = findings[0]
    assert found.evidence["initializer"] == name
    assert found.evidence["ks"] <= found.evidence["ks_limit"]
    assert found.severity is Severity.WARNING


@pytest.mark.parametrize("seed", range(4))
def test_pruned_candidates_give_the_same_best_and_runner_up_as_all_of_them(
    tmp_path: Path, seed: int
) -> None:
    # The rule computes full KS distances only for candidates whose probe bound could place
    # them first or second; the ranking must equal the one over every candidate, computed
    # here with scipy.stats.kstest (reference: scipy). 96 x 128 weights: the sample is all.
    scipy_stats = pytest.importorskip("scipy.stats")
    rng = np.random.default_rng(100 + seed)
    weight = rng.uniform(-1, 1, size=(96, 128)) / math.sqrt(128)
    path = _save(tmp_path, {"fc1.weight": weight, "fc1.bias": np.zeros(96)})
    layer = load(path).layers[0]
    values = np.sort(weight.astype(np.float32).astype(np.float64).reshape(-1))
    full = sorted(
        (scipy_stats.kstest(values, c.cdf).statistic, c.name) for c in candidates(layer)
    )
    findings = _run(path)
    assert len(findings) == 1
    evidence = findings[0].evidence
    assert evidence["initializer"] == full[0][1]
    assert evidence["ks"] == pytest.approx(full[0][0], abs=1e-6)
    assert evidence["runner_up"]["initializer"] == full[1][1]
    assert evidence["runner_up"]["ks"] == pytest.approx(full[1][0], abs=1e-6)


def test_fresh_conv_and_embedding_are_flagged(tmp_path: Path) -> None:
    rng = np.random.default_rng(3)
    fan_in = 16 * 3 * 3
    conv = rng.uniform(-1, 1, (32, 16, 3, 3)) / math.sqrt(fan_in)  # PyTorch Conv2d default
    table = rng.normal(0, 1, (1000, 64))  # PyTorch nn.Embedding default N(0, 1)
    findings = _run(_save(tmp_path, {"conv1.weight": conv, "embed_tokens.weight": table}))
    by_layer = {f.layer: f.evidence["initializer"] for f in findings}
    assert by_layer == {"conv1": "pytorch-default", "embed_tokens": "normal-1"}


def test_truncated_normal_kurtosis_matches_scipy() -> None:
    scipy_stats = pytest.importorskip("scipy.stats")
    # reference: scipy.stats.truncnorm moments (excess kurtosis + 3)
    expected = float(scipy_stats.truncnorm(-2, 2).stats(moments="k")) + 3.0
    assert pytest.approx(expected, rel=1e-10) == TRUNCATED_KURTOSIS
    assert Candidate("u", "uniform", 1.0).kurtosis == 9 / 5  # handbook: uniform kurtosis 1.8
    assert Candidate("n", "normal", 1.0).kurtosis == 3.0


_FAMILIES: dict[str, tuple[Callable[[np.random.Generator, tuple[int, int]], np.ndarray], float]] = {
    "normal": (lambda r, s: r.normal(0.0, 1.0, s), 3.0),
    "uniform": (lambda r, s: r.uniform(-1.0, 1.0, s), 9 / 5),
    "truncated": (lambda r, s: _truncated(r, 1.0, s), TRUNCATED_KURTOSIS),
}


@pytest.mark.parametrize("family", sorted(_FAMILIES))
@pytest.mark.parametrize(("units", "fan_in", "draws"), [(64, 8, 400), (64, 512, 200), (1024, 1024, 8)])
def test_row_spread_of_fresh_draws_stays_near_one_and_under_the_limit(
    family: str, units: int, fan_in: int, draws: int
) -> None:
    # reference: i.i.d. draws by numpy; the sum of n i.i.d. squares has variance n(μ₄ − μ₂²)
    draw, kurtosis = _FAMILIES[family]
    rng = np.random.default_rng(units + fan_in)
    values = []
    for _ in range(draws):
        weights = draw(rng, (units, fan_in))
        values.append(row_spread(np.einsum("ij,ij->i", weights, weights), fan_in, kurtosis))
    assert max(values) < spread_limit(units, 10.0)
    # calibrated, not merely loose: the average is 1 up to the small-n skew of S and noise
    assert 0.85 < float(np.mean(values)) < 1.2


def test_row_spread_sees_training_and_ignores_a_padding_row(tmp_path: Path) -> None:
    rng = np.random.default_rng(11)
    fresh = rng.normal(0.0, 1.0, (512, 2048))
    squares = np.einsum("ij,ij->i", fresh, fresh)
    assert row_spread(squares, 2048, 3.0) < spread_limit(512, 10.0)
    # row scales spread lognormally by 5 %, as the mildest training does: R ≈ 1 + 0.01/(2/n)
    scaled = squares * rng.lognormal(0.0, 0.05, 512) ** 2
    assert row_spread(scaled, 2048, 3.0) > 3 * spread_limit(512, 10.0)
    table = rng.normal(0.0, 1.0, (300, 64))  # PyTorch nn.Embedding default N(0, 1) ...
    table[0] = 0.0  # ... with its padding_idx row zeroed, as nn.Embedding does
    assert table.shape[0] >= SPREAD_ROWS
    findings = _run(_save(tmp_path, {"embed_tokens.weight": table}))
    assert [f.evidence["initializer"] for f in findings] == ["normal-1"]
    assert findings[0].evidence["row_spread"] < findings[0].evidence["row_spread_limit"]


def test_units_of_different_norms_are_not_flagged(tmp_path: Path) -> None:
    rng = np.random.default_rng(12)
    weight = DRAWS["he-normal"](rng) * rng.lognormal(0.0, 0.3, (FAN_OUT, 1))
    assert _run(_save(tmp_path, {"fc1.weight": weight})) == []


def test_planted_spike_beyond_the_edge_is_not_flagged(tmp_path: Path) -> None:
    rng = np.random.default_rng(4)
    weight = DRAWS["pytorch-default"](rng)
    sigma = 1 / math.sqrt(FAN_IN) / math.sqrt(3)
    u = rng.normal(size=FAN_OUT)
    v = rng.normal(size=FAN_IN)
    # A rank-one direction of strength 1.5·σ·(mn)^{1/4}, past the BBP threshold σ·(mn)^{1/4}:
    # it leaves the bulk (as training's first strong directions do) but barely moves the
    # histogram.
    theta = 1.5 * sigma * (FAN_IN * FAN_OUT) ** 0.25
    spiked = weight + theta * np.outer(u / np.linalg.norm(u), v / np.linalg.norm(v))
    sample = np.sort(spiked.reshape(-1))
    assert ks_distance(sample, Candidate("p", "uniform", 1 / math.sqrt(FAN_IN)).cdf) < 0.02
    top = np.linalg.svd(spiked, compute_uv=False)[0]  # reference: numpy.linalg.svd
    edge = mp_edge(sigma, FAN_OUT, FAN_IN)
    assert top > edge + 4 * edge_fluctuation(sigma, FAN_OUT, FAN_IN)
    assert _run(_save(tmp_path, {"fc1.weight": spiked})) == []


def test_a_trained_layer_is_not_flagged(tmp_path: Path) -> None:
    rng = np.random.default_rng(5)
    weight = rng.uniform(-1, 1, (64, 128)) / math.sqrt(128)
    teacher = rng.normal(size=(64, 3)) @ rng.normal(size=(3, 128)) / 4
    x = rng.normal(size=(512, 128))
    for _ in range(200):  # full-batch gradient descent on 0.5·mean‖Wx − Tx‖²
        weight -= 0.5 * ((x @ weight.T - x @ teacher.T).T @ x) / x.shape[0]
    assert _run(_save(tmp_path, {"fc1.weight": weight})) == []


def test_an_untouched_output_layer_is_an_error(tmp_path: Path) -> None:
    rng = np.random.default_rng(6)
    tensors = {
        "fc1.weight": rng.uniform(-1, 1, (64, 128)) / math.sqrt(128),
        "fc2.weight": rng.uniform(-1, 1, (32, 64)) / math.sqrt(64),
    }
    severities = {f.layer: f.severity for f in _run(_save(tmp_path, tensors))}
    assert severities == {"fc1": Severity.WARNING, "fc2": Severity.ERROR}


def test_tiny_layers_are_skipped_and_small_matches_are_notes(tmp_path: Path) -> None:
    rng = np.random.default_rng(7)
    path = _save(tmp_path, {"fc1.weight": rng.uniform(-1, 1, (12, 16)) / 4})
    notes = RuleNotes()
    assert _run(path, notes=notes) == []
    assert notes.lines(["fc1"]) == ()  # under min-weights: not tested at all
    # Lowering the size floor does not make 192 weights enough: even D = 0 would need
    # ln(2·K/α)/(2δ²) weights (K = 14 candidates, one layer), so the match is only a note.
    lowered = Policy(rules={RULE.name: {"min-weights": 64}})
    assert smallest_claimable(1, 14, 0.001, 0.1) > 192
    notes = RuleNotes()
    assert _run(path, lowered, notes) == []
    (line,) = notes.lines(["fc1"])
    assert line.startswith("untrained-layer: weights that fit an initializer") and "fc1" in line


def test_marchenko_pastur_edge_and_tracy_widom_scale_against_sampled_matrices() -> None:
    rng = np.random.default_rng(8)
    for m, n, draw in ((64, 128, "normal"), (100, 50, "uniform")):
        z = []
        for _ in range(60):
            if draw == "normal":
                a = rng.normal(0, 0.3, (m, n))
            else:
                a = rng.uniform(-1, 1, (m, n)) * 0.3 * math.sqrt(3)
            top = np.linalg.svd(a, compute_uv=False)[0]  # reference: numpy.linalg.svd
            z.append((top - mp_edge(0.3, m, n)) / edge_fluctuation(0.3, m, n))
        scores = np.array(z)
        # Tracy–Widom β=1: mean −1.21, sd 1.27 (finite sizes shift the mean a little lower)
        assert -2.3 < scores.mean() < -0.6
        assert 0.7 < scores.std() < 1.9
        assert scores.max() < 4.0


def test_lanczos_against_numpy_svd() -> None:
    rng = np.random.default_rng(9)
    m, n = 700, 500  # above the full-SVD size, so the iteration runs
    sigma = 0.05
    base = rng.normal(0, sigma, (m, n))
    fluctuation = edge_fluctuation(sigma, m, n)
    u, v = rng.normal(size=m), rng.normal(size=n)
    spike = 2.0 * sigma * (m * n) ** 0.25 * np.outer(u / np.linalg.norm(u), v / np.linalg.norm(v))
    for matrix in (base, base + spike):
        estimate, method = top_singular_value(matrix, seed=0)
        exact = np.linalg.svd(matrix, compute_uv=False)[0]  # reference: numpy.linalg.svd
        assert method == "lanczos"
        assert estimate <= exact * (1 + 1e-5)
        assert exact - estimate < 0.5 * fluctuation
        # stopping on a small gain still lands within a fluctuation; a planted outlier is
        # found to float32 precision
        early, _ = top_singular_value(matrix, seed=1, tolerance=0.05 * fluctuation)
        assert exact - fluctuation < early <= exact * (1 + 1e-5)
    spiked, _ = top_singular_value(base + spike, seed=2)
    assert spiked == pytest.approx(np.linalg.svd(base + spike, compute_uv=False)[0], rel=1e-5)
    rank_two = np.outer(u, v) + np.outer(v[: m // 2].repeat(2)[:m], u[:n])  # exhausts at 2 steps
    value, _ = top_singular_value(rank_two)
    assert value == pytest.approx(np.linalg.svd(rank_two, compute_uv=False)[0], rel=1e-5)
    assert top_singular_value(np.zeros((m, n)))[0] == 0.0


def _spiked(rng: np.random.Generator, m: int, n: int, strength: float) -> np.ndarray:
    """N(0, 1/n) entries plus a delocalised rank-one direction of ``strength`` × σ(mn)^{1/4},
    the threshold (Baik, Ben Arous & Péché 2005; Benaych-Georges & Nadakuditi 2012) above
    which it leaves the Marchenko–Pastur bulk."""
    sigma = 1 / math.sqrt(n)
    base = rng.normal(0.0, sigma, (m, n))
    u, v = rng.normal(size=m), rng.normal(size=n)
    theta = strength * sigma * (m * n) ** 0.25
    return base + theta * np.outer(u / np.linalg.norm(u), v / np.linalg.norm(v))


def test_row_strides_keep_enough_rows_and_entries() -> None:
    assert row_stride(256, 512) == 1  # 2^17 entries: searched whole
    assert row_stride(1024, 1024) == 4 and row_stride(1024, 1024, 8) == 8
    assert row_stride(512, 512, 8) == 2  # keeps 2^17 entries
    assert row_stride(256, 8192, 8) == 4  # keeps 64 rows
    assert row_stride(4096, 4096, 0) == row_stride(4096, 4096, 1) == 1
    for m, n in ((300, 1000), (4096, 700), (32000, 64), (70, 40000)):
        kept = -(-m // row_stride(m, n))
        assert kept >= 64 or kept == m
        assert kept * n >= WHOLE_ENTRIES // 2


def test_the_subsample_of_a_large_matrix_keeps_at_most_the_entry_cap() -> None:
    # Beyond 4 x SPECTRUM_ENTRIES the stride grows so that the search reads at most 2^22
    # entries (16 MiB of float32), still at least 64 rows; below it nothing changes, and a cap
    # of 0 or a stride of 1 gives the strides without the cap.
    assert SPECTRUM_ENTRIES == 2**22
    for m, n in ((50257, 768), (128256, 4096), (4096, 11008), (151936, 896), (8193, 2048)):
        stride = row_stride(m, n)
        kept = len(range(0, m, stride))
        assert kept * n <= SPECTRUM_ENTRIES and kept >= 64
        assert stride > 4 and row_stride(m, n, 4, 0) == 4 and row_stride(m, n, 1) == 1
        # the smallest stride under the cap: one fewer would keep too many entries
        assert len(range(0, m, stride - 1)) * n > SPECTRUM_ENTRIES
    assert row_stride(2048, 8192) == 4  # exactly 4 x the cap: one row in 4 already fits
    assert row_stride(64, 10**7) == 1  # 64 rows: no stride keeps enough of them
    assert row_stride(1408, 512) == row_stride(1408, 512, 4, 0) == 4


def test_a_row_subsample_never_shows_more_than_the_whole_matrix() -> None:
    # Thompson (1972): every singular value of a submatrix is at most the whole one's; checked
    # with numpy.linalg.svd on fresh and spiked draws, and the Lanczos estimate of the rows
    # searched against numpy.linalg.svd of the same rows.
    rng = np.random.default_rng(17)
    for strength in (0.0, 2.0, 4.0):
        matrix = _spiked(rng, 1024, 512, strength).astype(np.float32)
        whole = np.linalg.svd(matrix.astype(np.float64), compute_uv=False)[0]
        assert row_stride(1024, 512) == 4
        check = edge_check(matrix[3::4], 1 / math.sqrt(512), 4.0, seed=3)
        assert check.rows == 256  # every 4th row from offset 3
        rows = matrix[3::4].astype(np.float64)
        exact = np.linalg.svd(rows, compute_uv=False)[0]
        assert exact <= whole * (1 + 1e-6)
        assert check.top <= exact * (1 + 1e-5)
        assert check.top > exact - check.fluctuation or check.beyond > 4.0
        assert check.edge == pytest.approx(mp_edge(1 / math.sqrt(512), 256, 512))


@pytest.mark.parametrize("family", sorted(_FAMILIES))
def test_subsampled_fresh_draws_stay_inside_the_edge(family: str) -> None:
    # The rows of an i.i.d. matrix are an i.i.d. matrix, so the subsample's top value follows
    # Tracy–Widom (β=1: mean −1.21, sd 1.27; Tracy & Widom 1996) around its own edge; the
    # Lanczos estimate stops a little low, never high.
    draw, _ = _FAMILIES[family]
    rng = np.random.default_rng(18)
    for m, n in ((1024, 512), (600, 1400), (2048, 256)):
        scores = []
        for seed in range(12):
            matrix = draw(rng, (m, n)).astype(np.float32)
            sigma = float(np.sqrt(np.mean(matrix.astype(np.float64) ** 2)))
            stride = row_stride(m, n)
            check = edge_check(matrix[seed % stride :: stride], sigma, 4.0, seed)
            assert check.rows < m
            scores.append(check.beyond)
        assert max(scores) < 4.0
        assert -3.5 < float(np.mean(scores)) < 0.0


def test_subsample_sees_directions_from_the_documented_strength() -> None:
    # Measured while choosing the subsample (1024 × 1024, bf16-rounded, 20 draws each; the
    # rule's documentation): searched whole, directions of 1.5× the threshold were found
    # 20/20; on one row in 4, 1.5× 0/20, 2× 19/20, 2.5× 20/20; on one row in 8, 2× 0/20 and
    # 2.5× 20/20. Below the threshold (Baik, Ben Arous & Péché 2005) nothing can see them.
    rng = np.random.default_rng(19)
    sigma = 1 / math.sqrt(1024)
    for stride, strengths in ((4, (0.8, 2.5, 3.0)), (8, (0.8, 3.0))):
        found = dict.fromkeys(strengths, 0)
        for strength in strengths:
            for seed in range(8):
                matrix = _spiked(rng, 1024, 1024, strength).astype(np.float32)
                rows = matrix[seed % stride :: stride]
                found[strength] += edge_check(rows, sigma, 4.0, seed).beyond > 4.0
        assert found == {strengths[0]: 0, **dict.fromkeys(strengths[1:], 8)}
    # what the subsample gives up: the whole matrix shows a 1.5× direction
    matrix = _spiked(rng, 1024, 1024, 1.5).astype(np.float32)
    top, _ = top_singular_value(matrix, 0, 0.05 * edge_fluctuation(sigma, 1024, 1024))
    assert top > mp_edge(sigma, 1024, 1024) + 4 * edge_fluctuation(sigma, 1024, 1024)


def test_a_large_fresh_layer_reports_the_rows_it_searched(tmp_path: Path) -> None:
    rng = np.random.default_rng(20)
    weight = rng.uniform(-1, 1, (1024, 512)) / math.sqrt(512)  # PyTorch default, 2^19 weights
    measurements = RuleMeasurements()
    path = _save(tmp_path, {"fc1.weight": weight})
    findings, _, _ = run_rules(
        load(path), Policy(), None, rules={RULE.name: RULE}, measurements=measurements
    )
    (finding,) = findings
    assert finding.evidence["spectrum_rows"] == 256
    assert "of 256 of its 1,024 rows" in finding.message
    spectrum = measurements.of("fc1")["untrained-layer.spectrum"]
    assert spectrum["rows_searched"] == 256
    assert spectrum["mp_edge"] == pytest.approx(mp_edge(1 / math.sqrt(512) / math.sqrt(3), 256, 512), rel=1e-5)
    assert spectrum["top_singular"] < spectrum["allowed"]


def test_real_untouched_pytorch_linear_is_too_small_to_claim(tmp_path: Path) -> None:
    fixture = TORCH_FIXTURES / "mlp_state_dict.pt"
    if not fixture.exists():
        pytest.skip(
            "fixtures/real/torch/mlp_state_dict.pt (a freshly constructed nn.Linear) is absent"
        )
    # An untouched torch.nn.Linear(8, 16) as PyTorch itself initialised it (128 weights, under
    # the default size floor, so the floor is lowered): it fits pytorch-default, but 128
    # weights cannot tell it from a trained layer, so it is a note, not a finding.
    policy = Policy(rules={RULE.name: {"min-weights": 128}})
    notes = RuleNotes()
    assert _run(fixture, policy, notes) == []
    assert any("net.0" in line for line in notes.lines(["net.0", "net.2"]))


# ---- significance: equivalence p-values, Bonferroni over candidates, Holm over layers -------


def test_equivalence_p_value_bounds_the_exact_kolmogorov_tail() -> None:
    scipy_stats = pytest.importorskip("scipy.stats")
    # reference: scipy.stats.kstwo (the exact distribution of the two-sided KS statistic for
    # n values, Simard & L'Ecuyer 2011) and kstwobign (Kolmogorov's limit law). The p-value
    # P(D_n >= δ − D) must never be below the exact tail (else the test would not hold its
    # level), and where it is small it is the asymptotic p-value.
    for n in (64, 256, 1024, 4096, 20000):
        for gap in np.linspace(0.2, 3.5, 12) / math.sqrt(n):
            ours = equivalence_p(0.1 - gap, n, 0.1)
            exact = float(scipy_stats.kstwo.sf(gap, n))
            assert ours >= exact * (1 - 1e-9)
            asymptotic = float(scipy_stats.kstwobign.sf(math.sqrt(n) * gap))
            if ours < 1e-3:
                assert ours == pytest.approx(asymptotic, rel=1e-3)
    assert equivalence_p(0.1, 500, 0.1) == 1.0
    assert equivalence_p(0.2, 500, 0.1) == 1.0


def _holm_adjusted(p_values: list[float]) -> list[float]:
    """Holm's adjusted p-values, p̃_(k) = max_{j<=k} min(1, (L − j + 1)·p_(j)) (Wright 1992,
    "Adjusted P-values for simultaneous inference", Biometrics 48): an independent form of
    Holm (1979); a hypothesis is rejected at α exactly when p̃ <= α."""
    order = sorted(range(len(p_values)), key=lambda i: p_values[i])
    out = [0.0] * len(p_values)
    running = 0.0
    for rank, index in enumerate(order):
        running = max(running, min(1.0, (len(p_values) - rank) * p_values[index]))
        out[index] = running
    return out


def test_holm_step_down_matches_the_adjusted_p_values() -> None:
    rng = np.random.default_rng(13)
    for _ in range(300):
        size = int(rng.integers(1, 12))
        p_values = list(10.0 ** rng.uniform(-6, 0, size))
        expected = [p <= 0.001 for p in _holm_adjusted(p_values)]
        assert holm(p_values, 0.001) == expected
    # step-down stops at the first failure even if a later p would pass its own level
    assert holm([1e-4, 6e-4, 6e-4], 0.001) == [True, False, False]
    assert holm([], 0.001) == []


def test_smallest_claimable_is_where_a_perfect_match_reaches_the_level() -> None:
    for layers, k in ((1, 14), (3, 14), (300, 23)):
        n = smallest_claimable(layers, k, 0.001, 0.1)
        assert k * equivalence_p(0.0, n, 0.1) <= 0.001 / layers
        assert k * equivalence_p(0.0, n - 1, 0.1) > 0.001 / layers


def test_scale_test_sees_a_wrong_scale_the_ks_distance_misses() -> None:
    scipy_stats = pytest.importorskip("scipy.stats")
    rng = np.random.default_rng(14)
    candidate = Candidate("n", "normal", 1.0)
    draws = [rng.normal(0.0, 1.0, 640) for _ in range(200)]
    # fresh draws: z is about standard normal (reference: the variance of a mean of n i.i.d.
    # squares is σ⁴(κ − 1)/n; for a normal the mean square is exactly χ²_n / n)
    zs = np.array([scale_z(np.sort(d), candidate) for d in draws])
    assert abs(zs.mean()) < 0.25 and 0.8 < zs.std() < 1.2
    # The limit 3.29 is the two-sided α = 0.001 normal quantile; for a normal candidate
    # n·mean(x²)/σ² is exactly χ²_n (reference: scipy.stats.chi2), and the true two-sided
    # level stays within 0.0010-0.0013 from 256 values on.
    for n in (256, 640, 4096, 20000):
        half = 3.29 * math.sqrt(2 / n)
        level = scipy_stats.chi2(n).sf(n * (1 + half)) + scipy_stats.chi2(n).cdf(n * (1 - half))
        assert 0.0009 < level < 0.0014
    # a normal 15 % too wide: the KS test at 640 values mostly misses it, the scale test not
    wide = [np.sort(d * 1.15) for d in draws]
    missed = np.mean([ks_distance(w, candidate.cdf) <= ks_limit(640, 0.02) for w in wide])
    caught = np.mean([abs(scale_z(w, candidate)) > 3.29 for w in wide])
    assert missed > 0.9 and caught > 0.95


UNTRAINED_FIXTURES = Path(__file__).resolve().parents[2] / "fixtures" / "real" / "untrained"


def _labels() -> dict[str, dict[str, dict[str, object]]]:
    import json

    return dict(json.loads((UNTRAINED_FIXTURES / "labels.json").read_text()))


@pytest.mark.parametrize("name", sorted(_labels()))
def test_small_real_layers_trained_by_torch_are_not_reported_and_fresh_ones_are(
    name: str,
) -> None:
    # Real torch checkpoints (fixtures/gen_untrained_calibration.py, torch 2.13): the trained
    # ones each have a layer of 320-640 weights that fitted some initializer within the KS
    # limit; the fresh ones are torch's default draw or Keras's he_normal / glorot_uniform.
    labels = _labels()[name]
    notes = RuleNotes()
    reported = {f.layer for f in _run(UNTRAINED_FIXTURES / name, notes=notes)}
    trained = {layer for layer, info in labels.items() if info["label"] == "trained"}
    assert not reported & trained
    if name.startswith("fresh-"):
        # Every fresh layer large enough to be claimed at all is reported.
        big = {layer for layer, info in labels.items() if int(str(info["weights"])) >= 1024}
        assert big and big <= reported


def test_a_match_among_many_tested_layers_needs_more_evidence(tmp_path: Path) -> None:
    rng = np.random.default_rng(15)
    fresh = rng.uniform(-1, 1, (32, 32)) / math.sqrt(32)  # PyTorch default, 1,024 weights
    alone = _run(_save(tmp_path, {"fc1.weight": fresh}))
    assert [f.layer for f in alone] == ["fc1"]
    p = float(alone[0].evidence["p_value"])
    assert alone[0].evidence["layers_tested"] == 1
    # Holm: among L tested layers the smallest p must be <= α/L. Add enough layers whose
    # units differ in norm (tested, never matched) to push α/L below this layer's p.
    extra = math.ceil(0.001 / p)
    tensors = {"fc1.weight": fresh}
    for i in range(extra):
        tensors[f"trained{i}.weight"] = rng.normal(0, 0.05, (64, 16)) * rng.lognormal(0, 0.5, (64, 1))
    crowded = tmp_path / "crowded"
    crowded.mkdir()
    notes = RuleNotes()
    assert _run(_save(crowded, tensors), notes=notes) == []
    assert any("fc1" in line and f"over {extra + 1} tested layers" in line for line in notes.lines(["fc1"]))


def test_findings_and_notes_do_not_depend_on_jobs(tmp_path: Path) -> None:
    rng = np.random.default_rng(16)
    tensors = {
        "a.weight": rng.uniform(-1, 1, (64, 128)) / math.sqrt(128),
        "b.weight": rng.normal(0, math.sqrt(2 / 64), (48, 64)),
        "c.weight": rng.uniform(-1, 1, (24, 24)) / math.sqrt(24),  # 576: a note at most
        "d.weight": rng.normal(0, 0.05, (64, 32)) * rng.lognormal(0, 0.5, (64, 1)),
    }
    path = _save(tmp_path, tensors)
    results = []
    for jobs in (1, 2, 4):
        notes = RuleNotes()
        findings, _, _ = run_rules(load(path), Policy(), None, rules={RULE.name: RULE}, jobs=jobs, notes=notes)
        results.append((findings, notes.lines(["a", "b", "c", "d"])))
    assert results[0] == results[1] == results[2]
    assert [f.layer for f in results[0][0]] == ["a", "b"]


def test_quartiles_are_numpys() -> None:
    # reference: numpy.quantile's default (linear, Hyndman & Fan type 7) method
    rng = np.random.default_rng(21)
    for size in (1, 2, 3, 4, 5, 64, 1023, 2816):
        values = rng.lognormal(0.0, 1.0, size)
        expected = np.quantile(values, [0.25, 0.5, 0.75])
        assert quartiles(values) == tuple(float(v) for v in expected)


@pytest.mark.parametrize("stream_bytes", [0, 2**30])
def test_row_subsamples_are_the_same_rows_however_the_layer_is_read(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, stream_bytes: int
) -> None:
    # stream_bytes 0: the layer is streamed in row blocks (of 3 rows of 40 float32 here), not
    # assembled; 2**30: read whole. Reference: the safetensors package's own reader.
    import ml_dtypes
    import safetensors.numpy

    from steelyard import streaming
    from steelyard.stats import LayerStats

    monkeypatch.setattr(streaming, "CHUNK_BYTES", 3 * 40 * 4)
    rng = np.random.default_rng(22)
    stored = {"wide.weight": rng.standard_normal((301, 40)).astype(ml_dtypes.bfloat16)}
    path = tmp_path / "m.safetensors"
    safetensors.numpy.save_file(stored, str(path))
    weights = safetensors.numpy.load_file(str(path))["wide.weight"].astype(np.float32)
    checkpoint = load(path)
    (layer,) = checkpoint.layers
    for start, step in ((0, 1), (0, 8), (5, 8), (2, 3), (6, 7)):
        stats = LayerStats(checkpoint, stream_bytes=stream_bytes)
        picked = stats.rows(layer, start, step)
        np.testing.assert_array_equal(picked, weights[start::step])
        # each row contiguous (BLAS reads a row-strided view at its leading dimension)
        assert picked.strides[1] == 4 and picked.dtype == np.float32
        assert not picked.flags.writeable or picked.flags["OWNDATA"]


def test_spectrum_stride_one_searches_every_row_as_before(tmp_path: Path) -> None:
    # A PyTorch-default draw with one learned direction of 1.5× the threshold (it moved the
    # weights by 1.5/32 ≈ 5 % in Frobenius norm): searched whole (spectrum-stride 1) the
    # direction shows, as it did before the subsample; on one row in 4 it cannot (the
    # documented price of the bounded search; measured 9 times in 10 at this size, so the
    # draw is fixed).
    rng = np.random.default_rng(24)
    bound = 1 / math.sqrt(1024)
    weight = rng.uniform(-bound, bound, (1024, 1024))
    u, v = rng.normal(size=1024), rng.normal(size=1024)
    theta = 1.5 * bound / math.sqrt(3) * 1024**0.5
    weight += theta * np.outer(u / np.linalg.norm(u), v / np.linalg.norm(v))
    path = _save(tmp_path, {"fc1.weight": weight})
    whole = Policy(rules={RULE.name: {"spectrum-stride": 1}})
    assert _run(path, whole) == []
    (finding,) = _run(path)
    assert finding.evidence["spectrum_rows"] == 256
