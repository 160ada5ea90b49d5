"""Each metric's expanded uncertainty, the accuracy class it starts from, and the decision
rules that use it near a limit.

Outside checks: the worst-case false acceptance of each decision rule against scipy's
normal distribution (JCGM 106:2012 9.3, specific risk at the edge of the acceptance
zone); the correlations of the law of propagation (JCGM 100:2008 5.2: a gain common to
two charges of one channel cancels in their ratio, an offset does not).
"""

from __future__ import annotations

import dataclasses
import datetime
import functools
import math
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy import stats

from pipeline.acceptance.results import CellResult, Outcome, VerdictKind
from pipeline.acceptance.rules import GUARDED_ACCEPTANCE, GUARDED_REJECTION, SIMPLE, RuleSet, Window
from pipeline.demo.lots import ALL_DEMO_CELLS, demo_file_bytes
from pipeline.judge.uncertainty import budgets, channel_u, range_up
from pipeline.model import DEFAULT_ACCURACY, AccuracyClass, Trace
from pipeline.read.cyclefile import read_cycle_file
from pipeline.read.profile import load_profile
from pipeline.report.result import to_document
from pipeline.rulebook.book import RuleBook, load_rules_dir
from pipeline.rulebook.schema import worst_false_acceptance
from pipeline.runner import judge, judge_trace
from pipeline.shipped import RULES_DIR
from pipeline.station.worker import Task, judge_task

AT = datetime.datetime(2026, 3, 2, 12, 0, tzinfo=datetime.UTC)


@functools.cache
def shipped() -> RuleBook:
    return load_rules_dir(RULES_DIR)


@functools.cache
def first_passed() -> tuple[str, bytes, CellResult]:
    for cell in ALL_DEMO_CELLS:
        data = demo_file_bytes(cell)
        result = judge(data, f"{cell.cell_id}.csv", shipped(), analysed_at=AT)
        if result.verdict.kind is VerdictKind.PASS:
            return cell.cell_id, data, result
    raise AssertionError("the demo has a passed cell")


def with_rule(rule_set: RuleSet, rule_id: str, **changes: Any) -> RuleBook:
    rules = tuple(
        dataclasses.replace(r, **changes) if r.id == rule_id else r for r in rule_set.rules
    )
    return RuleBook((dataclasses.replace(rule_set, rules=rules),))


def capacity_rule(result: CellResult) -> str:
    return next(c.rule_id for c in result.verdict.checks if c.metric == "grading_capacity_Ah"
                and c.severity.value == "reject")


def rule_set_of(result: CellResult) -> RuleSet:
    return next(rs for rs in shipped().rule_sets if rs.sha256 == result.rule_set.sha256)


def test_every_measured_metric_but_the_counts_has_an_uncertainty_in_the_result() -> None:
    _, _, result = first_passed()
    doc = to_document(result)
    measured = {k for k, v in doc["metrics"].items() if v is not None}
    with_u = {k for k, v in doc["metrics_U"].items() if v is not None}
    assert with_u == measured - {"cycle_count", "plateau_count"}
    assert all(v > 0 for v in doc["metrics_U"].values() if v is not None)
    assert doc["accuracy"]["source"].startswith(DEFAULT_ACCURACY.source)
    for check in doc["checks"]:
        assert check["U"] == doc["metrics_U"][check["metric"]]
        assert check["decision"] == SIMPLE and check["too_close"] is False


