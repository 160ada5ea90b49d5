"""The resolution a metric is exported at, and its value rounded to it.

Pure. A metric's value comes out of the judge as a float with every bit the arithmetic left
in it (974.2000000000007 s, 1.799999999999987 mOhm): the digits past what a cycler can
measure are noise, and a plant system or a spreadsheet shows them. The lot export (CSV and
Parquet) writes every value rounded to its metric's stated resolution, one table by unit,
finer than the printed figures of the certificates (pipeline/judge/quantities.py) so that
an export keeps what the page rounds away, and coarser than any cycler's own resolution
(common practice: a cycler logs voltage to 0.1 mV, current to about 0.01 % of its range).

>>> export_decimals("grading_capacity_Ah"), round_to_resolution("dcir_mOhm", 1.799999999999987)
(5, 1.8)
"""

from __future__ import annotations

import math
from typing import Final

from pipeline.judge.metricdefs import RULE_BY_NAME

# decimals kept in the export, by the metric's unit (common practice, see the docstring):
# Ah and Wh to 10 µAh / 10 µWh, V to 0.1 mV, resistance to 1 µOhm, drift to 1 µV/h,
# temperature to 0.01 °C, durations to 0.1 s, percentages to 0.001 %
DECIMALS_BY_UNIT: Final = {
    "Ah": 5,
    "Wh": 5,
    "V": 4,
    "mOhm": 3,
    "mV/h": 3,
    "mV/day": 3,
    "°C": 2,
    "s": 1,
    "%": 3,
}
FRACTION_DECIMALS: Final = 6  # an efficiency, a plain fraction: to 0.0001 %
COUNT_DECIMALS: Final = 0
OTHER_DECIMALS: Final = 6  # a metric this table does not know (a newer result's)


def export_decimals(metric: str) -> int:
    """How many decimals ``metric`` is exported with (its stated resolution is 10**-n)."""
    definition = RULE_BY_NAME.get(metric)
    unit = definition.unit if definition else None
    if unit is None:
        return OTHER_DECIMALS
    if unit == "":
        return COUNT_DECIMALS if metric.endswith("_count") else FRACTION_DECIMALS
    return DECIMALS_BY_UNIT.get(unit, OTHER_DECIMALS)


def round_to_resolution(metric: str, value: float | None) -> float | None:
    """``value`` rounded to the metric's resolution; None for a value not measured (None,
    NaN or infinite, as the lot statistics treat it). Minus zero becomes zero."""
    if value is None or not math.isfinite(value):
        return None
    rounded = round(float(value), export_decimals(metric))
    return rounded + 0.0  # -0.0 + 0.0 is 0.0


# The column of a metric's expanded uncertainty U (k = 2) beside the metric's own.
U_SUFFIX: Final = "_U"


def round_uncertainty(metric: str, u: float | None) -> float | None:
    """An expanded uncertainty at the metric's resolution, rounded up, never to zero: a
    reader must not take a value for surer than it is (JCGM 100:2008 7.2.6). None: none.

    >>> round_uncertainty("grading_capacity_Ah", 0.0081234), round_uncertainty("dcir_mOhm", 1e-9)
    (0.00813, 0.001)
    """
    if u is None or not math.isfinite(u) or u < 0:
        return None
    scale = 10.0 ** export_decimals(metric)
    return max(math.ceil(round(u * scale, 9)), 1) / scale


__all__ = [
    "DECIMALS_BY_UNIT",
    "U_SUFFIX",
    "export_decimals",
    "round_to_resolution",
    "round_uncertainty",
]
