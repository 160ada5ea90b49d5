"""pipeline.judge.medians against numpy's median, the reference."""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from pipeline.judge.medians import median, median_side

# few distinct values near a band's edges, so that ties with the edges and between the two
# middle values are common; and arbitrary numbers, NaN and infinities among them
EDGY = st.sampled_from([0.0, -0.0, 0.5, -0.5, 1.0, -1.0, 1.5, -1.5, 2.0, -2.0, 1e-300, -1e-300])
VALUES = arrays(np.float64, st.integers(0, 41), elements=EDGY) | arrays(
    np.float64, st.integers(0, 41), elements=st.floats(allow_nan=True, allow_infinity=True)
)


def numpy_median(values: np.ndarray) -> float:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the mean of nothing warns; its NaN is the result
        return float(np.median(values))


def same(a: float, b: float) -> bool:
    return (math.isnan(a) and math.isnan(b)) or (a == b and math.copysign(1, a) == math.copysign(1, b))


@settings(max_examples=600, deadline=None)
@given(values=VALUES)
def test_the_median_is_numpys(values: np.ndarray) -> None:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ours = median(values)
    assert same(ours, numpy_median(values))


@settings(max_examples=600, deadline=None)
@given(values=VALUES, threshold=st.sampled_from([0.0, 0.5, 1.0, 1.5, 1e-300]) | st.floats(0.0, 1e300))
def test_the_side_of_the_band_is_the_one_numpys_median_falls_on(values: np.ndarray, threshold: float) -> None:
    m = numpy_median(values)
    expected = 0 if abs(m) <= threshold else (1 if m > 0 else -1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert median_side(values, threshold) == expected


def test_a_strided_view_is_measured_as_its_values() -> None:
    values = np.arange(100.0) - 60.0
    view = values[::3]
    assert median(view) == float(np.median(view))
    assert median_side(view, 5.0) == -1 and median_side(view + 70.0, 5.0) == 1


@pytest.mark.parametrize("n", [2047, 2048, 4001, 8192])
def test_long_runs_are_measured_as_numpy_measures_them(n: int) -> None:
    # as long as the samples a record's medians take: numpy partitions these another way
    # than the short arrays above (with vector instructions, where the machine has them)
    rng = np.random.default_rng(n)
    with_nan = rng.normal(size=n)
    with_nan[rng.integers(0, n, 3)] = np.nan
    for values in (
        rng.normal(size=n),
        rng.integers(-3, 4, n) * 0.5,  # few distinct values: ties at the middle
        np.where(rng.random(n) < 0.5, 0.0, -0.0),
        with_nan,
    ):
        assert same(median(values), numpy_median(values))
        assert same(median(values[::3]), numpy_median(values[::3]))