def test_a_value_just_inside_a_limit_is_held_under_guarded_acceptance_and_passed_under_simple() -> None:
    cell_id, data, result = first_passed()
    rule_id = capacity_rule(result)
    value = result.metrics.values["grading_capacity_Ah"]
    u = result.metrics.uncertainty["grading_capacity_Ah"]
    assert value is not None and u > 0
    rule_set = rule_set_of(result)
    window = Window(value - u / 2, None)
    simple = judge(data, f"{cell_id}.csv", with_rule(rule_set, rule_id, window=window),
                   analysed_at=AT)
    assert simple.verdict.kind is VerdictKind.PASS
    # guarded acceptance: the acceptance zone is the window shrunk by U, so a value inside the
    # limit by less than U is not shown to conform (ILAC-G8:09/2019, Guidelines on Decision
    # Rules and Statements of Conformity; ISO 14253-1:2017, Decision rules for verifying
    # conformity or nonconformity with specifications; JCGM 106:2012, The role of
    # measurement uncertainty in conformity assessment, clause 8.3)
    guarded = judge(
        data, f"{cell_id}.csv",
        with_rule(rule_set, rule_id, window=window, decision=GUARDED_ACCEPTANCE),
        analysed_at=AT,
    )
    assert guarded.verdict.kind is VerdictKind.HOLD
    (check,) = [c for c in guarded.verdict.checks if c.rule_id == rule_id]
    assert check.too_close and check.outcome is Outcome.NOT_JUDGED
    assert check.decision == GUARDED_ACCEPTANCE
    assert "too close to the limit to decide" in check.message and "±" in check.message
    assert "against ≥" in check.message
    assert guarded.verdict.hazards == ()  # held for a person, not failed
    # the hold letter names the finding the way the certificate does
    from pipeline.mail.letters import hold_letter

    letter = hold_letter(guarded, "c.pdf", ("quality@example.com",), station="line-1")
    assert "too close to the limit" in letter.subject and "±" in letter.subject
    assert "too close to the limit to decide, guarded acceptance" in " ".join(letter.body_text.split())
    # the set's own default reaches the checks that name none
    set_wide = RuleBook((dataclasses.replace(
        with_rule(rule_set, rule_id, window=window).rule_sets[0], decision=GUARDED_ACCEPTANCE
    ),))
    assert judge(data, f"{cell_id}.csv", set_wide, analysed_at=AT).verdict.kind is VerdictKind.HOLD


def test_a_value_just_outside_a_limit_fails_simply_and_passes_under_guarded_rejection() -> None:
    cell_id, data, result = first_passed()
    rule_id = capacity_rule(result)
    value = result.metrics.values["grading_capacity_Ah"]
    u = result.metrics.uncertainty["grading_capacity_Ah"]
    assert value is not None
    rule_set = rule_set_of(result)
    window = Window(value + u / 2, None)
    simple = judge(data, f"{cell_id}.csv", with_rule(rule_set, rule_id, window=window),
                   analysed_at=AT)
    assert simple.verdict.kind is VerdictKind.FAIL
    assert "±" in simple.verdict.reasons[0]
    # guarded rejection: the rejection zone is the outside of the window widened by U, so a
    # value outside the limit by less than U is not shown not to conform, and is accepted
    # (ILAC-G8:09/2019; ISO 14253-1:2017; JCGM 106:2012 clause 8.3, as above)
    lenient = judge(
        data, f"{cell_id}.csv",
        with_rule(rule_set, rule_id, window=window, decision=GUARDED_REJECTION),
        analysed_at=AT,
    )
    assert lenient.verdict.kind is VerdictKind.PASS
    (check,) = [c for c in lenient.verdict.checks if c.rule_id == rule_id]
    assert check.outcome is Outcome.IN_WINDOW and "by less than its uncertainty" in check.message
    # out by more than U: rejected under every rule
    far = Window(value + 3 * u, None)
    for decision in (SIMPLE, GUARDED_ACCEPTANCE, GUARDED_REJECTION):
        book = with_rule(rule_set, rule_id, window=far, decision=decision)
        assert judge(data, f"{cell_id}.csv", book, analysed_at=AT).verdict.kind is VerdictKind.FAIL


def test_the_documented_false_acceptance_of_each_rule_is_the_normal_distributions() -> None:
    # JCGM 106:2012 9.3: at the edge of the acceptance zone, a value guarded by U = 2u is
    # outside the window with probability 1 - Phi(2); one accepted at the limit, 1/2.
    assert worst_false_acceptance(SIMPLE) == pytest.approx(0.5)
    assert worst_false_acceptance(GUARDED_ACCEPTANCE) == pytest.approx(stats.norm.sf(2.0))
    assert worst_false_acceptance(GUARDED_REJECTION) == pytest.approx(stats.norm.cdf(2.0))
    docs = (Path(__file__).resolve().parent.parent / "docs" / "rules.md").read_text("utf-8")
    assert "| `guarded acceptance` |" in docs and f"{100 * stats.norm.sf(2.0):.1f} %" in docs


