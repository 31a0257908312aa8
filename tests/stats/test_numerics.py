"""Row and column sums of squares: the float32 fast paths against float64 references."""

from __future__ import annotations

import math

import numpy as np
import pytest
from threadpoolctl import threadpool_limits

from steelyard.stats.numerics import (
    ROW_DOT_WIDTH,
    distinct,
    median_of,
    quantile_of,
    sums_of_squares,
)


@pytest.mark.parametrize("width", [8, 64, ROW_DOT_WIDTH - 1, ROW_DOT_WIDTH, 512, 5632, 14336])
def test_row_sums_match_the_exact_sum_within_float32_rounding(width: int) -> None:
    rng = np.random.default_rng(width)
    block = (rng.standard_normal((40, width)) * rng.uniform(1e-3, 10, (40, 1))).astype(np.float32)
    got = sums_of_squares(block, axis=1)
    # reference: math.fsum, the correctly rounded sum of the float64 squares
    exact = np.array([math.fsum(float(x) ** 2 for x in row) for row in block])
    # a float32 sum of n positive terms is within n·eps32 of the truth (common practice, no
    # source: the textbook bound for recursive summation); both paths must also stay below it
    bound = width * np.finfo(np.float32).eps
    assert np.all(np.abs(got - exact) <= bound * exact)
    # and from 512 inputs the BLAS path is the closer one (3-6 x on these shapes; at 128 it
    # was the farther one for 8 of 200 seeds, so it is not asserted there)
    if width >= 512:
        plain = np.einsum("ij,ij->i", block, block).astype(np.float64)
        assert np.max(np.abs(got - exact) / exact) <= np.max(np.abs(plain - exact) / exact)


@pytest.mark.parametrize("width", [512, 20_000, 200_000])
def test_row_sums_do_not_depend_on_the_blas_thread_count(width: int) -> None:
    rng = np.random.default_rng(1)
    block = rng.standard_normal((3, width)).astype(np.float32)
    with threadpool_limits(1, user_api="blas"):
        one = sums_of_squares(block, axis=1)
    with threadpool_limits(4, user_api="blas"):
        four = sums_of_squares(block, axis=1)
    assert np.array_equal(one, four)


def test_column_sums_match_the_float64_sum() -> None:
    rng = np.random.default_rng(2)
    block = rng.standard_normal((300, 200)).astype(np.float32)
    # reference: numpy in float64
    expected = np.einsum("ij,ij->j", block.astype(np.float64), block.astype(np.float64))
    np.testing.assert_allclose(sums_of_squares(block, axis=0), expected, rtol=300 * 1.2e-7)


def test_strided_rows_give_the_contiguous_answer() -> None:
    rng = np.random.default_rng(4)
    block = rng.standard_normal((64, 1024)).astype(np.float32)
    np.testing.assert_array_equal(
        sums_of_squares(block[::2], axis=1), sums_of_squares(np.ascontiguousarray(block[::2]), axis=1)
    )


@pytest.mark.parametrize("dtype", [np.float16, np.float32, np.float64, np.int64])
def test_median_of_is_numpys_median_bit_for_bit(dtype: type) -> None:
    """``median_of`` against ``numpy.median`` (the reference it replaces): odd and even sizes,
    ties, a NaN among the values, several dtypes; the same float, sign included."""
    rng = np.random.default_rng(11)
    for trial in range(600):
        n = int(rng.integers(1, 400))
        values = (rng.standard_normal(n) * 10).astype(dtype)
        if trial % 3 == 0:
            values = np.round(values)  # many ties
        if trial % 5 == 0 and np.issubdtype(dtype, np.floating):
            values[rng.integers(0, n)] = np.nan
        expected = float(np.median(values))
        got = median_of(values)
        if np.isnan(expected):
            assert np.isnan(got)
        else:
            assert got == expected and np.signbit(got) == np.signbit(expected)


def test_median_of_flattens_and_takes_lists() -> None:
    """Like numpy.median without an axis: every value of an array, or of a list of floats."""
    assert median_of(np.array([[1, 5], [3, 4]], np.float32)) == 3.5
    assert median_of([0.25, 2.0, 1.0]) == 1.0
    assert np.isnan(median_of(np.zeros(0)))



def test_power_of_two_toward_one_and_exact_rescaling() -> None:
    """The factor is 1 inside [1/bound, bound] and for no usable peak, else the power of two
    putting the peak in [0.5, 1) (IEEE 754 scaling by 2^k is exact for normal results, so the
    float64 product then rounds to float32 without error)."""
    from steelyard.stats.numerics import power_of_two_toward_one, times_exactly

    for peak in (1.0, 2.0**32, 2.0**-32, 0.0, -5.0, math.inf, math.nan):
        assert power_of_two_toward_one(peak, 2.0**32) == 1.0
    for peak in (3.0e38, 2.0**33, 1.0e-40, 2.0**-33, 7.5e-45):
        factor = power_of_two_toward_one(peak, 2.0**32)
        assert 0.5 <= peak * factor < 1.0 and math.frexp(factor)[0] == 0.5
    tiny = np.array([1.0e-44, -3.0e-42, 7.0e-45], np.float32)  # subnormals
    factor = power_of_two_toward_one(float(np.abs(tiny).max()), 2.0**32)
    assert factor > float(np.finfo(np.float32).max)  # the factor itself is beyond float32
    scaled = times_exactly(tiny, factor)
    assert scaled.dtype == np.float32
    assert np.array_equal(scaled.astype(np.float64), tiny.astype(np.float64) * factor)


@pytest.mark.parametrize("dtype", [np.int64, np.int32, np.uint8, np.intp])
def test_distinct_is_numpys_unique(dtype: type) -> None:
    # Reference: numpy.unique (the sorted distinct values), on index arrays of every size
    # from empty to many repeats.
    rng = np.random.default_rng(11)
    for size in (0, 1, 2, 3, 17, 1000):
        for high in (1, 5, 200):
            values = rng.integers(0, high, size).astype(dtype)
            got = distinct(values)
            assert got.dtype == values.dtype
            np.testing.assert_array_equal(got, np.unique(values))
    two_d = rng.integers(0, 9, (6, 7))
    np.testing.assert_array_equal(distinct(two_d), np.unique(two_d))


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_quantile_of_is_numpys_quantile_bit_for_bit(dtype: type) -> None:
    # Reference: numpy.quantile, default (linear) method: the same value, dtype and type for
    # scalar and sequence q, with infinities and NaNs among the values.
    rng = np.random.default_rng(5)
    qs: list[float | list[float]] = [0.0, 0.1, 0.25, 0.5, 0.75, 0.999, 1.0, [0.25, 0.75],
                                     [1.0, 0.0, 0.5]]
    with np.errstate(invalid="ignore"):
        for size in (1, 2, 3, 10, 101, 4097):
            for trial in range(12):
                values = (rng.standard_normal(size) * rng.uniform(0.01, 100)).astype(dtype)
                if trial % 4 == 1:
                    values[rng.integers(0, size)] = np.inf
                if trial % 4 == 2:
                    values[rng.integers(0, size)] = -np.inf
                if trial % 6 == 3:
                    values[rng.integers(0, size)] = np.nan
                for q in [*qs, float(rng.uniform())]:
                    expected, got = np.quantile(values, q), quantile_of(values, q)
                    assert type(got) is type(expected)
                    assert np.asarray(got).dtype == np.asarray(expected).dtype
                    np.testing.assert_array_equal(got, expected)
