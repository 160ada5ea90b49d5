"""How a metric's value, window and bounds are written: the one source of those words.

Pure. The judge's reasons and decision line, the certificate's table, the letters and the
lot report all write a quantity through this module, so one quantity reads the same
everywhere: a fraction as a percentage (0.9658 is "96.58 %"), capacity and energy to four
significant digits, voltage to the millivolt, resistance to three significant digits; a
window as "98.00 to 101.00 %" (with an en dash), "≥ 80.00 %", "≤ 60.0 °C" or "any value";
a value not measured as an em dash; a negative number with a true minus sign.

A value out of its window that would print as the bound it crossed ("8.00 mOhm > 8.00
mOhm") is written, with its window, to as many more digits as tell the two apart
(:func:`precision`), and a bound with more digits than its unit shows is written as it is
(a limit of 20.325 Ah never reads "20.32 Ah"); a value held too close to a limit, or
accepted outside it by less than its uncertainty, is written against that limit the same
way (:func:`near_limit`). Every renderer asks for the same digits, so they still agree.
"""

from __future__ import annotations

import math
from collections.abc import Callable

from pipeline.acceptance.rules import Window
from pipeline.judge.metricdefs import RULE_BY_NAME

DASH = "\N{EM DASH}"  # shown for a value that was not measured
MINUS = "\N{MINUS SIGN}"
MAX_EXTRA_DIGITS = 6  # more digits than a cycler's numbers hold tell nothing apart
Formatter = Callable[[float], str]


def signed(text: str) -> str:
    """Use a true minus sign, and never show minus zero."""
    if not text.startswith("-"):
        return text
    return text[1:] if float(text) == 0 else MINUS + text[1:]


def significant(value: float, digits: int) -> str:
    """``value`` with ``digits`` significant digits in fixed notation (no exponent).

    >>> significant(20.1349, 4), significant(0.98765, 4), significant(1234.6, 3)
    ('20.13', '0.9877', '1235')
    """
    if value == 0:
        return f"{0:.{digits - 1}f}"
    decimals = min(6, max(0, digits - 1 - math.floor(math.log10(abs(value)))))
    return signed(f"{value:.{decimals}f}")


def _significant(digits: int) -> Callable[[int], Formatter]:
    return lambda extra: lambda v: significant(v, digits + extra)


def _fixed(decimals: int) -> Callable[[int], Formatter]:
    return lambda extra: lambda v: signed(f"{v:.{decimals + extra}f}")


# How each unit's numbers print, given the extra digits a close call needs: capacity and
# energy to 4 significant digits, voltage to the mV, resistance to 3 significant digits
# (common practice).
_BY_UNIT: dict[str, Callable[[int], Formatter]] = {
    "Ah": _significant(4),
    "Wh": _significant(4),
    "V": _fixed(3),
    "mOhm": _significant(3),
    "mV/h": _fixed(2),
    "°C": _fixed(1),
    "s": _fixed(0),
    "%": _fixed(1),
}
# The plain formatters of some units, for tables that show them outside any check.
BY_UNIT: dict[str, Formatter] = {unit: make(0) for unit, make in _BY_UNIT.items()}


def percent(value: float, extra: int = 0) -> str:
    """A fraction as a percentage to two decimals (without the sign): 0.9658 -> '96.58'."""
    return signed(f"{value * 100:.{2 + extra}f}")


def _scale(metric: str) -> tuple[float, str]:
    """The factor a metric's value is shown at, and its unit (a fraction shows as %)."""
    definition = RULE_BY_NAME.get(metric)
    unit = definition.unit if definition else ""
    if unit == "" and metric.endswith("efficiency"):
        return 100.0, "%"
    return 1.0, unit


def metric_format(metric: str, extra: int = 0) -> tuple[Formatter, str]:
    """The number formatter and the unit shown for a metric (fractions show as %)."""
    scale, unit = _scale(metric)
    if scale != 1.0:
        return (lambda v: percent(v, extra)), unit
    if unit == "" and metric.endswith("_count"):
        return (lambda v: signed(f"{v:.{extra}f}")), ""
    make = _BY_UNIT.get(unit, _significant(4))
    return make(extra), unit


def with_unit(number: str, unit: str) -> str:
    return f"{number} {unit}" if unit else number


def format_value(metric: str, value: float | None, extra: int = 0) -> str:
    """A measured value with its unit, or an em dash when it was not measured.

    >>> format_value("grading_capacity_Ah", 20.1349), format_value("dcir_mOhm", None)
    ('20.13 Ah', '—')
    >>> format_value("grading_coulombic_efficiency", 0.9658)
    '96.58 %'
    """
    if value is None or not math.isfinite(value):
        return DASH
    number, unit = metric_format(metric, extra)
    return with_unit(number(value), unit)


def _decimals(text: str) -> int:
    return len(text.split(".", 1)[1]) if "." in text else 0


def format_uncertain(metric: str, value: float | None, u: float | None, extra: int = 0) -> str:
    """A measured value ± its expanded uncertainty, U to two significant digits and the value
    to at least as many decimals (JCGM 100:2008 7.2.6); the plain value when U is unknown.

    >>> format_uncertain("grading_capacity_Ah", 18.9812, 0.0312)
    '18.981 ± 0.031 Ah'
    >>> format_uncertain("grading_coulombic_efficiency", 0.99296, 0.00034)
    '99.296 ± 0.034 %'
    >>> format_uncertain("dcir_mOhm", 7.412, None)
    '7.41 mOhm'
    """
    if value is None or not math.isfinite(value) or u is None or not math.isfinite(u) or u <= 0:
        return format_value(metric, value, extra)
    scale, unit = _scale(metric)
    u_text = significant(u * scale, 2)
    number, _ = metric_format(metric, extra)
    v_text = number(value)
    if _decimals(u_text) > _decimals(v_text):
        v_text = signed(f"{value * scale:.{_decimals(u_text)}f}")
    elif extra and _decimals(v_text) > _decimals(u_text):
        # a close call's digits: U written to them too, so the value and U read alike
        u_text = f"{u * scale:.{_decimals(v_text)}f}"
    return with_unit(f"{v_text} \N{PLUS-MINUS SIGN} {u_text}", unit)