def test_a_gain_cancels_in_an_efficiency_and_an_offset_does_not() -> None:
    # JCGM 100:2008 5.2.2: fully correlated inputs (one channel's gain in both charges of a
    # ratio) cancel; the offset adds to one charge and takes from the other.
    cell_id, data, result = first_passed()
    trace = read_cycle_file(data, f"{cell_id}.csv")
    gains_only = AccuracyClass(current_pct_of_reading=1.0, current_pct_of_range=0.0,
                               current_range_a=50.0)
    offset_only = AccuracyClass(current_pct_of_reading=0.0, current_pct_of_range=0.1,
                                current_range_a=50.0)
    rule_set = rule_set_of(result)
    book = RuleBook((dataclasses.replace(rule_set, zero_offset="as recorded"),))
    by_gain = judge_trace(trace, "x.csv", book, analysed_at=AT, input_sha256="0" * 64,
                          accuracy=gains_only).metrics.uncertainty
    by_offset = judge_trace(trace, "x.csv", book, analysed_at=AT, input_sha256="0" * 64,
                            accuracy=offset_only).metrics.uncertainty
    capacity = result.metrics.values["grading_capacity_Ah"]
    assert capacity is not None
    # a 1 % gain (rectangular, u = 1 % / sqrt 3) moves the capacity by its share ...
    assert by_gain["grading_capacity_Ah"] > 0.99 * 2 * capacity * 0.01 / math.sqrt(3)
    # ... and the efficiency only by noise and switches, far less than the gain's share
    assert by_gain["grading_coulombic_efficiency"] < 0.1 * 2 * 0.01 / math.sqrt(3)
    assert by_offset["grading_coulombic_efficiency"] > 5 * by_gain["grading_coulombic_efficiency"]


def test_the_channel_range_is_the_declared_one_or_the_1_2_5_step_above_the_largest_current() -> None:
    assert [range_up(a) for a in (0.9, 1.0, 1.3, 4.99, 20.0, 21.0, 60.0)] == [
        1.0, 1.0, 2.0, 5.0, 20.0, 50.0, 100.0
    ]
    cell_id, data, result = first_passed()
    trace = read_cycle_file(data, f"{cell_id}.csv")
    largest = float(np.max(np.abs(trace.current_a)))
    assert result.accuracy is not None
    assert result.accuracy.current_range_a == range_up(largest) >= largest
    assert result.accuracy.source.endswith("range from the record")
    rule_set = rule_set_of(result)
    from pipeline.judge.segmentation import split_steps

    segmentation = split_steps(trace, 0.04, 20.0)
    declared = channel_u(trace, segmentation, AccuracyClass(current_range_a=200.0), None)
    assert declared.range_a == 200.0
    assert declared.offset_i == pytest.approx(0.0002 * 200.0 / math.sqrt(3))
    assert budgets(trace, segmentation, result.metrics, DEFAULT_ACCURACY, None, rule_set.plateau)


def test_a_profile_and_a_station_task_declare_the_class_of_their_channels(tmp_path: Path) -> None:
    cell_id, data, _ = first_passed()
    profile = load_profile("[accuracy]\nvoltage_mV = 0.25\ncurrent_range_A = 100\n", "hall.toml")
    via_profile = judge(data, f"{cell_id}.csv", shipped(), analysed_at=AT, profile=profile)
    assert via_profile.accuracy is not None
    assert (via_profile.accuracy.voltage_mv, via_profile.accuracy.current_range_a) == (0.25, 100.0)
    assert via_profile.accuracy.source == "import profile hall.toml"
    # a station's class for the inbox wins over the profile's
    from pipeline.model import ChannelClasses

    mine = AccuracyClass(voltage_mv=3.0, current_range_a=60.0, source="station.toml [accuracy.a]")
    work = tmp_path / f"{cell_id}.csv"
    work.write_bytes(data)
    import hashlib

    task = Task(1, str(work), work.name, hashlib.sha256(data).hexdigest(), shipped(), AT,
                accuracy=ChannelClasses((("*", mine),), mine))
    got = judge_task(task)
    assert isinstance(got, CellResult) and got.accuracy == mine
    assert got.metrics.uncertainty["main_plateau_voltage_V"] > via_profile.metrics.uncertainty[
        "main_plateau_voltage_V"]


