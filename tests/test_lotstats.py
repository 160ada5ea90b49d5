"""Lot statistics: robust scale, percentiles, Cpk, robust screens, grades and tallies.

The statistics are checked against references outside formgate (SciPy, the standard
library's ``statistics``, published worked examples), each named beside its check; the
screens' properties hold for any lot (hypothesis); every measurement is also tried on
noisy data with wild values.
"""

from __future__ import annotations

import doctest
import importlib.util
import math
import random
import statistics
import types
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import pytest
import scipy.stats
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.acceptance.results import VerdictKind
from pipeline.judge import lotscreens, lotspread, lotstats
from pipeline.judge.lotscreens import RobustLimits, outliers, robust_limits
from pipeline.judge.lotspread import NORMAL_MAD_SCALE, PERCENTILES, capability, distribution
from pipeline.judge.lotstats import (
    CellRow,
    GradeClass,
    ScreenSpec,
    WindowSpec,
    check_grade_classes,
    grade_of,
    lot_statistics,
    tally,
)
from pipeline.model import SourceRef

REPO = Path(__file__).resolve().parent.parent

finite = st.floats(min_value=-1e3, max_value=1e3, allow_nan=False, allow_infinity=False)
maybe = st.one_of(st.none(), st.just(math.nan), finite)
bound = st.one_of(st.none(), finite)


def with_mean_and_sd(mean: float, sd: float, n: int = 25, seed: int = 1) -> np.ndarray:
    """Noisy normal values rescaled to have exactly this mean and sample standard deviation."""
    z = np.random.default_rng(seed).normal(size=n)
    z = (z - z.mean()) / z.std(ddof=1)
    values: np.ndarray = mean + sd * z
    return values


# -- distribution ---------------------------------------------------------------------------


def test_the_normal_consistency_constant_is_one_over_the_upper_quartile_of_the_normal() -> None:
    # 1/Φ⁻¹(3/4) = 1.4826: Rousseeuw & Croux (1993), "Alternatives to the median absolute
    # deviation", JASA 88(424), 1273-1283; Φ⁻¹ from scipy.stats.norm.ppf
    assert math.isclose(NORMAL_MAD_SCALE, 1.0 / scipy.stats.norm.ppf(0.75), rel_tol=1e-12)
    assert round(NORMAL_MAD_SCALE, 4) == 1.4826


@settings(max_examples=200, deadline=None)
@given(st.lists(finite, min_size=1, max_size=60))
def test_robust_sd_and_mad_equal_scipys_median_abs_deviation(values: list[float]) -> None:
    d = distribution(values)
    assert d is not None
    # SciPy documentation, scipy.stats.median_abs_deviation: scale=1.0 is the raw MAD,
    # scale="normal" divides by Φ⁻¹(3/4) (Rousseeuw & Croux 1993)
    assert d.mad == pytest.approx(scipy.stats.median_abs_deviation(values, scale=1.0), rel=1e-9, abs=1e-9)
    assert d.robust_sd == pytest.approx(
        scipy.stats.median_abs_deviation(values, scale="normal"), rel=1e-9, abs=1e-9
    )


@settings(max_examples=200, deadline=None)
@given(st.lists(finite, min_size=2, max_size=60))
def test_mean_median_sd_and_percentiles_agree_with_the_standard_library(values: list[float]) -> None:
    d = distribution(values)
    assert d is not None
    # Python standard library, statistics module: fmean, median, stdev (n - 1 divisor)
    assert d.mean == pytest.approx(statistics.fmean(values), rel=1e-9, abs=1e-9)
    assert d.median == pytest.approx(statistics.median(values), rel=1e-12, abs=1e-12)
    assert d.sd == pytest.approx(statistics.stdev(values), rel=1e-7, abs=1e-7)
    assert (d.minimum, d.maximum) == (min(values), max(values))
    # statistics.quantiles(method="inclusive") is Hyndman & Fan (1996), "Sample quantiles in
    # statistical packages", The American Statistician 50(4), definition 7, the linear
    # interpolation numpy uses by default
    cuts = statistics.quantiles(values, n=100, method="inclusive")
    for p in PERCENTILES:
        assert d.percentiles[p] == pytest.approx(cuts[p - 1], rel=1e-9, abs=1e-9)
        assert d.percentiles[p] == pytest.approx(float(np.percentile(values, p)), rel=1e-12, abs=1e-12)


