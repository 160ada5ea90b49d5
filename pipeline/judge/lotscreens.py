"""Robust outlier screens of one metric: limits from a lot's passing cells, and the cells beyond them.

A passing cell can sit far from its lot while still inside the rule set's window: the
screen's limits are ``median ± k·1.4826·MAD`` of the lot's passing cells (the
part-average-testing idea of the semiconductor trade), clipped into the window so a screen
only ever tightens it. Pure functions of values and screen settings. The spread statistics
are left to :mod:`pipeline.judge.lotspread` (whose median absolute deviation scale the
screens share); which screens a lot runs, on which cells, to
:func:`pipeline.judge.lotstats.lot_statistics`.

A value that is None, NaN or infinite is a check not made: never an outlier.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Final

import numpy as np

from pipeline.judge.lotspread import NORMAL_MAD_SCALE, Values, measured
from pipeline.model import FloatArray

# The sides a screen may flag. Checked here at run time; the rule set's screens carry them
# typed (pipeline.judge.lotstats.Sides).
SIDES: Final = ("both", "low", "high")


@dataclass(frozen=True, slots=True)
class RobustLimits:
    """A robust outlier screen for one metric, worked out from the lot's passing cells.

    When ``applied``, ``low``/``high`` are ``median ∓ k·robust_sd`` on the screened sides,
    clipped into the spec window so the screen can only tighten it; a side not screened
    keeps the spec's bound (None = open). When not applied, ``low``/``high`` are the spec's
    own bounds, nothing is flagged and ``why`` says why. ``median``/``robust_sd`` are None
    when there was no passing value at all.
    """

    metric: str
    k: float
    min_cells: int
    sides: str
    n: int
    median: float | None
    robust_sd: float | None
    low: float | None
    high: float | None
    applied: bool
    why: str = ""


def check_screen(k: float, min_cells: int, sides: str) -> None:
    """Refuse a screen no rule loader should have let through (a programming error)."""
    if not (math.isfinite(k) and k > 0):
        raise ValueError(f"k must be a positive number, not {k!r}")
    if min_cells < 1:
        raise ValueError(f"min_cells must be at least 1, not {min_cells!r}")
    if sides not in SIDES:
        raise ValueError(f"sides must be one of {', '.join(SIDES)}, not {sides!r}")


def _cells(n: int) -> str:
    return "1 passing cell" if n == 1 else f"{n} passing cells"


def robust_limits_of_measured(
    metric: str, x: FloatArray, k: float, min_cells: int,
    spec_low: float | None, spec_high: float | None, sides: str,
) -> RobustLimits:
    """:func:`robust_limits` of values already cleaned by :func:`pipeline.judge.lotspread.measured`."""
    check_screen(k, min_cells, sides)
    n = int(x.size)
    median = float(np.median(x)) if n else None
    scale = NORMAL_MAD_SCALE * float(np.median(np.abs(x - median))) if median is not None else None

    def not_applied(why: str) -> RobustLimits:
        return RobustLimits(metric, k, min_cells, sides, n, median, scale, spec_low, spec_high, False, why)

    if n < min_cells:
        return not_applied(f"lot has {_cells(n)}, the screen needs {min_cells}")
    if median is None or scale is None or scale == 0.0:
        # a screen of zero width would flag every value that differs from the median
        return not_applied("no spread among passing cells")
    low, high = spec_low, spec_high
    if sides in ("both", "low"):
        low = median - k * scale if spec_low is None else max(spec_low, median - k * scale)
    if sides in ("both", "high"):
        high = median + k * scale if spec_high is None else min(spec_high, median + k * scale)
    return RobustLimits(metric, k, min_cells, sides, n, median, scale, low, high, True)


def robust_limits(
    metric: str,
    passing_values: Values,
    *,
    k: float,
    min_cells: int,
    spec_low: float | None,
    spec_high: float | None,
    sides: str = "both",
) -> RobustLimits:
    """Robust limits ``median ± k·1.4826·MAD`` of the passing cells, never wider than the spec.

    Why the median and MAD: the mean and standard deviation of a lot are pulled towards the
    very cells the screen is looking for, so one bad cell could hide itself; half the lot
    would have to be off to move the median. Why only passing cells: failed cells are
    already out and would widen the limits. ``sides`` (one of :data:`SIDES`) screens only one
    side ("low" for a screen that only catches low capacity, say). Raises ValueError for k <= 0, min_cells
    < 1 or unknown sides (the rule loader refuses those first).

    >>> r = robust_limits("cap", [1.0, 2.0, 3.0], k=2, min_cells=3, spec_low=0.0, spec_high=3.5)
    >>> (r.applied, r.median, round(r.robust_sd, 4), round(r.low, 4), r.high)
    (True, 2.0, 1.4826, 0.0, 3.5)
    >>> robust_limits("cap", [1.0, 2.0], k=2, min_cells=30, spec_low=None, spec_high=None).why
    'lot has 2 passing cells, the screen needs 30'
    """
    return robust_limits_of_measured(
        metric, measured(passing_values), k, min_cells, spec_low, spec_high, sides
    )


@dataclass(frozen=True, slots=True)
class Outlier:
    """A cell whose value lies outside a robust screen's limits, on side "low" or "high"."""

    cell_id: str
    metric: str
    value: float
    low: float | None
    high: float | None
    side: str


def flag_outliers(cell_ids: Sequence[str], x: FloatArray, limits: RobustLimits) -> tuple[Outlier, ...]:
    """The cells of ``x`` (NaN = not measured) outside ``limits``, furthest beyond first.

    Ties are ordered by cell id, so the result does not depend on the order of the cells.
    """
    if not limits.applied:
        return ()
    found: list[tuple[float, str, Outlier]] = []
    with np.errstate(invalid="ignore"):  # NaN compares False: never an outlier
        for bound, side, below in ((limits.low, "low", True), (limits.high, "high", False)):
            if bound is None:
                continue
            beyond = x < bound if below else x > bound
            for i in np.flatnonzero(beyond).tolist():
                value = float(x[i])
                outlier = Outlier(cell_ids[i], limits.metric, value, limits.low, limits.high, side)
                found.append((abs(value - bound), cell_ids[i], outlier))
    found.sort(key=lambda item: (-item[0], item[1]))
    return tuple(item[2] for item in found)


def outliers(values_by_cell: Mapping[str, float | None], limits: RobustLimits) -> tuple[Outlier, ...]:
    """The cells outside the screen's limits, furthest beyond the limit first.

    Nothing is flagged when the screen was not applied. A value not measured (None, NaN)
    is never an outlier: a missing value is the rule engine's business (it holds the cell).

    >>> r = robust_limits("cap", [1.0, 2.0, 3.0], k=0.5, min_cells=3, spec_low=None, spec_high=None)
    >>> [(o.cell_id, o.side) for o in outliers({"a": 1.0, "b": 2.0, "c": 3.5, "d": None}, r)]
    [('c', 'high'), ('a', 'low')]
    """
    ids = list(values_by_cell)
    x = np.array([values_by_cell[i] for i in ids], dtype=np.float64)
    x[~np.isfinite(x)] = np.nan
    return flag_outliers(ids, x, limits)


__all__ = [
    "SIDES",
    "Outlier",
    "RobustLimits",
    "check_screen",
    "flag_outliers",
    "outliers",
    "robust_limits",
    "robust_limits_of_measured",
]
