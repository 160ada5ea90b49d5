"""The K-value: a cell's open-circuit voltage drop per day while it ages on the shelf (mV/day).

The trade's main self-discharge screen: a cell with a small internal short loses charge,
so its OCV falls faster between the reading at the start and the one at the end of aging.
K = -(OCV_last - OCV_first) / (t_last - t_first), in mV/day; positive means a falling OCV,
the usual sign of the trade (common practice). Pure: readings in, a record out.

How large a K a given self-discharge makes depends on the slope of the cell's open-circuit
curve at its storage charge: on a flat plateau (LFP) the same lost charge moves the OCV far
less than on a sloped curve (NMC), so K limits belong to a cell type's rule file.

>>> from datetime import datetime, timezone
>>> from pipeline.read.readings import Reading
>>> def r(day: int, ocv: float) -> Reading:
...     at = datetime(2026, 3, 2 + day, 8, tzinfo=timezone.utc)
...     return Reading("C1", "L1", None, at, ocv, None, None, line=day + 2)
>>> k = k_value([r(7, 3.6470), r(0, 3.6512)], min_days=3)
>>> round(k.mv_per_day, 6), k.days
(0.6, 7.0)
>>> k_value([r(0, 3.6512), r(1, 3.6500)], min_days=3).reason
'readings 1.0 days apart; the K-value needs at least 3 days'
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

from pipeline.read.readings import Reading

SECONDS_PER_DAY = 86400.0


@dataclass(frozen=True, slots=True)
class KValue:
    """A K-value made: the OCV drop per day from the first to the last reading in time.

    ``mv_per_day`` is positive for a falling OCV. ``days`` is the time between ``first``
    and ``last``; ``readings`` how many readings of the cell there were. ``corrected`` says
    each OCV was first brought to the reference temperature. ``slope_mv_per_day`` is the
    least-squares slope over every reading (same sign as ``mv_per_day``) when there are
    three or more, else None: a note for people, not the judged value.
    """

    mv_per_day: float
    first: Reading
    last: Reading
    days: float
    readings: int
    corrected: bool
    slope_mv_per_day: float | None
    note: str


@dataclass(frozen=True, slots=True)
class NotMade:
    """A K-value that could not be made, and why (a check on it is not judged, never passed)."""

    cell_id: str | None
    readings: int
    reason: str


def group_by_cell(readings: Iterable[Reading]) -> dict[str, tuple[Reading, ...]]:
    """Each cell's readings in time order (ties by line), the cells in order of their ids."""
    cells: dict[str, list[Reading]] = {}
    for reading in readings:
        cells.setdefault(reading.cell_id, []).append(reading)
    return {cell: tuple(sorted(cells[cell], key=_time_order)) for cell in sorted(cells)}


def k_value(
    readings: Sequence[Reading],
    *,
    min_days: float,
    temperature_coefficient_mV_per_K: float | None = None,
    reference_C: float = 25.0,
) -> KValue | NotMade:
    """One cell's K-value (mV/day) from its first and last reading in time, or why not.

    With ``temperature_coefficient_mV_per_K`` each OCV is first corrected to
    ``reference_C``: OCV_ref = OCV - coeff * (T - T_ref), which needs every reading's
    temperature. Raises ValueError for readings of several cells, a time without its
    UTC offset, or a ``min_days`` that is not a positive number.
    """
    if not (math.isfinite(min_days) and min_days > 0):
        raise ValueError(f"min_days must be a positive number of days, not {min_days!r}")
    cell_id = _one_cell(readings)
    ordered = sorted(readings, key=_time_order)
    if len(ordered) < 2:
        return NotMade(cell_id, len(ordered), f"{_count(len(ordered))}; the K-value needs two")
    first, last = ordered[0], ordered[-1]
    days = _days_between(first, last)
    if days < min_days:
        apart = _days_text(days, min_days)
        reason = f"readings {apart} days apart; the K-value needs at least {min_days:g} days"
        return NotMade(cell_id, len(ordered), reason)
    coefficient = temperature_coefficient_mV_per_K
    if coefficient is not None:
        lacking = next((r for r in ordered if r.temperature_c is None), None)
        if lacking is not None:
            reason = (
                f"the reading on line {lacking.line} has no temperature; the temperature-corrected "
                "K-value needs every reading's"
            )
            return NotMade(cell_id, len(ordered), reason)
    ocv_mv = [_ocv_mv(r, coefficient, reference_C) for r in ordered]
    k = -(ocv_mv[-1] - ocv_mv[0]) / days
    slope = _slope_k(ordered, ocv_mv) if len(ordered) >= 3 else None
    return KValue(
        mv_per_day=k,
        first=first,
        last=last,
        days=days,
        readings=len(ordered),
        corrected=coefficient is not None,
        slope_mv_per_day=slope,
        note=_note(k, days, len(ordered), slope, coefficient, reference_C),
    )


def _time_order(reading: Reading) -> tuple[float, int]:
    return (reading.at.timestamp(), reading.line)


def _one_cell(readings: Sequence[Reading]) -> str | None:
    """The one cell the readings are of (None for no readings); mixing cells is refused."""
    cells = sorted({r.cell_id for r in readings})
    if len(cells) > 1:
        raise ValueError(f"readings of several cells ({', '.join(cells)}): give one cell's")
    naive = [r.line for r in readings if r.at.utcoffset() is None]
    if naive:
        raise ValueError(f"the reading of line {naive[0]} has a time without its UTC offset")
    return cells[0] if cells else None


def _count(n: int) -> str:
    return "no readings" if n == 0 else "one reading"


def _days_between(first: Reading, last: Reading) -> float:
    return (last.at - first.at).total_seconds() / SECONDS_PER_DAY


def _days_text(days: float, min_days: float) -> str:
    """``days`` with as few decimals (at least one) as show it is below ``min_days``."""
    for decimals in range(1, 7):
        if round(days, decimals) < min_days:
            return f"{days:.{decimals}f}"
    return f"{days:.6f}"


def _ocv_mv(reading: Reading, coefficient: float | None, reference_c: float) -> float:
    """The reading's OCV in mV, brought to ``reference_c`` when a coefficient is given."""
    mv = reading.ocv_v * 1000.0
    if coefficient is None:
        return mv
    assert reading.temperature_c is not None  # checked by k_value
    return mv - coefficient * (reading.temperature_c - reference_c)


def _slope_k(ordered: Sequence[Reading], ocv_mv: Sequence[float]) -> float:
    """Minus the least-squares slope of OCV (mV) over time (days): a K over every reading."""
    t0 = ordered[0].at
    t = [(r.at - t0).total_seconds() / SECONDS_PER_DAY for r in ordered]
    t_mean = math.fsum(t) / len(t)
    v_mean = math.fsum(ocv_mv) / len(ocv_mv)
    sxx = math.fsum((ti - t_mean) ** 2 for ti in t)
    sxy = math.fsum((ti - t_mean) * (vi - v_mean) for ti, vi in zip(t, ocv_mv, strict=True))
    return -sxy / sxx


def _note(
    k: float,
    days: float,
    count: int,
    slope: float | None,
    coefficient: float | None,
    reference_c: float,
) -> str:
    """One sentence saying how the K-value was made."""
    text = f"K = {k:.3f} mV/day from {count} readings over {days:.2f} days (first and last)"
    if coefficient is not None:
        text += f", OCV corrected to {reference_c:g} degC at {coefficient:g} mV/K"
    if slope is not None:
        text += f"; least-squares slope over all readings {slope:.3f} mV/day"
    return text
