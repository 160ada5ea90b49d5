"""The uncertainty of each metric: the channel's accuracy class and the data's own scatter,
combined by the law of propagation of uncertainty (JCGM 100:2008, the GUM).

Pure: a Trace, its Segmentation, the CellMetrics measured on them and the channel's
AccuracyClass in; one :class:`Budget` per metric out, whose expanded uncertainty U
(k = 2, about 95 % for a normal distribution, JCGM 100:2008 6.3.3) the result, the
certificate and the decision rules use.

The channel's errors are modelled as a real channel makes them: every reading of a
quantity carries the same gain (a share of the reading) and the same offset, plus noise
that differs row by row. So:

- each class term is the half-width of a rectangular distribution, standard uncertainty
  a / sqrt(3) (JCGM 100:2008 4.3.7);
- a quantity measured twice on one channel shares its gain and offset (correlation 1,
  JCGM 100:2008 5.2.2): the current's gain and the time base cancel in a coulombic
  efficiency, a ratio of two charges of one channel, while its offset does not (it adds
  to one charge and takes from the other); the voltage's offset cancels in a DCIR step
  and a drift slope, its gain does not;
- the current's offset is the rest band's estimate when it was taken out (its standard
  error), or the class's when the current was left as recorded;
- the data's own scatter (Type A, JCGM 100:2008 4.2): the regression's standard error for
  the drift, the readings' scatter for DCIR, noise over the samples a mean or median takes,
  and the spread of the largest of n noisy readings (Gumbel 1958) for a maximum.

Each budget lists its components, so docs/metrics.md and a reader of the result can see
what dominates. Counts (cycles, plateaus) have no uncertainty.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from pipeline.judge.medians import median
from pipeline.judge.plateaus import SG_ORDER, merged_runs, odd_window
from pipeline.judge.rest_band import MEDIAN_EFFICIENCY
from pipeline.judge.savgol import plan as savgol_plan
from pipeline.judge.savgol import savgol
from pipeline.judge.segmentation import CV_BAND_V, CV_CURRENT_FRACTION, weights_between
from pipeline.model import (
    AccuracyClass,
    CellMetrics,
    CurrentBand,
    Cycle,
    FloatArray,
    Plateau,
    PlateauSettings,
    Segmentation,
    Step,
    StepKind,
    StepMode,
    Trace,
)

K = 2.0  # coverage factor (JCGM 100:2008 6.3.3)
SQRT3 = math.sqrt(3.0)
SQRT12 = math.sqrt(12.0)
# The standard deviation of the largest of n independent normal values is about
# sigma x pi / sqrt(6) / sqrt(2 ln n) (its Gumbel limit: Gumbel 1958, Statistics of Extremes).
GUMBEL = math.pi / math.sqrt(6.0)
NOISE_ROWS = 4000  # differences a noise estimate looks at, at most (its own scatter ~1.5 %)
RESOLUTION_ROWS = 20000  # rows the smallest step is looked for in: a resolution shows early
CV_START_ROWS = 128  # rows either side of a CV tail's start looked at, at most
CV_FIT_ROWS = 8  # rows either side of a CV tail's start: where noise may move it, a parabola's


@dataclass(frozen=True, slots=True)
class Component:
    """One line of a budget: what it is, and the standard uncertainty it adds (metric's unit)."""

    name: str
    u: float


@dataclass(frozen=True, slots=True)
class Budget:
    """The uncertainty budget of one metric: its components, combined in quadrature."""

    metric: str
    components: tuple[Component, ...]

    @property
    def u(self) -> float:
        """Combined standard uncertainty (JCGM 100:2008 5.1.2, components uncorrelated)."""
        return math.sqrt(sum(c.u * c.u for c in self.components))

    @property
    def expanded(self) -> float:
        """Expanded uncertainty U = k u, k = 2."""
        return K * self.u


@dataclass(frozen=True, slots=True)
class ChannelU:
    """The channel's standard uncertainties for one record: relative gains, absolute offsets,
    row-to-row noise and resolution, and the current range the class was applied to."""

    gain_v: float
    offset_v: float  # V
    gain_i: float
    offset_i: float  # A
    temperature: float  # K
    time: float  # relative
    noise_v: float  # V rms per row
    noise_i: float  # A rms per row
    noise_t: float  # K rms per row
    resolution_v: float  # V, smallest step of the voltage readings
    resolution_t: float  # K
    range_a: float


def range_up(amps: float) -> float:
    """The smallest 1-2-5 series value at or above ``amps``: the range a channel that carried
    that current must have at least (common practice: ranges come in 1-2-5 steps)."""
    if not amps > 0:
        return 1.0
    exponent = math.floor(math.log10(amps))
    for mantissa in (1.0, 2.0, 5.0, 10.0):
        value = mantissa * 10.0**exponent
        if value >= amps * (1 - 1e-12):
            return value
    return 10.0 ** (exponent + 1)  # pragma: no cover - the loop ends at 10


def with_range(accuracy: AccuracyClass, trace: Trace) -> AccuracyClass:
    """The class with its current range: as declared, or the record's largest current rounded
    up to the 1-2-5 series (the smallest range that could have carried it), said so."""
    if accuracy.current_range_a is not None:
        return accuracy
    amps = trace.current_a
    finite = amps if np.isfinite(amps).all() else amps[np.isfinite(amps)]
    # the largest |I| from the extremes (negation is exact): no array of magnitudes
    range_a = range_up(max(float(finite.max()), -float(finite.min()))) if len(finite) else 1.0
    return dataclasses.replace(
        accuracy, current_range_a=range_a, source=f"{accuracy.source}; range from the record"
    )


def _noise(values: FloatArray) -> float:
    """Row-to-row noise (rms) of a slowly varying series: 1.4826 x the median absolute
    deviation of successive differences / sqrt(2), which a slope or a step barely moves
    (Iglewicz and Hoaglin 1993 for the MAD's factor)."""
    # a record without gaps (the usual case) is used as it is, not copied
    finite = values if np.isfinite(values).all() else values[np.isfinite(values)]
    if len(finite) < 3:
        return 0.0
    # at most NOISE_ROWS evenly spread differences: the same estimate within its own scatter;
    # the differences at rows 0, every, 2 every ... only, not every one of the record's
    every = max(1, -(-(len(finite) - 1) // NOISE_ROWS))
    diffs = finite[1::every] - finite[:-1:every]
    # medians.median: np.median's numbers, without its overhead
    return 1.4826 * median(np.abs(diffs - median(diffs))) / math.sqrt(2.0)


def _resolution(values: FloatArray) -> float:
    """The smallest step between readings: the instrument's resolution, or less."""
    first = values[:RESOLUTION_ROWS]
    # the first rows as they are when every one is finite (the usual case), not a copy
    finite = first if np.isfinite(first).all() else first[np.isfinite(first)]
    if len(finite) < 2:
        return 0.0
    steps = finite[1:] - finite[:-1]
    np.abs(steps, out=steps)
    # the steps of no size are NaN, which fmin passes over: the smallest of the others
    # without a copy of them (NaN when there are none)
    steps[steps <= 1e-12] = np.nan
    smallest = float(np.fmin.reduce(steps))
    return 0.0 if math.isnan(smallest) else smallest


def _rest_rows(trace: Trace, steps: tuple[Step, ...]) -> FloatArray:
    parts = [trace.voltage_v[s.start : s.stop] for s in steps if s.kind is StepKind.REST]
    return np.concatenate(parts) if parts else trace.voltage_v[:0]


def channel_u(
    trace: Trace,
    segmentation: Segmentation,
    accuracy: AccuracyClass,
    band: CurrentBand | None,
    estimated: bool = True,
) -> ChannelU:
    """The channel's standard uncertainties for this record. ``estimated``: the rule set
    has the zero offset estimated at rest (and taken out when it stands out of its scatter),
    so the estimate, not the class, says how well the offset is known."""
    range_a = with_range(accuracy, trace).current_range_a
    assert range_a is not None
    class_offset_i = accuracy.current_pct_of_range / 100.0 * range_a / SQRT3
    if band is None or not estimated:
        offset_i = class_offset_i
    elif band.corrected:
        offset_i = band.offset_u_a  # what the estimate taken out leaves uncertain
    else:  # estimated, and within its own scatter of zero: left in, and known that well
        offset_i = math.hypot(band.offset_a, band.offset_u_a)
    rest_v = _rest_rows(trace, segmentation.steps)
    noise_v = _noise(rest_v if len(rest_v) >= 20 else trace.voltage_v)
    noise_t = resolution_t = 0.0
    if trace.temperature_c is not None:
        noise_t = _noise(trace.temperature_c)
        resolution_t = _resolution(trace.temperature_c)
    return ChannelU(
        gain_v=accuracy.voltage_pct_of_reading / 100.0 / SQRT3,
        offset_v=accuracy.voltage_mv / 1000.0 / SQRT3,
        gain_i=accuracy.current_pct_of_reading / 100.0 / SQRT3,
        offset_i=offset_i,
        temperature=accuracy.temperature_k / SQRT3,
        time=accuracy.time_ppm * 1e-6 / SQRT3,
        noise_v=noise_v,
        noise_i=band.noise_a if band is not None else 0.0,
        noise_t=noise_t,
        resolution_v=_resolution(trace.voltage_v),
        resolution_t=resolution_t,
        range_a=range_a,
    )


@dataclass(frozen=True, slots=True)
class _Charge:
    """One direction of one cycle: its charge (Ah), duration (s), noise on it (Ah), rows."""

    ah: float
    seconds: float
    noise_ah: float
    rows: int
    switch_ah: float = 0.0  # what the steps' first rows, taken mid-switch, may add or take


def _charge(trace: Trace, steps: tuple[Step, ...], indices: tuple[int, ...], u: ChannelU) -> _Charge:
    ah = sum(steps[i].capacity_ah for i in indices)
    seconds = sum(steps[i].duration_s for i in indices)
    dt2 = switch2 = 0.0
    rows = 0
    for i in indices:
        step = steps[i]
        t = trace.time_s[step.start : step.stop]
        rows += len(t)
        if len(t) > 1:
            gaps = np.diff(t)  # the squared intervals between the step's rows, summed
            dt2 += float(gaps @ gaps)
        switched = step.index == 0 or steps[step.index - 1].kind is not step.kind
        if len(t) >= 5 and switched:  # a constant-voltage part follows its charge smoothly
            # a step's first row shows the switch under way (an overshoot, a ramp): how far
            # it lies from the rows that follow, over the time it stands for, is what it may
            # have added or taken; one such reading per switch (Type A, JCGM 100:2008 4.2)
            amps = trace.current_a[step.start : step.start + 4]
            jump = float(amps[0]) - median(amps[1:])
            weight = float(weights_between(trace.time_s, step.start, step.start + 1)[0])
            # less what noise alone gives that difference: the row's own and the median
            # of three's (0.449 of a row's variance: Kenney and Keeping 1962)
            switch2 += max(0.0, jump * jump - 1.449 * u.noise_i**2) * weight**2
    return _Charge(
        ah, seconds, u.noise_i * math.sqrt(dt2) / 3600.0, rows, math.sqrt(switch2) / 3600.0
    )


def _cv_start(trace: Trace, steps: tuple[Step, ...], cv: Step, u: ChannelU) -> float:
    """The standard uncertainty (s) of the row at which a CV tail is seen to begin.

    A tail that follows the constant current of its own step begins at the first row whose
    |I| falls below CV_CURRENT_FRACTION of that current (segmentation._split_cv): noise on
    the rows near that level can make an earlier row the first, or a later one. Row r is
    seen below with probability q_r = Phi((level - I_r) / sigma), so the first row below is
    row j with probability q_j times (1 - q_r) of every row before it, and the spread of the
    times of those rows is the start's (the noise propagated through the comparison as it
    is made, not through a slope: a row's current may change by more than its noise from
    one row to the next). sigma: the current's noise, and the offset's share of the level
    (1 - CV_CURRENT_FRACTION of it; the rest, and the current's gain, cancel in the
    comparison).

    The true currents stand for I_r: the constant current for the rows before the start
    still at it, a parabola through the decaying rows around the start where they lie on one
    to within their noise, else the recorded rows. The end, the first row of the next step,
    and a CV step the record's step column begins, are where the record puts them: the time
    between rows is the definition's, not an error of the channel (docs/metrics.md).
    """
    before = steps[cv.index - 1] if cv.index > 0 else None
    if before is None or before.kind is not cv.kind or before.mode is not StepMode.CC:
        return 0.0
    if cv.program_step is not None and cv.program_step != before.program_step:
        return 0.0  # the program's own boundary
    sigma = math.hypot(u.noise_i, (1.0 - CV_CURRENT_FRACTION) * u.offset_i)
    if sigma <= 0:
        return 0.0
    flat = trace.current_a[before.start : before.stop]
    constant = median(np.abs(flat[:: max(1, -(-len(flat) // 2048))]))
    level = CV_CURRENT_FRACTION * constant
    # the rows around the start: CV_FIT_ROWS either side, or as many as lie within 6 sigma of
    # the level (a slow tail on a noisy channel), of at most CV_START_ROWS either side
    lo = max(before.start, cv.start - CV_START_ROWS)
    hi = min(cv.stop, cv.start + CV_START_ROWS + 1)
    around = np.abs(trace.current_a[lo:hi])
    rows = max(CV_FIT_ROWS, int(np.count_nonzero(np.abs(around - level) <= 6.0 * sigma)))
    lo, hi = max(before.start, cv.start - rows), min(cv.stop, cv.start + rows + 1)
    # only rows of the held tail can be its first (segmentation._split_cv): from the last row
    # before the start that is out of the hold
    volts = trace.voltage_v[before.start : cv.stop]
    if cv.kind is StepKind.CHARGE:
        out = trace.voltage_v[lo : cv.start] < float(volts.max()) - CV_BAND_V
    else:
        out = trace.voltage_v[lo : cv.start] > float(volts.min()) + CV_BAND_V
    if out.any():
        lo += len(out) - int(np.argmax(out[::-1]))
    amps = np.abs(trace.current_a[lo:hi])
    times = trace.time_s[lo:hi]
    # The true currents are not known, only the recorded ones, and a recorded row's own noise
    # would count twice (once in the row, once in q). So a row before the start within 4 sigma
    # of the constant current is at the constant current (known from the step's median);
    # where the decaying rows around the start lie on a parabola to within their noise, its
    # values stand for them (each known to about a third of a row's noise)
    k0 = cv.start - lo
    steady = np.flatnonzero(amps[:k0] >= constant - 4.0 * sigma)
    amps = amps.copy()
    amps[steady] = constant
    # decaying already, and near the start or within 6 sigma of the level
    fit = np.flatnonzero((amps < constant - 4.0 * sigma) & (
        (np.abs(np.arange(len(amps)) - k0) <= CV_FIT_ROWS) | (np.abs(amps - level) <= 6.0 * sigma)
    ))
    if len(fit) >= 7:
        x = (times[fit] - times[k0]) / max(float(np.ptp(times[fit])), 1e-9)
        design = np.vander(x, 3, increasing=True)
        curve = design @ np.linalg.solve(design.T @ design, design.T @ amps[fit])
        misfit = amps[fit] - curve
        if float(misfit @ misfit) <= (2.0 * sigma) ** 2 * (len(fit) - 3):
            amps[fit] = curve
    first, stays = np.zeros(len(amps)), 1.0
    for k, gap in enumerate((level - amps).tolist()):
        q = 0.5 * math.erfc(-gap / sigma / math.sqrt(2.0))  # Phi(gap / sigma): seen below
        first[k] = stays * q
        stays *= 1.0 - q
        if stays < 1e-12:
            break
    total = float(first.sum())
    if total <= 0:
        return 0.0
    mean = float(first @ times) / total
    return math.sqrt(max(0.0, float(first @ (times - mean) ** 2) / total))


def _plateau_lengths(
    metrics: CellMetrics,
    settings: PlateauSettings,
    noise_v: float,
    rows: int,
    have: Callable[[str], float | None],
) -> dict[str, Budget]:
    """The budgets of the plateau lengths: where each end falls on the capacity grid, and
    where voltage noise moves it.

    A plateau ends where the smoothed |dV/dq| crosses the flatness threshold
    (plateaus.find_plateaus). Noise of sigma_V per row, averaged into grid cells of m rows
    each, gives the Savitzky-Golay slope a standard deviation sigma_s = sigma_V ||h|| / sqrt(m)
    (h the filter's derivative coefficients: a linear filter of independent values, JCGM
    100:2008 5.1.2), and an end moves by sigma_s over the rate at which the slope changes
    there (the filter's second derivative; at most the plateau's length). An end on the
    grid's first or last point stays there. A total of 0 (no plateau) is exact when no run of
    the curve, merged as the finder merges them, is within 2 sigma_s of the threshold for
    min_length_pct: then noise cannot make one; otherwise a plateau as long as that run may
    appear, a rectangular distribution from 0 to its length (JCGM 100:2008 4.3.7).
    """
    curve = metrics.grading_curve
    assert curve is not None
    points = len(curve.y)
    step = float(curve.x[1] - curve.x[0])
    window = odd_window(settings.smoothing_pct, step, points)
    # the derivative filter's coefficients (kept: the ones the plateau finder's filter uses)
    gain = float(np.linalg.norm(savgol_plan(window, SG_ORDER, 1, step)[0]))
    # mV per %: the slope's standard deviation
    sigma_s = 1000.0 * noise_v * gain / math.sqrt(max(rows, 1) / (points - 1))
    grid = Component("grid", 100.0 / (points - 1) / SQRT12)  # one end: a half-step, F.2.2.1

    def ends(p: Plateau) -> list[float]:
        moved = []
        for at in (p.start_pct, p.end_pct):
            k = int(round(at / step))
            if 0 < k < points - 1 and sigma_s > 0:
                rate = abs(float(bend[k]))
                moved.append(min(sigma_s / rate, p.length_pct) if rate > 0 else p.length_pct)
        return moved

    def budget(name: str, plateaus: tuple[Plateau, ...]) -> Budget:
        moved = [x for p in plateaus for x in ends(p)]
        return Budget(name, (
            Component("grid", grid.u * math.sqrt(2 * len(plateaus))),
            Component("ends under voltage noise", math.sqrt(sum(x * x for x in moved))),
        ))

    out: dict[str, Budget] = {}
    if metrics.plateaus:
        bend = savgol(curve.y, window, SG_ORDER, deriv=2, delta=step) * 1000.0
        main = max(metrics.plateaus, key=lambda p: p.length_pct)
        if have("main_plateau_length_pct") is not None:
            out["main_plateau_length_pct"] = budget("main_plateau_length_pct", (main,))
        if have("total_plateau_length_pct") is not None:
            out["total_plateau_length_pct"] = budget("total_plateau_length_pct", metrics.plateaus)
    elif have("total_plateau_length_pct") is not None:
        slope = savgol(curve.y, window, SG_ORDER, deriv=1, delta=step) * 1000.0
        near = np.abs(slope) <= settings.flatness_mv_per_pct + 2.0 * sigma_s
        # the runs merged as the plateau finder merges them
        longest = max(((b - a) * step for a, b in merged_runs(near, curve.x, settings.merge_gap_pct)),
                      default=0.0)
        may = longest if longest >= settings.min_length_pct else 0.0
        out["total_plateau_length_pct"] = Budget("total_plateau_length_pct", (
            Component("a plateau noise may make", may / SQRT12),
        ))
    return out


def _efficiency(name: str, d: _Charge, c: _Charge, u: ChannelU) -> Budget:
    eta = d.ah / c.ah
    return Budget(name, (
        # d eta / d offset = -(T_d + eta T_c) / Q_c: the offset takes from the discharge
        # and adds to the charge; gain and time base cancel in the ratio
        Component("current offset", u.offset_i * (d.seconds + eta * c.seconds) / 3600.0 / c.ah),
        Component("current noise", eta * math.hypot(d.noise_ah / d.ah, c.noise_ah / c.ah)),
        Component("step switches", eta * math.hypot(d.switch_ah / d.ah, c.switch_ah / c.ah)),
    ))


def _extreme(noise: float, values: FloatArray, top: float, *, largest: bool) -> float:
    """The spread of the largest (smallest) of the readings within 3 sigma of ``top``."""
    if noise <= 0:
        return 0.0
    near = values >= top - 3 * noise if largest else values <= top + 3 * noise
    n = int(np.count_nonzero(near))
    return GUMBEL * noise / math.sqrt(2.0 * math.log(n)) if n >= 3 else noise


def _voltage_reading(name: str, volts: float, u: ChannelU, extra: tuple[Component, ...]) -> Budget:
    return Budget(name, (
        Component("voltage gain", abs(volts) * u.gain_v),
        Component("voltage offset", u.offset_v),
        Component("voltage resolution", u.resolution_v / SQRT12),
        *extra,
    ))


def budgets(
    trace: Trace,
    segmentation: Segmentation,
    metrics: CellMetrics,
    accuracy: AccuracyClass,
    band: CurrentBand | None = None,
    plateau: PlateauSettings | None = None,
    *,
    offset_estimated: bool = True,
) -> dict[str, Budget]:
    """The budget of every metric measured on this record that has an uncertainty
    (``offset_estimated``: the rule set's zero_offset is "corrected", :func:`channel_u`)."""
    u = channel_u(trace, segmentation, accuracy, band, offset_estimated)
    values = metrics.values
    steps = segmentation.steps
    by_index: dict[int, Cycle] = {c.index: c for c in segmentation.cycles}
    out: dict[str, Budget] = {}

    def have(name: str) -> float | None:
        value = values.get(name)
        return None if value is None or not math.isfinite(value) else float(value)

    first = by_index.get(1)
    if first is not None and first.complete and have("first_cycle_efficiency") is not None:
        c = _charge(trace, steps, first.charge_steps, u)
        d = _charge(trace, steps, first.discharge_steps, u)
        if c.ah > 0 and d.ah > 0:
            out["first_cycle_efficiency"] = _efficiency("first_cycle_efficiency", d, c, u)
            lost = abs(c.ah - d.ah)
            out["irreversible_capacity_Ah"] = Budget("irreversible_capacity_Ah", (
                Component("current gain", lost * u.gain_i),
                # the offset adds to the charge and takes from the discharge: both ways it widens
                Component("current offset", u.offset_i * (c.seconds + d.seconds) / 3600.0),
                Component("time base", lost * u.time),
                Component("current noise", math.hypot(c.noise_ah, d.noise_ah)),
                Component("step switches", math.hypot(c.switch_ah, d.switch_ah)),
            ))

    grading = by_index.get(metrics.grading_cycle) if metrics.grading_cycle is not None else None
    if grading is not None and grading.complete:
        c = _charge(trace, steps, grading.charge_steps, u)
        d = _charge(trace, steps, grading.discharge_steps, u)
        q = have("grading_capacity_Ah")
        if q is not None:
            out["grading_capacity_Ah"] = Budget("grading_capacity_Ah", (
                Component("current gain", q * u.gain_i),
                Component("current offset", u.offset_i * d.seconds / 3600.0),
                Component("time base", q * u.time),
                Component("current noise", d.noise_ah),
                Component("step switches", d.switch_ah),
            ))
        if have("grading_coulombic_efficiency") is not None and c.ah > 0 and d.ah > 0:
            out["grading_coulombic_efficiency"] = _efficiency(
                "grading_coulombic_efficiency", d, c, u
            )
        energy, mean_v = have("grading_energy_Wh"), have("grading_mean_voltage_V")
        if energy is not None and mean_v is not None and q is not None:
            out["grading_energy_Wh"] = Budget("grading_energy_Wh", (
                Component("voltage gain", energy * u.gain_v),
                Component("voltage offset", q * u.offset_v),
                Component("current gain", energy * u.gain_i),
                Component("current offset", mean_v * u.offset_i * d.seconds / 3600.0),
                Component("time base", energy * u.time),
                Component("current noise", mean_v * d.noise_ah),
                Component("step switches", mean_v * d.switch_ah),
            ))
            # gain and offset of the current, and the time base, cancel in E / Q
            out["grading_mean_voltage_V"] = _voltage_reading(
                "grading_mean_voltage_V", mean_v, u,
                (Component("voltage noise", u.noise_v / math.sqrt(max(d.rows, 1))),),
            )
        cv = have("grading_cv_duration_s")
        if cv is not None:
            starts = [_cv_start(trace, steps, steps[i], u) for i in grading.charge_steps
                      if steps[i].mode is StepMode.CV]
            out["grading_cv_duration_s"] = Budget("grading_cv_duration_s", (
                Component("time base", cv * u.time),
                Component("start under current noise", math.sqrt(sum(x * x for x in starts))),
            ))
        dcir = have("dcir_mOhm")
        if dcir is not None and d.seconds > 0:
            amps = d.ah * 3600.0 / d.seconds  # the discharge's mean current
            out["dcir_mOhm"] = Budget("dcir_mOhm", (
                Component("voltage gain", dcir * u.gain_v),  # the voltage offset cancels in the step
                Component("current gain", dcir * u.gain_i),
                Component("current offset", dcir * u.offset_i / amps),
                Component(
                    "voltage noise", u.noise_v * metrics.scatter.get("dcir_mOhm_per_V_of_noise", 0.0)
                ),
                Component(
                    "voltage resolution", math.sqrt(2.0) * u.resolution_v / SQRT12 / amps * 1000.0
                ),
            ))
        main_v = have("main_plateau_voltage_V")
        if main_v is not None and metrics.plateaus:
            longest = max(metrics.plateaus, key=lambda p: p.length_pct)
            rows = max(1, round(d.rows * longest.length_pct / 100.0))
            out["main_plateau_voltage_V"] = _voltage_reading(
                "main_plateau_voltage_V", main_v, u,
                (Component("median's scatter", MEDIAN_EFFICIENCY * u.noise_v / math.sqrt(rows)),),
            )
        settings = plateau or PlateauSettings()
        if metrics.grading_curve is not None and len(metrics.grading_curve.y) >= 5:
            out.update(_plateau_lengths(metrics, settings, u.noise_v, d.rows, have))

    drift = have("rest_voltage_drift_mV_per_h")
    if drift is not None:
        out["rest_voltage_drift_mV_per_h"] = Budget("rest_voltage_drift_mV_per_h", (
            Component("fit scatter", metrics.scatter.get("rest_voltage_drift_mV_per_h", 0.0)),
            Component("voltage gain", abs(drift) * u.gain_v),  # the offset cancels in a slope
            Component("time base", abs(drift) * u.time),
        ))
    top = have("max_charge_voltage_V")
    if top is not None:
        out["max_charge_voltage_V"] = _voltage_reading("max_charge_voltage_V", top, u, (
            Component("largest of noisy readings",
                      _extreme(u.noise_v, trace.voltage_v, top, largest=True)),
        ))
    bottom = have("min_discharge_voltage_V")
    if bottom is not None:
        out["min_discharge_voltage_V"] = _voltage_reading("min_discharge_voltage_V", bottom, u, (
            Component("smallest of noisy readings",
                      _extreme(u.noise_v, trace.voltage_v, bottom, largest=False)),
        ))
    hottest = have("max_temperature_C")
    if hottest is not None and trace.temperature_c is not None:
        out["max_temperature_C"] = Budget("max_temperature_C", (
            Component("temperature class", u.temperature),
            Component("temperature resolution", u.resolution_t / SQRT12),
            Component("largest of noisy readings",
                      _extreme(u.noise_t, trace.temperature_c, hottest, largest=True)),
        ))
    return out


def expanded(found: dict[str, Budget]) -> dict[str, float]:
    """Metric name -> expanded uncertainty U (k = 2)."""
    return {name: budget.expanded for name, budget in found.items()}