def test_none_nan_and_infinite_values_are_checks_not_made_and_never_counted() -> None:
    d = distribution([1.0, None, math.nan, 3.0, math.inf, -math.inf])
    assert d is not None
    assert (d.n, d.mean, d.median, d.minimum, d.maximum) == (2, 2.0, 2.0, 1.0, 3.0)
    assert distribution([None, math.nan]) is None
    assert distribution([]) is None
    single = distribution([4.0])
    assert single is not None and single.sd is None and single.robust_sd == 0.0


def test_on_a_lot_with_wild_values_the_robust_scale_stays_near_sigma_while_sd_blows_up() -> None:
    rng = np.random.default_rng(20)
    clean = rng.normal(3.3, 0.01, size=1000)
    wild = np.concatenate([clean, [4.2, 0.0, 2.5, 3.9, 0.3, 4.1, 1.0, 3.7, 2.9, 0.1]])
    d_clean, d_wild = distribution(clean), distribution(wild)
    assert d_clean is not None and d_wild is not None
    # the MAD's breakdown point is 50 % (Rousseeuw & Croux 1993): ten bad values of a
    # thousand move it by about 1 %; the standard deviation has no such protection
    assert d_wild.robust_sd == pytest.approx(0.01, rel=0.1)
    assert d_wild.sd is not None and d_wild.sd > 10 * 0.01 and d_clean.sd == pytest.approx(0.01, rel=0.1)
    assert d_wild.median == pytest.approx(3.3, abs=0.002)


# -- capability -----------------------------------------------------------------------------


def test_cp_of_the_hard_bake_flow_width_example() -> None:
    # Montgomery, Introduction to Statistical Quality Control (6th ed., 2009), chapter on process
    # capability, hard-bake flow width: USL = 2.00, LSL = 1.00 microns, sigma-hat = 0.1398,
    # Cp = 1.192 (numbers from memory). The lot is rescaled to have exactly that sd.
    c = capability(with_mean_and_sd(1.5056, 0.1398), 1.00, 2.00)
    assert c.cp is not None and round(c.cp, 3) == 1.192


def test_one_sided_cpl_of_the_bottle_bursting_strength_example() -> None:
    # Montgomery, Introduction to Statistical Quality Control (6th ed., 2009), chapter on process
    # capability, glass bottle bursting strength: LSL = 200 psi, mean 264.06, s = 32.02,
    # Cpl = 0.67 (numbers from memory)
    c = capability(with_mean_and_sd(264.06, 32.02, n=100), 200.0, None)
    assert c.cpl is not None and round(c.cpl, 2) == 0.67
    assert (c.cp, c.cpu, c.cpk) == (None, None, c.cpl)


def test_hand_computed_capability() -> None:
    # values 9, 10, 11: mean 10, sample sd sqrt(((-1)² + 0² + 1²)/(3 - 1)) = 1.
    # window [7, 16]: Cp = (16 - 7)/(6·1) = 1.5, Cpu = (16 - 10)/(3·1) = 2, Cpl = (10 - 7)/(3·1) = 1,
    # Cpk = min(1, 2) = 1 (the classic definitions, Montgomery, Introduction to Statistical
    # Quality Control, chapter on process capability)
    c = capability([9.0, 10.0, None, 11.0, math.nan], 7.0, 16.0)
    assert (c.n, c.mean, c.sd) == (3, 10.0, 1.0)
    assert (c.cp, c.cpu, c.cpl, c.cpk, c.why) == (1.5, 2.0, 1.0, 1.0, "")
    upper_only = capability([9.0, 10.0, 11.0], None, 16.0)
    assert (upper_only.cp, upper_only.cpl, upper_only.cpu, upper_only.cpk) == (None, None, 2.0, 2.0)


