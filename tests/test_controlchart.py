"""The individuals control chart and its run rules, against the published rules and constants."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.stats
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.judge import controlchart
from pipeline.judge.controlchart import (
    D2_TWO,
    MEDIAN_MR_OF_NORMAL,
    centre_and_sigma,
    control_chart,
    run_rule_signals,
)


def _fired(values: list[float], rule: str) -> list[int]:
    return [s.index for s in run_rule_signals(np.array(values), 0.0, 1.0, (rule,))]


def test_d2_for_ranges_of_two_is_the_mean_range_of_two_normal_values() -> None:
    # Montgomery, table of control chart constants: d2 = 1.128 for n = 2; the mean of
    # |X1 - X2| for two standard normal values is 2/sqrt(pi) (scipy integrates it here)
    mean_range = scipy.stats.norm(scale=math.sqrt(2.0)).expect(abs)
    assert abs(D2_TWO - mean_range) < 5e-4
    # the median of |X1 - X2|: sqrt(2) times the normal's 75th percentile (scipy.stats.norm)
    assert math.isclose(MEDIAN_MR_OF_NORMAL, math.sqrt(2.0) * scipy.stats.norm.ppf(0.75), rel_tol=1e-12)


def test_classical_limits_are_the_mean_plus_minus_2_66_mean_moving_ranges() -> None:
    # Montgomery, Introduction to Statistical Quality Control, chart for individuals:
    # UCL = x-bar + 3 MR-bar / d2 = x-bar + 2.66 MR-bar, with MR-bar the mean of |x_i - x_i-1|
    x = [10.1, 9.8, 10.4, 10.0, 9.7, 10.3, 10.2, 9.9]
    mr_bar = np.mean(np.abs(np.diff(x)))
    chart = control_chart("grading_capacity_Ah", x, limits="classical")
    assert chart.centre == pytest.approx(np.mean(x))
    assert chart.upper == pytest.approx(np.mean(x) + 3 * mr_bar / 1.128)
    assert chart.upper - chart.centre == pytest.approx(2.66 * mr_bar, rel=1e-3)


def test_robust_limits_stand_still_when_a_few_cells_are_wild() -> None:
    rng = np.random.default_rng(4)
    x = rng.normal(20.0, 0.05, 200)
    calm = centre_and_sigma(x)
    x[[10, 50, 120]] = [15.0, 26.0, 14.0]
    wild = centre_and_sigma(x)
    assert wild[0] == pytest.approx(calm[0], abs=0.01) and wild[1] == pytest.approx(calm[1], rel=0.1)
    chart = control_chart("grading_capacity_Ah", list(x))
    assert {10, 50, 120} <= set(chart.flagged())


def test_western_electric_rule_1_one_point_beyond_three_sigma() -> None:
    # Western Electric 1956, rule 1
    assert _fired([0.0, 2.9, -3.1, 3.0, 0.0], "WE1") == [2]


def test_western_electric_rule_2_two_of_three_beyond_two_sigma_on_one_side() -> None:
    # Western Electric 1956, rule 2: two of three in a row beyond 2 sigma, same side
    assert _fired([0.0, 2.1, 0.5, 2.2, 0.0], "WE2") == [3]
    assert _fired([0.0, 2.1, -2.2, 0.0], "WE2") == []  # opposite sides
    assert _fired([2.1, 0.0, 0.0, 2.1], "WE2") == []  # four apart


def test_western_electric_rule_3_four_of_five_beyond_one_sigma_on_one_side() -> None:
    # Western Electric 1956, rule 3: four of five in a row beyond 1 sigma, same side
    assert _fired([-1.5, -1.2, 0.3, -1.1, -1.3, 0.0], "WE3") == [4]
    assert _fired([1.5, 1.2, 0.3, 0.0, 1.3, 1.4], "WE3") == []


def test_western_electric_rule_4_and_nelson_test_2_runs_on_one_side() -> None:
    # Western Electric 1956, rule 4 (eight); Nelson 1984, test 2 (nine)
    x = [0.1] * 9 + [-0.1]
    assert _fired(x, "WE4") == [7, 8] and _fired(x, "N2") == [8]
    assert _fired([0.1] * 7 + [0.0] + [0.1], "WE4") == []  # a point on the line breaks the run


def test_nelson_test_3_six_points_steadily_increasing_or_decreasing() -> None:
    # Nelson 1984, test 3: six points in a row steadily increasing or decreasing
    assert _fired([0.0, 0.1, 0.2, 0.3, 0.4, 0.5], "N3") == [5]
    assert _fired([0.0, 0.1, 0.2, 0.2, 0.3, 0.4, 0.5], "N3") == []  # a tie breaks the trend
    assert _fired([0.5, 0.4, 0.3, 0.2, 0.1, 0.0, -0.1], "N3") == [5, 6]


def test_a_missing_value_is_no_signal_and_breaks_a_run() -> None:
    x = [0.1] * 5 + [math.nan] + [0.1] * 5
    assert _fired(x, "WE4") == [] and _fired([math.nan, 5.0], "WE1") == [1]
    chart = control_chart("dcir_mOhm", [None, 1.0, None])
    assert chart.sigma is None and chart.signals == ()


def test_an_unknown_rule_is_refused() -> None:
    with pytest.raises(ValueError, match="unknown run rule 'WE9'"):
        run_rule_signals(np.zeros(3), 0.0, 1.0, ("WE9",))


def test_rule_1_false_alarms_on_an_in_control_line_are_the_normal_tail() -> None:
    """In control, WE1 fires on 2,699.8 ppm of points: the two-sided 3-sigma tail of the normal
    distribution (Western Electric 1956, Statistical Quality Control Handbook; scipy.stats.norm)."""
    rng = np.random.default_rng(1956)
    x = rng.normal(0.0, 1.0, 400_000)
    rate = len(run_rule_signals(x, 0.0, 1.0, ("WE1",))) / x.size
    expected = 2 * scipy.stats.norm.sf(3.0)
    assert rate == pytest.approx(expected, abs=4 * math.sqrt(expected / x.size))


@settings(max_examples=150, deadline=None)
@given(values=st.lists(st.floats(-1e3, 1e3) | st.just(math.nan), min_size=0, max_size=60),
       scale=st.floats(1e-3, 1e3), shift=st.floats(-1e3, 1e3))
def test_the_signals_do_not_change_with_the_metrics_unit_or_zero(values: list[float], scale: float,
                                                                   shift: float) -> None:
    """A chart of a*x + b (a > 0) signals at the same points as the chart of x: the rules
    depend on the values only through their order and their distance in sigmas."""
    x = np.array(values)
    base = control_chart("m", list(x))
    moved = control_chart("m", list(scale * x + shift))
    if base.sigma is None or moved.sigma is None:
        return
    z = (x - base.centre) / base.sigma
    near_edge = np.any(np.isfinite(z) & (np.abs(np.abs(z) - np.round(np.abs(z))) < 1e-6))
    if not near_edge:  # a point on a zone's edge may round either way
        assert base.flagged() == moved.flagged()


def test_the_doctests_hold() -> None:
    import doctest

    failures, tried = doctest.testmod(controlchart)
    assert tried > 0 and failures == 0
