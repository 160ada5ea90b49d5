"""One way of writing each quantity: the certificate, the decision line, the letters and the lot report agree.

For every metric a rule may name and any value and window, the judge's reason and
decision line, the certificate's check row and decision box, a letter's check line and
the lot report's window, outlier row and hold reason write the value, the window and the
bound it crossed in the very same words (pipeline.judge.quantities). A fraction is a
percentage everywhere; a value out of window never reads as the bound it crossed.
"""

from __future__ import annotations

import math

import pytest
from hypothesis import given
from hypothesis import strategies as st

from pipeline.acceptance.results import Outcome, Verdict, VerdictKind
from pipeline.acceptance.rules import (
    GUARDED_ACCEPTANCE,
    GUARDED_REJECTION,
    CellType,
    Rule,
    RuleSet,
    Severity,
    Window,
)
from pipeline.judge.cellverdict import outlier_phrase
from pipeline.judge.evaluate import decision_line, evaluate, phrase
from pipeline.judge.lotscreens import Outlier
from pipeline.judge.lotspread import capability
from pipeline.judge.lotstats import WindowSpec
from pipeline.judge.metricdefs import RULE_METRICS
from pipeline.judge.quantities import (
    DASH,
    MINUS,
    format_uncertain,
    format_value,
    format_window,
    metric_format,
    near_limit,
    precision,
)
from pipeline.mail import letters
from pipeline.model import CellMetrics, PlateauSettings
from pipeline.report import certificate, lotreport, lotwords

CT = CellType("DEMO-T", 20.0, -0.1, 5.0)
NAMES = [m.name for m in RULE_METRICS]
STAGES = {m.name: m.stages for m in RULE_METRICS}
numbers = st.floats(-1e4, 1e4, allow_nan=False, allow_infinity=False)


def _judge(metric: str, value: float, window: Window, message: str) -> Verdict:
    rule = Rule("r1", metric, window, Severity.REJECT, message=message)
    rule_set = RuleSet("t", "1", "LFP/graphite", "0" * 64, "t.toml", (CT,), PlateauSettings(), (rule,))
    metrics = CellMetrics({metric: value}, (), (), ())
    return evaluate(rule_set, CT, metrics, stages=STAGES[metric])


def _apart(value: float, bound: float) -> bool:
    """Whether two numbers differ by more than a cycler's numbers can tell (a millionth)."""
    return abs(value - bound) > 1e-6 * max(1.0, abs(bound))


@st.composite
def cases(draw: st.DrawFn) -> tuple[str, float, Window]:
    metric = draw(st.sampled_from(NAMES))
    value = draw(numbers)
    # bounds near the value (a close call), or anywhere; one side may be open
    near = st.floats(-1e-3, 1e-3, allow_nan=False).map(lambda d: value + d * max(1.0, abs(value)))
    bound = st.one_of(st.none(), numbers, near)
    low, high = draw(bound), draw(bound)
    if low is not None and high is not None and low > high:
        low, high = high, low
    return metric, value, Window(low, high)


@given(cases(), st.sampled_from(["", "Out of the test window."]))
def test_every_renderer_writes_a_checks_value_and_window_alike(
    case: tuple[str, float, Window], message: str
) -> None:
    metric, value, window = case
    (check,) = _judge(metric, value, window, message).checks
    extra = precision(metric, value, window)
    value_text, window_text = format_value(metric, value, extra), format_window(metric, window, extra)
    row = certificate._check_row(check, decided=True)
    # the certificate's table
    assert (row["value"], row["window"]) == (value_text, window_text)
    if check.outcome is not Outcome.OUT_OF_WINDOW:
        # in window: the lot report writes the check's window as the certificate does
        spec = WindowSpec(metric, window.low, window.high, "reject", "r1")
        lot_row = lotwords.capability_row(spec, capability([value, value], window.low, window.high))
        assert lot_row["window"] == row["window"]
        return
    # the decision box and the reasons (the check's message), the letters' check line
    assert f"{metric} = {value_text}" in check.message and window_text in check.message
    mail_line = " ".join(letters._check_line(check).split())  # a letter wraps its lines
    assert f"{metric} = {value_text}, window {window_text} (out of window" in mail_line
    # the decision line (mail subjects, logs, formgate check): the value and the bound crossed,
    # each as the table writes it, and never the same text on both sides of the sign
    low_side = window.low is not None and value < window.low
    bound = window.low if low_side else window.high
    assert bound is not None
    bound_text = format_value(metric, bound, extra)
    line = decision_line(Verdict(VerdictKind.FAIL, (check,), ()))
    assert line == phrase(check) == (
        f"{metric} {value_text} {'<' if low_side else '>'} {bound_text} (reject)"
    )
    if _apart(value, bound):
        assert value_text != bound_text
    one_sided = "\N{GREATER-THAN OR EQUAL TO} " if low_side else "\N{LESS-THAN OR EQUAL TO} "
    if (window.low is None) != (window.high is None):
        assert window_text == one_sided + bound_text