def format_window(metric: str, window: Window, extra: int = 0) -> str:
    """The window as "low to high" (an en dash), "≥ low", "≤ high" (with unit) or "any value".

    >>> format_window("first_cycle_efficiency", Window(0.8, None))
    '≥ 80.00 %'
    """
    number, unit = metric_format(metric, extra)
    low, high = window.low, window.high
    if low is not None and high is not None:
        return with_unit(f"{number(low)} \N{EN DASH} {number(high)}", unit)
    if low is not None:
        return with_unit(f"\N{GREATER-THAN OR EQUAL TO} {number(low)}", unit)
    if high is not None:
        return with_unit(f"\N{LESS-THAN OR EQUAL TO} {number(high)}", unit)
    return "any value"


def format_spread(metric: str, value: float | None, digits: int = 3) -> str:
    """A spread (a standard deviation) in the metric's shown unit, to ``digits`` significant
    digits: a small spread keeps its digits where the value's fixed decimals would not.

    >>> format_spread("grading_mean_voltage_V", 0.000412), format_spread("first_cycle_efficiency", 0.0012)
    ('0.000412 V', '0.120 %')
    """
    if value is None or not math.isfinite(value):
        return DASH
    scale, unit = _scale(metric)
    return with_unit(significant(value * scale, digits), unit)


def crossed(value: float | None, window: Window) -> float | None:
    """The bound an out-of-window value crossed; None for a value in window or not measured."""
    if value is None or not math.isfinite(value):
        return None
    if window.low is not None and value < window.low:
        return window.low
    if window.high is not None and value > window.high:
        return window.high
    return None


def nearer_bound(value: float, window: Window) -> float | None:
    """The limit of ``window`` that ``value`` lies nearer to (None: an open window)."""
    low, high = window.low, window.high
    if low is not None and (high is None or abs(value - low) <= abs(high - value)):
        return low
    return high


def decisive(metric: str, value: float | None, bound: float | None) -> int:
    """The extra digits that write ``bound`` as it is and tell ``value`` from it.

    The fewest (at most MAX_EXTRA_DIGITS) with which the bound reads back as itself and the
    value does not read as the bound (unless it is the bound). A bound that no such number of
    digits writes as it is (a limit computed from a lot, 0.5970183... mV/day) is written to
    the digits that tell the value from it alone, not to the most digits there are.

    >>> decisive("grading_capacity_Ah", 20.31, 20.325), format_value("grading_capacity_Ah", 20.325, 1)
    (1, '20.325 Ah')
    >>> decisive("grading_coulombic_efficiency", 0.993004, 0.993), percent(0.993004, 2)
    (2, '99.3004')
    >>> decisive("k_value_mV_per_day", 1.8, 0.5970183), decisive("k_value_mV_per_day", 0.59705, 0.5970183)
    (0, 1)
    """
    if value is None or bound is None or not (math.isfinite(value) and math.isfinite(bound)):
        return 0
    scale, _ = _scale(metric)
    apart = None  # the fewest digits that tell the value from the bound
    for extra in range(MAX_EXTRA_DIGITS + 1):
        number, _ = metric_format(metric, extra)
        shown = number(bound)
        as_is = math.isclose(float(shown.replace(MINUS, "-")), bound * scale,
                             rel_tol=1e-9, abs_tol=1e-12)
        told = number(value) != shown or value == bound
        if as_is and told:
            return extra
        if told and apart is None:
            apart = extra
    return MAX_EXTRA_DIGITS if apart is None else apart


def precision(metric: str, value: float | None, window: Window) -> int:
    """The extra digits that tell an out-of-window value from the bound it crossed, and write
    that bound as it is (0 mostly; 0 for a value in window).

    >>> precision("dcir_mOhm", 8.004, Window(None, 8.0)), precision("dcir_mOhm", 9.1, Window(None, 8.0))
    (1, 0)
    >>> format_value("dcir_mOhm", 8.004, 1), format_window("dcir_mOhm", Window(None, 8.0), 1)
    ('8.004 mOhm', '≤ 8.000 mOhm')
    """
    return decisive(metric, value, crossed(value, window))


def near_limit(metric: str, value: float | None, window: Window) -> int:
    """The extra digits that write the limit ``value`` lies nearer to as it is, and tell the
    value from it: for a value held too close to its limit, or accepted outside it by less
    than its uncertainty, which is then written against that limit (evaluate.against).

    >>> near_limit("grading_coulombic_efficiency", 0.993004, Window(0.993, None))
    2
    """
    if value is None or not math.isfinite(value):
        return 0
    return decisive(metric, value, nearer_bound(value, window))


__all__ = [
    "BY_UNIT",
    "DASH",
    "MINUS",
    "crossed",
    "decisive",
    "format_spread",
    "format_uncertain",
    "format_value",
    "format_window",
    "metric_format",
    "near_limit",
    "nearer_bound",
    "percent",
    "precision",
    "signed",
    "significant",
    "with_unit",
]