def test_capability_that_cannot_be_computed_says_why() -> None:
    assert capability([5.0], 0.0, 10.0).why == "fewer than 2 values"
    assert capability([5.0, None, math.nan], 0.0, 10.0).cpk is None
    assert capability([5.0, 5.0, 5.0], 0.0, 10.0).why == "no spread"
    assert capability([0.1] * 7, 0.0, 10.0).cpk is None  # a mean rounded off 0.1 is still no spread
    assert capability([1.0, 2.0], None, None).why == "no limits"


def test_on_a_large_noisy_lot_cpl_matches_the_share_of_cells_below_the_limit() -> None:
    # for normal data the share below LSL is Φ(-3·Cpl) (Montgomery, Introduction to Statistical
    # Quality Control, chapter on process capability); Φ from scipy.stats.norm
    rng = np.random.default_rng(5)
    x = rng.normal(4.95, 0.02, size=400_000)
    low = 4.95 - 2.5 * 0.02
    c = capability(x, low, None)
    assert c.cpl is not None
    share = float(np.mean(x < low))
    assert share == pytest.approx(scipy.stats.norm.cdf(-3 * c.cpl), rel=0.05)


# -- robust limits and outliers -------------------------------------------------------------


@settings(max_examples=300, deadline=None)
@given(
    st.lists(maybe, max_size=50), bound, bound,
    st.floats(min_value=0.1, max_value=10), st.sampled_from(["both", "low", "high"]),
)
def test_robust_limits_never_widen_the_spec_window(
    values: list[float | None], spec_low: float | None, spec_high: float | None, k: float, sides: str
) -> None:
    r = robust_limits("m", values, k=k, min_cells=3, spec_low=spec_low, spec_high=spec_high,
                      sides=sides)
    if spec_low is not None:
        assert r.low is not None and r.low >= spec_low
    if spec_high is not None:
        assert r.high is not None and r.high <= spec_high
    if not r.applied:
        assert (r.low, r.high) == (spec_low, spec_high) and r.why
        assert outliers({f"c{i}": v for i, v in enumerate(values)}, r) == ()


def test_robust_limits_are_median_plus_minus_k_robust_sd_clipped_to_the_spec() -> None:
    values = with_mean_and_sd(5.0, 0.02, n=60)
    s = scipy.stats.median_abs_deviation(values, scale="normal")  # SciPy documentation
    m = float(np.median(values))
    r = robust_limits("cap", values, k=4, min_cells=30, spec_low=4.0, spec_high=5.05)
    assert r.applied and r.n == 60 and r.why == ""
    assert r.low == pytest.approx(m - 4 * s) and r.high == 5.05  # clipped: m + 4·s > 5.05
    low_only = robust_limits("cap", values, k=4, min_cells=30, spec_low=4.0, spec_high=5.05, sides="low")
    assert low_only.low == pytest.approx(m - 4 * s) and low_only.high == 5.05
    high_only = robust_limits("cap", values, k=4, min_cells=30, spec_low=None, spec_high=None, sides="high")
    assert high_only.low is None and high_only.high == pytest.approx(m + 4 * s)


def test_a_small_lot_or_one_with_no_spread_is_not_screened_and_says_why() -> None:
    small = robust_limits("cap", [1.0] * 5 + [2.0] * 7 + [None] * 40, k=6, min_cells=30,
                          spec_low=0.0, spec_high=3.0)
    assert not small.applied and small.why == "lot has 12 passing cells, the screen needs 30"
    assert robust_limits("cap", [1.0], k=6, min_cells=2, spec_low=None, spec_high=None).why == (
        "lot has 1 passing cell, the screen needs 2"
    )
    # more than half the values equal: MAD = 0, and a screen of zero width would flag them all
    flat = robust_limits("cap", [5.0] * 20 + [5.1, 4.9, 5.2], k=6, min_cells=10, spec_low=None, spec_high=None)
    assert not flat.applied and flat.why == "no spread among passing cells"
    assert (flat.median, flat.robust_sd) == (5.0, 0.0)
    assert outliers({"a": 5.2, "b": 9.0}, flat) == ()
    empty = robust_limits("cap", [], k=6, min_cells=1, spec_low=1.0, spec_high=2.0)
    assert (empty.applied, empty.median, empty.robust_sd, empty.low, empty.high) == (False, None, None, 1.0, 2.0)