@given(st.sampled_from(NAMES), numbers, numbers, st.sampled_from(["low", "high"]))
def test_an_outliers_hold_reason_and_the_lot_reports_row_write_it_alike(
    metric: str, value: float, limit: float, side: str
) -> None:
    if (side == "high") != (value > limit) or value == limit:
        value, limit = limit, value
    if not _apart(value, limit):
        return
    low, high = (limit, None) if side == "low" else (None, limit)
    outlier = Outlier("C-1", metric, value, low, high, side)
    row = lotreport._outlier_row(outlier)
    sign = "<" if side == "low" else ">"
    assert outlier_phrase(outlier) == (
        f"outlier in lot: {metric} {row['value']} {sign} lot limit {row['limit']}"
    )
    assert row["value"] != row["limit"]


@pytest.mark.parametrize(
    ("metric", "value", "window", "table", "line"),
    [
        # a fraction is a percentage, in the table as in the decision line and the reasons
        ("grading_coulombic_efficiency", 0.9658, Window(0.98, 1.01),
         ("96.58 %", "98.00 \N{EN DASH} 101.00 %"),
         "grading_coulombic_efficiency 96.58 % < 98.00 % (reject)"),
        ("first_cycle_efficiency", 0.7787, Window(0.8, None),
         ("77.87 %", "\N{GREATER-THAN OR EQUAL TO} 80.00 %"),
         "first_cycle_efficiency 77.87 % < 80.00 % (reject)"),
        # a close call gets the digits that tell the value from its bound, everywhere
        ("dcir_mOhm", 8.004, Window(None, 8.0),
         ("8.004 mOhm", "\N{LESS-THAN OR EQUAL TO} 8.000 mOhm"),
         "dcir_mOhm 8.004 mOhm > 8.000 mOhm (reject)"),
        ("rest_voltage_drift_mV_per_h", -3.609, Window(-2.0, None),
         ("\N{MINUS SIGN}3.61 mV/h", "\N{GREATER-THAN OR EQUAL TO} \N{MINUS SIGN}2.00 mV/h"),
         "rest_voltage_drift_mV_per_h \N{MINUS SIGN}3.61 mV/h < \N{MINUS SIGN}2.00 mV/h (reject)"),
    ],
)
def test_what_the_defect_showed_is_now_written_one_way(
    metric: str, value: float, window: Window, table: tuple[str, str], line: str
) -> None:
    (check,) = _judge(metric, value, window, "Out of the test window.").checks
    row = certificate._check_row(check, decided=True)
    assert (row["value"], row["window"]) == table
    assert check.message == f"Out of the test window ({metric} = {table[0]}; window {table[1]})."
    assert phrase(check) == line


def test_a_value_not_measured_is_an_em_dash_wherever_it_is_written() -> None:
    assert format_value("grading_capacity_Ah", None) == DASH
    assert format_value("grading_capacity_Ah", math.nan) == DASH
    spec = WindowSpec("first_cycle_efficiency", 0.8, None, "reject", "ice")
    row = lotwords.capability_row(spec, capability([], 0.8, None))
    assert (row["window"], row["mean"], row["sd"]) == (
        "\N{GREATER-THAN OR EQUAL TO} 80.00 %", DASH, DASH
    )


def _judge_with_u(metric: str, value: float, u: float, window: Window, decision: str) -> Verdict:
    rule = Rule("r1", metric, window, Severity.REJECT, decision=decision)
    rule_set = RuleSet("t", "1", "LFP/graphite", "0" * 64, "t.toml", (CT,), PlateauSettings(), (rule,))
    metrics = CellMetrics({metric: value}, (), (), (), uncertainty={metric: u})
    return evaluate(rule_set, CT, metrics, stages=STAGES[metric])


