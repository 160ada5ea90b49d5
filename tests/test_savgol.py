"""pipeline.judge.savgol against SciPy's own Savitzky-Golay filter, the reference implementation."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from scipy.signal import savgol_coeffs as scipy_savgol_coeffs
from scipy.signal import savgol_filter

from pipeline.judge.savgol import savgol, savgol_coeffs


@settings(max_examples=200, deadline=None)
@given(
    data=st.data(),
    order=st.integers(0, 4),
    extra=st.integers(0, 20),
    deriv=st.integers(0, 2),
    delta=st.floats(0.01, 10.0),
)
def test_savgol_matches_scipy_savgol_filter_in_interp_mode(
    data: st.DataObject, order: int, extra: int, deriv: int, delta: float
) -> None:
    # Reference: scipy.signal.savgol_filter(..., mode="interp") (SciPy documentation)
    window = order + 1 + extra
    window += 1 - window % 2  # odd, and longer than the order
    n = data.draw(st.integers(window, window + 300))
    x = data.draw(arrays(np.float64, n, elements=st.floats(-1e3, 1e3)))
    ours = savgol(x, window, order, deriv=deriv, delta=delta)
    theirs = savgol_filter(x, window, order, deriv=deriv, delta=delta, mode="interp")
    scale = (1.0 + float(np.max(np.abs(x)))) / delta**deriv
    np.testing.assert_allclose(ours, theirs, rtol=1e-7, atol=1e-9 * scale)


def test_a_window_longer_than_the_data_is_refused_as_scipy_does() -> None:
    with pytest.raises(ValueError):
        savgol_filter(np.zeros(4), 5, 2, mode="interp")
    with pytest.raises(ValueError, match="longer than the data"):
        savgol(np.zeros(4), 5, 2)


def test_an_even_window_or_one_not_longer_than_the_order_is_refused() -> None:
    with pytest.raises(ValueError):
        savgol(np.zeros(10), 4, 2)
    with pytest.raises(ValueError):
        savgol(np.zeros(10), 3, 3)


def test_a_straight_line_is_kept_and_its_slope_found() -> None:
    # A least-squares polynomial of order >= 1 reproduces a line exactly (Savitzky & Golay 1964).
    q = np.linspace(0.0, 100.0, 1001)
    v = 3.4 - 0.002 * q
    np.testing.assert_allclose(savgol(v, 31, 3), v, atol=1e-12)
    np.testing.assert_allclose(savgol(v, 31, 3, deriv=1, delta=0.1), -0.002, atol=1e-12)


@settings(max_examples=300, deadline=None)
@given(
    data=st.data(),
    order=st.integers(0, 4),
    extra=st.integers(0, 40),
    deriv=st.integers(0, 5),
    delta=st.floats(0.001, 10.0),
)
def test_the_coefficients_are_scipys_savgol_coeffs(
    data: st.DataObject, order: int, extra: int, deriv: int, delta: float
) -> None:
    # Reference: scipy.signal.savgol_coeffs (SciPy documentation); the same least-squares
    # problem solved by the same LAPACK driver, so they agree to the last bits in practice
    window = order + 1 + extra
    pos = data.draw(st.none() | st.integers(0, window - 1))
    use = "conv" if pos is None else data.draw(st.sampled_from(["conv", "dot"]))
    ours = savgol_coeffs(window, order, deriv=deriv, delta=delta, pos=pos, use=use)
    theirs = scipy_savgol_coeffs(window, order, deriv=deriv, delta=delta, pos=pos, use=use)
    scale = float(np.max(np.abs(theirs))) if np.any(theirs) else 1.0
    np.testing.assert_allclose(ours, theirs, rtol=0, atol=1e-12 * scale)


def test_the_coefficients_refuse_what_scipy_refuses() -> None:
    for window, order, pos, use in ((3, 3, None, "conv"), (5, 2, 5, "conv"), (5, 2, -1, "dot"), (5, 2, 1, "x")):
        with pytest.raises(ValueError):
            scipy_savgol_coeffs(window, order, pos=pos, use=use)
        with pytest.raises(ValueError):
            savgol_coeffs(window, order, pos=pos, use=use)