@pytest.mark.parametrize(
    ("k", "min_cells", "sides", "message"),
    [(0.0, 5, "both", "k must be a positive number"), (math.nan, 5, "both", "k must be a positive number"),
     (3.0, 0, "both", "min_cells must be at least 1"), (3.0, 5, "up", "sides must be one of both, low, high")],
)
def test_a_screen_that_makes_no_sense_is_refused(k: float, min_cells: int, sides: str, message: str) -> None:
    with pytest.raises(ValueError, match=message):
        robust_limits("m", [1.0, 2.0], k=k, min_cells=min_cells, spec_low=None, spec_high=None,
                      sides=sides)


def limits_of(values: Sequence[float | None], k: float) -> RobustLimits:
    return robust_limits("m", values, k=k, min_cells=5, spec_low=None, spec_high=None)


lots = st.lists(maybe, min_size=5, max_size=60)


@settings(max_examples=200, deadline=None)
@given(lots, st.randoms(use_true_random=False), st.floats(min_value=0.5, max_value=8))
def test_a_shuffled_lot_gives_the_same_limits_and_outliers(
    values: list[float | None], rng: random.Random, k: float
) -> None:
    cells = {f"cell-{i:03d}": v for i, v in enumerate(values)}
    shuffled_ids = list(cells)
    rng.shuffle(shuffled_ids)
    shuffled = {i: cells[i] for i in shuffled_ids}
    first, second = limits_of(list(cells.values()), k), limits_of(list(shuffled.values()), k)
    assert first == second
    assert outliers(cells, first) == outliers(shuffled, second)


@settings(max_examples=200, deadline=None)
@given(lots, st.floats(min_value=0.5, max_value=8), st.floats(min_value=0.0, max_value=8))
def test_a_bigger_k_never_flags_more_cells(values: list[float | None], k: float, more: float) -> None:
    cells = {f"cell-{i:03d}": v for i, v in enumerate(values)}
    narrow = {o.cell_id for o in outliers(cells, limits_of(values, k))}
    wide = {o.cell_id for o in outliers(cells, limits_of(values, k + more))}
    assert wide <= narrow


def test_outliers_are_sorted_furthest_first_and_a_value_not_measured_is_never_one() -> None:
    limits = RobustLimits("cap", 3.0, 5, "both", 50, 5.0, 0.01, 4.97, 5.03, True)
    found = outliers({"a": 4.955, "b": 5.10, "c": None, "d": math.nan, "e": 5.0, "f": 4.88, "g": 5.04}, limits)
    assert [(o.cell_id, o.side) for o in found] == [("f", "low"), ("b", "high"), ("a", "low"), ("g", "high")]
    assert found[0].value == 4.88 and (found[0].low, found[0].high) == (4.97, 5.03)
    assert all(o.metric == "cap" for o in found)


# -- grades ---------------------------------------------------------------------------------

A = GradeClass("A", {"capacity_Ah": (5.00, 5.10), "dcir_mOhm": (None, 1.0)})
B = GradeClass("B", {"capacity_Ah": (4.95, 5.10)})
C = GradeClass("C", {})


def test_the_first_matching_grade_wins() -> None:
    assert grade_of({"capacity_Ah": 5.05, "dcir_mOhm": 0.8}, [A, B, C]) == "A"
    assert grade_of({"capacity_Ah": 5.05, "dcir_mOhm": 0.8}, [B, A, C]) == "B"
    assert grade_of({"capacity_Ah": 5.05, "dcir_mOhm": 1.2}, [A, B, C]) == "B"
    assert grade_of({"capacity_Ah": 4.00}, [A, B, C]) == "C"
    assert grade_of({"capacity_Ah": 4.00}, [A, B]) is None