@functools.cache
def as_recorded_case() -> tuple[str, Trace, RuleBook, float, CellResult]:
    cell_id, data, result = first_passed()
    trace = read_cycle_file(data, f"{cell_id}.csv")
    book = RuleBook((dataclasses.replace(rule_set_of(result), zero_offset="as recorded"),))
    base = judge_trace(trace, "x.csv", book, analysed_at=AT, input_sha256="0" * 64)
    assert base.accuracy is not None and base.accuracy.current_range_a is not None
    half_width = base.accuracy.current_pct_of_range / 100 * base.accuracy.current_range_a
    return cell_id, trace, book, half_width, base


def _distance(value: float, low: float | None, high: float | None) -> float:
    return min(abs(value - b) for b in (low, high) if b is not None)


@settings(max_examples=20, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(fraction=st.floats(-1.0, 1.0))
def test_an_offset_within_the_class_never_moves_a_verdict_more_than_u_from_its_limits(
    fraction: float,
) -> None:
    """Adding any zero offset within the accuracy class to the current changes a check's
    outcome only where the value lies within its U of a limit."""
    _, trace, book, half_width, base = as_recorded_case()
    shifted = dataclasses.replace(trace, current_a=np.asarray(trace.current_a) + fraction * half_width)
    moved = judge_trace(shifted, "x.csv", book, analysed_at=AT, input_sha256="0" * 64)
    for before, after in zip(base.verdict.checks, moved.verdict.checks, strict=True):
        assert before.rule_id == after.rule_id
        if before.outcome is after.outcome or before.value is None:
            continue
        assert before.uncertainty is not None
        distance = _distance(before.value, before.window.low, before.window.high)
        assert distance <= before.uncertainty, (before.rule_id, before.value, distance)
    for name, value in base.metrics.values.items():
        other = moved.metrics.values[name]
        u = base.metrics.uncertainty.get(name)
        if value is not None and other is not None and u is not None:
            assert abs(other - value) <= u, name  # the offset's effect is inside U


def test_a_regrade_judges_again_with_the_class_the_record_was_judged_with() -> None:
    from pipeline.regrade.rules_bundle import setting_digest
    from pipeline.report.result import accuracy_of, to_json

    cell_id, data, result = first_passed()
    assert accuracy_of(to_json(result)) == result.accuracy
    again = judge(data, f"{cell_id}.csv", shipped(), analysed_at=AT,
                  accuracy=accuracy_of(to_json(result)))
    assert to_json(again) == to_json(result)  # the same document: only rules may change it
    assert accuracy_of(None) is None
    # the regrade's cache tells results of two classes apart
    digests = {setting_digest("a.csv", None, None, 1, None, a)
               for a in (None, DEFAULT_ACCURACY, AccuracyClass(voltage_mv=2.0))}
    assert len(digests) == 3


def test_the_k_value_carries_the_resolution_of_its_two_readings_over_the_days_between() -> None:
    # JCGM 100:2008 F.2.2.1: a reading written to a resolution delta carries delta / sqrt(12);
    # the meter's gain and offset cancel in the difference of its two readings (5.2.2).
    from datetime import timedelta

    from pipeline.judge.aging import K_VALUE, aging_uncertainty, aging_values
    from pipeline.read.readings import Reading

    start = datetime.datetime(2026, 3, 2, 8, tzinfo=datetime.UTC)
    readings = [
        Reading("C1", "L1", None, start, 3.6512, None, None, line=2),
        Reading("C1", "L1", None, start + timedelta(days=7), 3.6470, None, None, line=3),
    ]
    rule_set = shipped().rule_sets[0]
    values, k, _ = aging_values(readings, rule_set)
    found = aging_uncertainty(readings, values, k)
    assert found[K_VALUE] == pytest.approx(2 * math.sqrt(2) * 0.1 / math.sqrt(12) / 7)
    assert found["aging_ocv_V"] > 2 * 0.001 / math.sqrt(3)  # at least the class's offset
    assert "aging_acir_mOhm" not in found


def _sloped_curve_metrics(slope_mv_per_pct: float):  # -> CellMetrics
    """A grading discharge of our own: V falls by ``slope_mv_per_pct`` every 1 % of capacity,
    no plateau found on it."""
    from pipeline.model import CellMetrics, Curve

    q = np.linspace(0.0, 100.0, 1001)
    curve = Curve(q, 3.9 - slope_mv_per_pct / 1000.0 * q)
    return CellMetrics({"total_plateau_length_pct": 0.0, "plateau_count": 0.0}, (), (), (),
                       grading_curve=curve)


def test_a_total_plateau_length_of_0_is_exact_only_where_noise_cannot_make_a_plateau() -> None:
    from pipeline.judge.uncertainty import _plateau_lengths
    from pipeline.model import PlateauSettings

    settings = PlateauSettings(flatness_mv_per_pct=2.0)

    def total_u(slope: float, noise_v: float) -> float:
        found = _plateau_lengths(_sloped_curve_metrics(slope), settings, noise_v, 2160,
                                 lambda name: 0.0)
        return found["total_plateau_length_pct"].expanded

    # 3 mV/% against a 2 mV/% threshold: 1 mV/% is some 6 standard deviations of the slope
    # under 0.5 mV of noise at two rows per grid cell, so no plateau can appear: exact
    assert total_u(3.0, 5e-4) == 0.0
    # 2.1 mV/% lies within two standard deviations of it over the whole discharge: a plateau
    # of any length up to 100 % may appear, a rectangular distribution (JCGM 100:2008 4.3.7)
    assert total_u(2.1, 5e-4) == pytest.approx(2 * 100.0 / math.sqrt(12), rel=0.01)
    # and a noisier channel makes the same 3 mV/% doubtful
    assert total_u(3.0, 5e-3) > 0


def test_the_plateau_length_counts_where_voltage_noise_moves_its_ends() -> None:
    """The LFP reference cell (PyBaMM SPMe, tests/reference/README.md) through the project's
    channel model: the ends' term grows with the voltage noise, the grid's does not; and the
    NMC cell's total of 0 (its curve slopes throughout) is exact in the result."""
    import tests.test_uncertainty_mc as mc
    from pipeline.demo.channel import Channel, add_channel_errors
    from tests.reference.lot import load_cell

    def judged(name: str, noise_v: float) -> CellResult:
        true = load_cell(name, 5.0)
        channel = Channel(2.5 * float(true.truth["nominal_capacity_Ah"]),
                          current_noise_fraction=2e-4, offset_fraction=0.0, voltage_noise_v=noise_v)
        volts, amps, temps = add_channel_errors(true.voltage_v, true.current_a,
                                                true.temperature_c, true.step, channel,
                                                np.random.default_rng(4))
        trace = Trace(f"{name}.csv", dict(true.metadata), true.time_s, volts, amps, temps)
        return judge_trace(trace, f"{name}.csv", mc.rulebook("corrected"), analysed_at=AT,
                           input_sha256="0" * 64)

    quiet, noisy = judged("lfp_normal_1", 5e-4), judged("lfp_normal_1", 2e-3)
    for result in (quiet, noisy):
        assert result.metrics.values["main_plateau_length_pct"] > 70
    u_quiet = quiet.metrics.uncertainty["main_plateau_length_pct"]
    u_noisy = noisy.metrics.uncertainty["main_plateau_length_pct"]
    grid_only = 2 * math.sqrt(2) * 0.1 / math.sqrt(12)  # two ends on a 0.1 % grid
    assert grid_only < u_quiet < u_noisy
    nmc = to_document(judged("nmc_normal_1", 5e-4))
    assert nmc["metrics"]["total_plateau_length_pct"] == 0
    assert nmc["metrics_U"]["total_plateau_length_pct"] == 0  # exact, not unknown (null)
