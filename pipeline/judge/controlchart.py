"""The lot over time: an individuals control chart of one metric in test order, and its run rules.

Pure: values in test order in, limits and signals out. An individuals chart plots each
cell's value in the order the cells were tested, with a centre line and control limits at
three sigma; sigma comes from the moving range of neighbouring values, so a slow drift of
the line does not widen the limits that should catch it (Montgomery, Introduction to
Statistical Quality Control, the chart for individual measurements: sigma = MR-bar / d2,
d2 = 1.128 for ranges of two).

The limits are **robust** by default: the centre is the median, sigma the median moving
range divided by 0.9539 (the median of |X1 - X2| for two independent standard normal values
is sqrt(2)·Phi^-1(0.75) = 0.9539, derived), so the few failed cells a lot always has do not
pull the limits apart. ``classical`` gives Montgomery's mean and MR-bar / 1.128.

The run rules (:data:`RULES`) are the published tests for special causes, each named with
its source: Western Electric (1956), *Statistical Quality Control Handbook*, rules 1 to 4
(one point beyond 3 sigma; 2 of 3 beyond 2 sigma on one side; 4 of 5 beyond 1 sigma on one
side; 8 in a row on one side), and Nelson (1984), "The Shewhart control chart - tests for
special causes", J. Quality Technology 16(4), test 3 (six points in a row steadily
increasing or decreasing: a trend). :data:`DEFAULT_RULES` uses Western Electric 1-4 and
Nelson 3. A rule signals at the point that completes its pattern.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Final, Literal

import numpy as np

from pipeline.model import FloatArray

D2_TWO: Final = 1.128  # d2 for subgroups of two (Montgomery, table of control chart constants)
MEDIAN_MR_OF_NORMAL: Final = math.sqrt(2.0) * 0.6744897501960817  # sqrt(2)·Phi^-1(0.75), derived
Limits = Literal["robust", "classical"]


@dataclass(frozen=True, slots=True)
class RunRule:
    """A test for special causes: its key, its words and the source that publishes it."""

    key: str
    words: str
    source: str


RULES: Final = (
    RunRule("WE1", "one point beyond 3 sigma", "Western Electric 1956, rule 1; Nelson 1984, test 1"),
    RunRule("WE2", "2 of 3 points in a row beyond 2 sigma on one side",
            "Western Electric 1956, rule 2; Nelson 1984, test 5"),
    RunRule("WE3", "4 of 5 points in a row beyond 1 sigma on one side",
            "Western Electric 1956, rule 3; Nelson 1984, test 6"),
    RunRule("WE4", "8 points in a row on one side of the centre line", "Western Electric 1956, rule 4"),
    RunRule("N2", "9 points in a row on one side of the centre line", "Nelson 1984, test 2"),
    RunRule("N3", "6 points in a row steadily increasing or decreasing", "Nelson 1984, test 3"),
)
BY_KEY: Final = {r.key: r for r in RULES}
DEFAULT_RULES: Final = ("WE1", "WE2", "WE3", "WE4", "N3")


@dataclass(frozen=True, slots=True)
class Signal:
    """A run rule that fired: the rule, the point (index into the values) that completes it."""

    rule: str
    index: int


@dataclass(frozen=True, slots=True)
class ControlChart:
    """One metric's chart: its values in test order, centre, sigma, limits and the signals.

    ``values`` keeps NaN for a cell without a value (drawn as a gap, never a signal);
    ``sigma`` is None when fewer than 2 neighbouring values give a moving range, or their
    moving ranges are all zero.
    """

    metric: str
    values: FloatArray
    centre: float | None
    sigma: float | None
    limits: Limits
    signals: tuple[Signal, ...]

    @property
    def lower(self) -> float | None:
        return None if self.centre is None or self.sigma is None else self.centre - 3.0 * self.sigma

    @property
    def upper(self) -> float | None:
        return None if self.centre is None or self.sigma is None else self.centre + 3.0 * self.sigma

    def flagged(self) -> tuple[int, ...]:
        """The points some rule signals at, in order, each once."""
        return tuple(sorted({s.index for s in self.signals}))


def moving_ranges(values: FloatArray) -> FloatArray:
    """|x[i] - x[i-1]| over neighbouring measured values (a gap is skipped, not bridged)."""
    x = np.asarray(values, dtype=np.float64)
    mr = np.abs(np.diff(x))
    out: FloatArray = mr[np.isfinite(mr)]
    return out


def centre_and_sigma(values: FloatArray, limits: Limits = "robust") -> tuple[float | None, float | None]:
    """The chart's centre line and sigma.

    >>> centre, sigma = centre_and_sigma(np.array([10.0, 12.0, 11.0, 13.0]), "classical")
    >>> centre, round(sigma, 4)  # the mean, and MR-bar 5/3 over d2 1.128
    (11.5, 1.4775)
    """
    x = np.asarray(values, dtype=np.float64)
    measured = x[np.isfinite(x)]
    if measured.size == 0:
        return None, None
    mr = moving_ranges(x)
    if limits == "classical":
        centre = float(np.mean(measured))
        sigma = float(np.mean(mr)) / D2_TWO if mr.size else None
    else:
        centre = float(np.median(measured))
        sigma = float(np.median(mr)) / MEDIAN_MR_OF_NORMAL if mr.size else None
    return centre, (sigma if sigma is not None and sigma > 0.0 else None)


def _zone_rule(z: FloatArray, of: int, need: int, beyond: float) -> list[int]:
    """Points completing ``need`` of ``of`` in a row beyond ``beyond`` sigma on one side."""
    hits = []
    for i in range(len(z)):
        if i + 1 < of or not math.isfinite(z[i]):
            continue
        last = z[i + 1 - of:i + 1]
        for side in (1.0, -1.0):
            # the point itself must be one of them, on that side (it completes the pattern)
            if side * z[i] > beyond and int(np.sum(side * last > beyond)) >= need:
                hits.append(i)
                break
    return hits


def _same_side(z: FloatArray, run: int) -> list[int]:
    hits = []
    count, side = 0, 0.0
    for i, v in enumerate(z):
        s = math.copysign(1.0, v) if math.isfinite(v) and v != 0.0 else 0.0
        count = count + 1 if s != 0.0 and s == side else (1 if s != 0.0 else 0)
        side = s
        if count >= run:
            hits.append(i)
    return hits


def _trend(x: FloatArray, run: int) -> list[int]:
    """Points ending ``run`` points in a row each above (or each below) the one before."""
    hits = []
    up = down = 1
    for i in range(1, len(x)):
        a, b = x[i - 1], x[i]
        if not (math.isfinite(a) and math.isfinite(b)):
            up = down = 1
            continue
        up = up + 1 if b > a else 1
        down = down + 1 if b < a else 1
        if up >= run or down >= run:
            hits.append(i)
    return hits


def run_rule_signals(values: FloatArray, centre: float, sigma: float,
                     rules: Sequence[str] = DEFAULT_RULES) -> tuple[Signal, ...]:
    """Every signal of ``rules`` on ``values`` (test order; NaN = no value, which breaks
    a run), sorted by point then rule.

    >>> [(s.rule, s.index) for s in run_rule_signals(np.array([0.0, 0.5, 3.5, 0.2]), 0.0, 1.0)]
    [('WE1', 2)]
    """
    x = np.asarray(values, dtype=np.float64)
    z = (x - centre) / sigma
    found: list[Signal] = []
    for key in rules:
        if key not in BY_KEY:
            raise ValueError(f"unknown run rule {key!r} (one of {', '.join(BY_KEY)})")
        if key == "WE1":
            idx = [i for i, v in enumerate(z) if math.isfinite(v) and abs(v) > 3.0]
        elif key == "WE2":
            idx = _zone_rule(z, 3, 2, 2.0)
        elif key == "WE3":
            idx = _zone_rule(z, 5, 4, 1.0)
        elif key == "WE4":
            idx = _same_side(z, 8)
        elif key == "N2":
            idx = _same_side(z, 9)
        else:  # N3
            idx = _trend(x, 6)
        found += [Signal(key, i) for i in idx]
    order = {k: i for i, k in enumerate(BY_KEY)}
    return tuple(sorted(found, key=lambda s: (s.index, order[s.rule])))


def control_chart(metric: str, values: Sequence[float | None], *, limits: Limits = "robust",
                  rules: Sequence[str] = DEFAULT_RULES) -> ControlChart:
    """The individuals chart of ``values`` (in test order; None or NaN = no value)."""
    x = np.array([np.nan if v is None else v for v in values], dtype=np.float64)
    x[~np.isfinite(x)] = np.nan
    x.setflags(write=False)
    centre, sigma = centre_and_sigma(x, limits)
    signals = run_rule_signals(x, centre, sigma, rules) if centre is not None and sigma else ()
    return ControlChart(metric, x, centre, sigma, limits, signals)


__all__ = [
    "DEFAULT_RULES",
    "RULES",
    "ControlChart",
    "RunRule",
    "Signal",
    "centre_and_sigma",
    "control_chart",
    "moving_ranges",
    "run_rule_signals",
]