def test_a_grades_low_bound_is_inclusive_and_its_high_bound_exclusive() -> None:
    assert grade_of({"capacity_Ah": 5.00, "dcir_mOhm": 0.5}, [A]) == "A"
    assert grade_of({"capacity_Ah": 5.10, "dcir_mOhm": 0.5}, [A]) is None
    assert grade_of({"capacity_Ah": 5.05, "dcir_mOhm": 1.0}, [A]) is None
    assert grade_of({"capacity_Ah": 5.05, "dcir_mOhm": 0.999}, [A]) == "A"


def test_a_metric_not_measured_keeps_a_cell_out_of_every_class_that_bounds_it() -> None:
    for missing in (None, math.nan):
        assert grade_of({"capacity_Ah": 5.05, "dcir_mOhm": missing}, [A, B]) == "B"
        assert grade_of({"capacity_Ah": missing, "dcir_mOhm": 0.5}, [A, B]) is None
    assert grade_of({}, [A, B]) is None


def test_grade_class_problems_are_listed_for_the_rule_loader() -> None:
    where = SourceRef("rules/demo.toml", 40)
    classes = [
        GradeClass("A", {"capacity_Ah": (5.1, 5.0)}, where),
        GradeClass(" ", {"capacity_Ah": (4.0, 4.0)}),
        GradeClass("A", {"dcir_mOhm": (math.nan, 1.0)}),
        GradeClass("B", {"capacity_Ah": (4.0, None)}),
    ]
    assert check_grade_classes(classes) == [
        "rules/demo.toml, line 40: grade class 'A': capacity_Ah low 5.1 is not below high 5.0",
        "grade class 2 has no name",
        "grade class 2: capacity_Ah low 4.0 is not below high 4.0",
        "grade class 'A': dcir_mOhm bounds must be finite numbers",
        "grade class 'A' is named 2 times",
    ]
    assert check_grade_classes([A, B, C]) == []


def test_a_grade_class_cannot_be_changed_after_it_is_made() -> None:
    bounds = {"capacity_Ah": (5.0, None)}
    grade = GradeClass("A", bounds)
    bounds["capacity_Ah"] = (0.0, None)
    assert grade.bounds["capacity_Ah"] == (5.0, None)
    with pytest.raises(TypeError):
        grade.bounds["x"] = (1.0, 2.0)  # type: ignore[index]


# -- tally ----------------------------------------------------------------------------------


def test_tally_counts_verdicts_in_order_and_gives_the_yield() -> None:
    t = tally(["pass", "fail", VerdictKind.PASS, "hold", "pass", "quarantined"])
    assert list(t.by_verdict.items()) == [("fail", 1), ("hold", 1), ("error", 0), ("pass", 3), ("quarantined", 1)]
    assert (t.n, t.passed, t.yield_fraction) == (6, 3, 0.5)
    empty = tally([])
    assert (empty.n, empty.passed, empty.yield_fraction) == (0, 0, None)


# -- the whole lot --------------------------------------------------------------------------


def noisy_lot(seed: int, cells: int = 200) -> list[CellRow]:
    """An invented lot: normal capacity, DCIR and k-value (voltage drop per day of ageing),
    a few values not measured and five failed cells with wild values."""
    rng = np.random.default_rng(seed)
    capacity = rng.normal(5.02, 0.015, cells)
    dcir = rng.normal(0.82, 0.03, cells)
    k_value = rng.normal(0.80, 0.05, cells)
    rows = []
    for i in range(cells):
        values: dict[str, float | None] = {
            "capacity_Ah": float(capacity[i]), "dcir_mOhm": float(dcir[i]), "k_value_mV_per_day": float(k_value[i]),
        }
        verdict = "pass"
        if i % 40 == 7:
            values["k_value_mV_per_day"] = None
        if i % 40 == 19:
            verdict, values["capacity_Ah"], values["k_value_mV_per_day"] = "fail", 4.1, 9.0
        rows.append(CellRow(f"NL-{seed:02d}-{i:04d}", verdict, values))
    return rows


