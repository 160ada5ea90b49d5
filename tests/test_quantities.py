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

from pipeline.judge.cellverdict import outlier_phrase
from pipeline.judge.evaluate import decision_line, evaluate, phrase
from pipeline.judge.lotscreens import Outlier
from pipeline.judge.lotspread import capability
from pipeline.judge.lotstats import WindowSpec
from pipeline.judge.metricdefs import RULE_METRICS
from pipeline.judge.quantities import DASH, format_value, format_window, precision
from pipeline.mail import letters
from pipeline.model import (
    CellMetrics,
    CellType,
    Outcome,
    PlateauSettings,
    Rule,
    RuleSet,
    Severity,
    Verdict,
    VerdictKind,
    Window,
)
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
