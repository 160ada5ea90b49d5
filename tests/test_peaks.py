"""pipeline.judge.peaks against SciPy's find_peaks, the reference implementation."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.signal import find_peaks as scipy_find_peaks

from pipeline.judge.peaks import find_peaks

# few distinct levels, so that flat tops, equal neighbours and equal bases are common
LEVELS = st.lists(st.integers(0, 6).map(float), min_size=0, max_size=60)
CURVES = st.lists(st.floats(-1e3, 1e3, allow_nan=False), min_size=0, max_size=80)


@settings(max_examples=400, deadline=None)
@given(
    x=LEVELS | CURVES,
    prominence=st.floats(0.0, 8.0),
    wlen=st.none() | st.integers(2, 30) | st.floats(1.01, 30.0),
)
def test_the_peaks_are_scipys(x: list[float], prominence: float, wlen: float | None) -> None:
    # Reference: scipy.signal.find_peaks with prominence and wlen (SciPy documentation).
    # SciPy warns about peaks whose prominence is 0 within the window; the peaks are what count.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        theirs, _ = scipy_find_peaks(np.asarray(x, dtype=np.float64), prominence=prominence, wlen=wlen)
    ours = find_peaks(x, prominence_at_least=prominence, wlen=wlen)
    assert ours.tolist() == theirs.tolist()
    assert ours.dtype == np.int64


def test_a_flat_top_is_one_peak_at_its_middle_and_the_ends_are_never_peaks() -> None:
    assert find_peaks([5.0, 1.0, 3.0, 3.0, 3.0, 3.0, 1.0, 5.0], prominence_at_least=0.0).tolist() == [3]


def test_a_peak_is_measured_against_the_higher_of_its_bases_within_the_window() -> None:
    x = [0.0, 1.0, 0.5, 4.0, 0.0]
    # the peak at 1 rises 0.5 above its right base (0.5) and 1.0 above its left one (0.0)
    assert find_peaks(x, prominence_at_least=0.5).tolist() == [1, 3]
    assert find_peaks(x, prominence_at_least=0.6).tolist() == [3]
    # within 1 sample of the peak at 3 its bases are 0.5 and 0.0: prominence 3.5
    assert find_peaks(x, prominence_at_least=3.5, wlen=3).tolist() == [3]
    assert find_peaks(x, prominence_at_least=3.6, wlen=3).tolist() == []


def test_a_window_of_one_sample_or_less_and_a_curve_of_more_dimensions_are_refused() -> None:
    with pytest.raises(ValueError, match="wlen"):
        find_peaks([0.0, 1.0, 0.0], prominence_at_least=0.0, wlen=1)
    with pytest.raises(ValueError, match="one-dimensional"):
        find_peaks([[0.0, 1.0, 0.0]], prominence_at_least=0.0)