CHECKS = [
    WindowSpec("capacity_Ah", 4.90, None, "reject", "capacity"),
    WindowSpec("dcir_mOhm", None, 1.10, "reject", "dcir"),
    WindowSpec("k_value_mV_per_day", 0.0, 2.0, "reject", "self_discharge"),
    WindowSpec("k_value_mV_per_day", None, 1.6, "review", "self_discharge_review"),
]
SCREEN = ScreenSpec("k_value_mV_per_day", 5.0, 100, "high")


def test_a_cell_that_loses_voltage_faster_than_its_lot_yet_inside_the_window_is_flagged() -> None:
    cells = noisy_lot(11)
    passing = [c.values["k_value_mV_per_day"] for c in cells if c.verdict == "pass"]
    m = float(np.nanmedian(np.array(passing, dtype=float)))
    s = scipy.stats.median_abs_deviation(np.array(passing, dtype=float), scale="normal", nan_policy="omit")
    slow = m + 6.0 * s  # inside both windows (below 1.6 mV/day), 6 robust sd above the median
    assert slow < 1.6
    cells[3] = CellRow(cells[3].cell_id, "pass", {**cells[3].values, "k_value_mV_per_day": slow})
    stats = lot_statistics(cells, CHECKS, [SCREEN], [])
    (limits,) = stats.limits
    assert limits.applied and limits.n == 195 - 5  # 5 failed, 5 not measured
    assert limits.high is not None and limits.high < slow
    assert [(o.cell_id, o.side) for o in stats.outliers] == [(cells[3].cell_id, "high")]


@pytest.mark.parametrize("seed", range(20))
def test_a_normal_lot_of_200_cells_has_no_outlier_at_k_5(seed: int) -> None:
    # a normal cell lies more than 5 sd above the mean with probability 2.9e-7
    # (scipy.stats.norm.sf(5)), so 200 cells give a false alarm about once in 17,000 lots
    assert 200 * scipy.stats.norm.sf(5.0) < 1e-4
    stats = lot_statistics(noisy_lot(seed), CHECKS, [SCREEN], [])
    assert stats.limits[0].applied
    assert stats.outliers == ()


def test_lot_statistics_tallies_describes_and_grades_the_passing_cells() -> None:
    cells = noisy_lot(3)
    grades = [
        GradeClass("A", {"capacity_Ah": (5.02, None)}),
        GradeClass("B", {"capacity_Ah": (4.99, 5.02)}),
        GradeClass("C", {}),
    ]
    stats = lot_statistics(cells, CHECKS, [SCREEN], grades)
    assert stats.tally.n == 200 and stats.tally.by_verdict["fail"] == 5 and stats.tally.yield_fraction == 0.975
    assert list(stats.distributions) == ["capacity_Ah", "dcir_mOhm", "k_value_mV_per_day"]
    k_values = [c.values["k_value_mV_per_day"] for c in cells]
    expected = distribution(k_values)
    assert stats.distributions["k_value_mV_per_day"] == expected and expected is not None
    assert expected.n == 195  # the 5 values not measured are not counted; failed cells are
    assert list(stats.capabilities) == ["capacity", "dcir", "self_discharge", "self_discharge_review"]
    assert stats.capabilities["dcir"] == capability([c.values["dcir_mOhm"] for c in cells], None, 1.10)
    # passing cells only are graded, each by grade_of
    passing = [c for c in cells if c.verdict == "pass"]
    assert dict(stats.grades) == {c.cell_id: grade_of(c.values, grades) for c in passing}
    assert sum(stats.grade_counts.values()) + stats.ungraded == len(passing) == 195
    assert stats.ungraded == 0 and list(stats.grade_counts) == ["A", "B", "C"]