# limits as rule files and relative windows give them: up to five decimals
limits = st.builds(round, st.floats(-1e3, 1e3, allow_nan=False), st.integers(0, 5))


@given(st.sampled_from(NAMES), limits, st.floats(1e-6, 10.0), st.floats(0.0, 0.99),
       st.sampled_from(["low", "high"]), st.sampled_from([GUARDED_ACCEPTANCE, GUARDED_REJECTION]))
def test_a_value_within_u_of_a_limit_is_written_with_the_digits_that_tell_them_apart(
    metric: str, limit: float, u: float, share: float, side: str, decision: str
) -> None:
    """Guarded acceptance holds a value inside its limit by less than U, "too close to the
    limit to decide"; guarded rejection accepts a value outside it by less than U (the guard
    bands of ILAC-G8:09/2019, Guidelines on Decision Rules and Statements of Conformity;
    ISO 14253-1:2017, Decision rules for verifying conformity or nonconformity with
    specifications; JCGM 106:2012, The role of measurement uncertainty in conformity
    assessment, clause 8.3). Either way the value ± U is written against the limit to the
    digits that tell the two apart, the limit as it is, alike in the reason, the decision
    line and the certificate's row."""
    inward = 1.0 if side == "low" else -1.0
    value = limit + (inward if decision == GUARDED_ACCEPTANCE else -inward) * share * u
    if decision == GUARDED_REJECTION and value == limit:
        return  # on the limit is in window: nothing to accept by the rule
    window = Window(limit, None) if side == "low" else Window(None, limit)
    (check,) = _judge_with_u(metric, value, u, window, decision).checks
    if decision == GUARDED_ACCEPTANCE:
        assert check.too_close and check.outcome is Outcome.NOT_JUDGED
    else:
        assert not check.too_close and check.outcome is Outcome.IN_WINDOW
    extra = near_limit(metric, value, window)
    value_text = format_uncertain(metric, value, u, extra)
    limit_text = format_window(metric, window, extra)
    said = f"{value_text} against {limit_text}"
    assert said in check.message
    if check.too_close:
        assert phrase(check).endswith(said)
        assert decision_line(Verdict(VerdictKind.HOLD, (check,), ())) == phrase(check)
    row = certificate._check_row(check, decided=True)
    assert (row["value"], row["window"]) == (value_text, limit_text)
    number, _ = metric_format(metric, extra)
    scale = 100.0 if metric.endswith("efficiency") else 1.0
    # the limit as it is, never rounded onto another number (five decimals fit the digits)
    assert math.isclose(float(number(limit).replace(MINUS, "-")), limit * scale,
                        rel_tol=1e-9, abs_tol=1e-12)
    if _apart(value, limit):
        assert number(value) != number(limit)


@pytest.mark.parametrize(
    ("metric", "value", "u", "window", "decision", "said"),
    [
        # a limit of 20.325 Ah (a relative window of a 20 Ah cell) is not "20.32 Ah"
        ("grading_capacity_Ah", 20.331, 0.012, Window(20.325, None), GUARDED_ACCEPTANCE,
         "20.331 ± 0.012 Ah against \N{GREATER-THAN OR EQUAL TO} 20.325 Ah"),
        # 0.993004 is not "99.300 %" against "99.30 %"
        ("grading_coulombic_efficiency", 0.993004, 0.00034, Window(0.993, None),
         GUARDED_ACCEPTANCE,
         "99.3004 ± 0.0340 % against \N{GREATER-THAN OR EQUAL TO} 99.3000 %"),
        ("grading_coulombic_efficiency", 0.992996, 0.00034, Window(0.993, None),
         GUARDED_REJECTION,
         "99.2996 ± 0.0340 % against \N{GREATER-THAN OR EQUAL TO} 99.3000 %"),
    ],
)
def test_the_near_limit_cases_of_the_issue_are_written_apart(
    metric: str, value: float, u: float, window: Window, decision: str, said: str
) -> None:
    (check,) = _judge_with_u(metric, value, u, window, decision).checks
    assert said in check.message
    row = certificate._check_row(check, decided=True)
    assert f"{row['value']} against {row['window']}" == said