def test_a_metric_no_cell_has_is_described_as_nothing_and_its_capability_says_why() -> None:
    cells = [CellRow("x1", VerdictKind.PASS, {"capacity_Ah": 5.0}), CellRow("x2", "hold", {"capacity_Ah": None})]
    stats = lot_statistics(cells, [WindowSpec("ocv_V", 3.2, 3.4)], [ScreenSpec("ocv_V", 3.0, 1)], [])
    assert stats.distributions["ocv_V"] is None
    assert stats.capabilities["ocv_V"].why == "fewer than 2 values"
    assert stats.limits[0].why == "lot has 0 passing cells, the screen needs 1"
    assert stats.tally.passed == 1 and stats.tally.by_verdict["hold"] == 1
    empty = lot_statistics([], [], [], [])
    assert empty.tally.n == 0 and empty.grades == {} and empty.outliers == ()


def test_lot_statistics_refuses_two_checks_of_one_name_a_bad_screen_and_a_value_not_a_number() -> None:
    with pytest.raises(ValueError, match="more than one window check is named 'cap'"):
        lot_statistics([], [WindowSpec("cap", 1.0, 2.0), WindowSpec("cap", None, 3.0)], [], [])
    with pytest.raises(ValueError, match="k must be a positive number"):
        lot_statistics([], [], [ScreenSpec("cap", -1.0, 5)], [])
    text: dict[str, object] = {"cap": "5,1", "ocv": 3.3}
    cells = [CellRow("x1", "pass", {"cap": 5.0, "ocv": 3.3}), CellRow("x2", "pass", text)]  # type: ignore[arg-type]
    with pytest.raises(ValueError, match=r"cell x2: cap = '5,1' is not a number"):
        lot_statistics(cells, [], [], [])


values_row = st.fixed_dictionaries({}, optional={"a": maybe, "b": maybe})
cell_rows = st.lists(st.tuples(st.sampled_from(["pass", "pass", "fail", "hold"]), values_row), max_size=40)
grade_lists = st.lists(
    st.builds(GradeClass, st.sampled_from(["P", "Q", "R"]),
              st.fixed_dictionaries({}, optional={"a": st.tuples(bound, bound), "b": st.tuples(bound, bound)})),
    max_size=4,
)


@settings(max_examples=200, deadline=None)
@given(cell_rows, grade_lists, st.floats(min_value=0.5, max_value=6), bound, bound)
def test_the_whole_lot_agrees_with_the_functions_for_one_metric(
    rows: list[tuple[str, dict[str, float | None]]], grades: list[GradeClass], k: float,
    low: float | None, high: float | None,
) -> None:
    cells = [CellRow(f"c{i:02d}", verdict, values) for i, (verdict, values) in enumerate(rows)]
    stats = lot_statistics(cells, [WindowSpec("a", low, high)], [ScreenSpec("a", k, 3)], grades)
    passing = {c.cell_id: c.values.get("a") for c in cells if c.verdict == "pass"}
    limits = robust_limits("a", list(passing.values()), k=k, min_cells=3, spec_low=low, spec_high=high)
    assert stats.limits == (limits,)
    assert stats.outliers == outliers(passing, limits)
    assert stats.grades == {c.cell_id: grade_of(c.values, grades) for c in cells if c.verdict == "pass"}
    assert stats.distributions.get("a") == distribution([c.values.get("a") for c in cells])
    assert stats.capabilities["a"] == capability([c.values.get("a") for c in cells], low, high)


@pytest.mark.parametrize("module", [lotspread, lotscreens, lotstats], ids=lambda m: m.__name__)
def test_the_docstring_examples_hold(module: types.ModuleType) -> None:
    failures, tried = doctest.testmod(module, optionflags=doctest.ELLIPSIS)
    assert tried > 3 and failures == 0


def test_the_benchmark_runs_on_a_tiny_lot(capsys: pytest.CaptureFixture[str]) -> None:
    spec = importlib.util.spec_from_file_location("lot_statistics_benchmark", REPO / "benchmarks" / "lot_statistics.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    assert module.main(["--cells", "40", "80", "--repeats", "1"]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[1].split()[0] == "cells" and [line.split()[0] for line in lines[3:]] == ["40", "80"]
