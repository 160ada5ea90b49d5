"""Measure one cell: per-cycle and per-cell metrics and the grading discharge's plateaus.

Pure: a Trace, its Segmentation and the rule set's measurement parameters in,
CellMetrics out. Every definition is the one docs/metrics.md gives; the names of the
cell-level values are the keys of pipeline.judge.metricdefs. Which cycle is graded is
program.py's choice; judging the values is evaluate.py's job.
"""

from __future__ import annotations

import dataclasses
import math
import warnings

import numpy as np

from pipeline.acceptance.rules import Program
from pipeline.judge.medians import median
from pipeline.judge.metricdefs import FORMATION, GRADING, METRIC_NAMES, judged_on
from pipeline.judge.plateaus import find_plateaus
from pipeline.judge.program import (
    FIRST_CYCLE_METRICS,
    GRADING_METRICS,
    INCOMPLETE,
    check_formation,
    choose_grading,
    final_rest,
    stage_program,
)
from pipeline.judge.rest_band import MEDIAN_EFFICIENCY
from pipeline.judge.segmentation import weights_between
from pipeline.judge.thin import thin_series, thin_series_over
from pipeline.model import (
    CellMetrics,
    Curve,
    Cycle,
    CycleMetrics,
    FloatArray,
    Note,
    Plateau,
    PlateauSettings,
    PulseView,
    RecordView,
    RestView,
    Segmentation,
    SourceRef,
    Step,
    StepKind,
    StepMode,
    StepSpan,
    Trace,
)

# Shortest stretch of final rest, after the relaxation time, that gives a drift
# slope worth judging (common practice, a proposal: ten minutes and ten samples).
MIN_DRIFT_S = 600.0
MIN_DRIFT_ROWS = 10
# DCIR: the voltage before the pulse is the median of the rest's last 60 s, and the
# voltage in the pulse a line fitted within 5 s of the pulse time, so that 1 mV of
# voltage noise moves a 30 mV step by about 2 %, not 5 % (common practice, a proposal).
PLATEAU_METRICS = (
    "plateau_count",
    "main_plateau_voltage_V",
    "main_plateau_length_pct",
    "total_plateau_length_pct",
)
# Points per curve kept for the certificate's evidence plots: finer than a page shows.
VIEW_POINTS = 800
DCIR_REST_S = 60.0
DCIR_FIT_S = 5.0
# Times are compared to within this: finer than any cycler's time stamps (0.1 s at best,
# common practice), coarser than what a time base within its class moves a sample by.
TIME_TOLERANCE_S = 0.01


def _rows(values: FloatArray, steps: tuple[Step, ...], indices: tuple[int, ...]) -> FloatArray:
    """``values`` on the rows of the steps ``indices``, in that order: the steps' slices
    joined (what indexing with their row numbers gives, without building those); one
    step's rows are its slice of ``values``, read-only as a Trace's arrays are, not a copy."""
    if not indices:
        return values[:0].copy()
    if len(indices) == 1:
        return values[steps[indices[0]].start : steps[indices[0]].stop]
    return np.concatenate([values[steps[i].start : steps[i].stop] for i in indices])


def _max(values: FloatArray) -> float | None:
    """The largest value that is not NaN, or None when there is none."""
    return _ignoring_nan(np.fmax, values)


def _min(values: FloatArray) -> float | None:
    """The smallest value that is not NaN, or None when there is none."""
    return _ignoring_nan(np.fmin, values)


def _ignoring_nan(pick: np.ufunc, values: FloatArray) -> float | None:
    # what np.nanmax (np.nanmin) computes for an array of floats, fmax.reduce, with its
    # all-NaN case (NaN) as None: one pass, no mask of NaNs the size of the values
    if len(values) == 0:
        return None
    found = float(pick.reduce(values))
    return None if math.isnan(found) else found


def measure_cycle(trace: Trace, steps: tuple[Step, ...], cycle: Cycle) -> CycleMetrics:
    """Per-cycle metrics (docs/metrics.md): capacities (Ah), efficiency, energy (Wh), voltages, CV time."""
    charge_ah = sum(steps[i].capacity_ah for i in cycle.charge_steps)
    discharge_ah = (
        sum(steps[i].capacity_ah for i in cycle.discharge_steps) if cycle.discharge_steps else None
    )
    energy_wh = (
        sum(steps[i].energy_wh for i in cycle.discharge_steps) if cycle.discharge_steps else None
    )
    first = steps[min(cycle.charge_steps + cycle.discharge_steps)]
    last = steps[max(cycle.charge_steps + cycle.discharge_steps)]
    temperature = None
    if trace.temperature_c is not None:
        temperature = _max(trace.temperature_c[first.start : last.stop])
    return CycleMetrics(
        index=cycle.index,
        charge_capacity_ah=charge_ah,
        discharge_capacity_ah=discharge_ah,
        coulombic_efficiency=(discharge_ah / charge_ah)
        if discharge_ah is not None and charge_ah > 0
        else None,
        discharge_energy_wh=energy_wh,
        mean_discharge_voltage_v=(energy_wh / discharge_ah)
        if energy_wh is not None and discharge_ah
        else None,
        max_charge_voltage_v=_max(_rows(trace.voltage_v, steps, cycle.charge_steps)),
        min_discharge_voltage_v=_min(_rows(trace.voltage_v, steps, cycle.discharge_steps)),
        cv_duration_s=sum(
            steps[i].duration_s for i in cycle.charge_steps if steps[i].mode is StepMode.CV
        ),
        max_temperature_c=temperature,
    )


def _grading_start(steps: tuple[Step, ...], cycle: Cycle) -> tuple[Step, Step] | None:
    """The rest before the grading discharge and that discharge's first step, if it starts from rest."""
    first = steps[cycle.discharge_steps[0]]
    if first.index == 0 or steps[first.index - 1].kind is not StepKind.REST:
        return None
    return steps[first.index - 1], first


def dcir_mohm(
    trace: Trace, rest: Step, discharge: Step, pulse_s: float
) -> tuple[float | None, Note | None]:
    """DC resistance at the rest-to-discharge transition (mOhm), or None with a note
    (:func:`dcir_reading`)."""
    value, note, _, _ = dcir_reading(trace, rest, discharge, pulse_s)
    return value, note


def _median_gain(n: int) -> float:
    """How much of one row's noise the median of ``n`` rows keeps: sqrt(pi / 2) / sqrt(n),
    the median's efficiency for normal noise (rest_band.MEDIAN_EFFICIENCY)."""
    return MEDIAN_EFFICIENCY / math.sqrt(n) if n > 0 else 1.0


def fit_line(x: FloatArray, y: FloatArray) -> tuple[float, float]:
    """(slope, intercept) of the least-squares line through (x, y): ``np.polyfit(x, y, 1)``,
    the very same numbers.

    polyfit scales the two columns of its design, x and 1, to unit length and solves with
    np.linalg.lstsq (LAPACK's gelsd); so does this. polyfit finds each column's length by
    summing the squares down the columns of the two-column design, a strided sum that on a
    long rest costs more than the solve itself; that sum goes row after row (numpy reduces
    along the outer axis so), the order a cumulative sum of x squared adds in. Checked
    against np.polyfit in the tests.
    """
    x = np.asarray(x, dtype=np.float64) + 0.0  # polyfit's own copies: -0.0 becomes 0.0
    y = np.asarray(y, dtype=np.float64) + 0.0
    n = len(x)
    scale = np.array([math.sqrt(float(np.cumsum(x * x)[-1])), math.sqrt(float(n))])
    design = np.empty((n, 2))
    np.divide(x, scale[0], out=design[:, 0])
    design[:, 1] = 1.0 / scale[1]
    solution, _, rank, _ = np.linalg.lstsq(design, y, rcond=n * np.finfo(np.float64).eps)
    if rank != 2:  # as polyfit warns
        warnings.warn("Polyfit may be poorly conditioned", np.exceptions.RankWarning, stacklevel=2)
    slope, intercept = solution / scale
    return float(slope), float(intercept)


def _intercept_gain(x: FloatArray) -> float:
    """How much of one row's noise a least-squares line's value at x = 0 keeps:
    sqrt(1/n + mean(x)^2 / Sxx) (Draper and Smith 1998, 3.1)."""
    n = len(x)
    mean = x.mean()
    sxx = float(np.sum((x - mean) ** 2))
    return math.sqrt(1.0 / n + float(mean) ** 2 / sxx) if n >= 2 and sxx > 0 else 1.0


def dcir_reading(
    trace: Trace, rest: Step, discharge: Step, pulse_s: float
) -> tuple[float | None, Note | None, float, PulseView | None]:
    """DC resistance at the rest-to-discharge transition from ``rest`` into ``discharge`` (mOhm).

    (V just before the transition - V ``pulse_s`` into the discharge) / |I|. Each of the
    three is read so that one noisy or spiking sample cannot move it: V before is the
    median of the rest's last DCIR_REST_S seconds; V in the pulse is a straight line
    fitted through the discharge samples within DCIR_FIT_S (or one sampling interval) of
    the pulse time, leaving out its first half where the switch shows, read at that
    time; |I| is the median over the same rows. None with a
    note when the discharge is shorter than the pulse or sampled too coarsely for it.
    10 s is the most common pulse (common practice).

    Also returns the pulse as drawn on a failed cell's certificate (None when not
    measured), and how many mOhm of DCIR one volt of the voltage's row-to-row noise makes,
    through the rest's median and the line's value at the pulse time (0 when not
    measured): the noise itself is estimated on many more rows than these
    (uncertainty.py), a pooled estimate (JCGM 100:2008 4.2.4). Times are compared to
    TIME_TOLERANCE_S, so that a clock within its class never moves a sample across the
    edge of a window.
    """
    t0 = float(trace.time_s[rest.stop - 1])
    t = trace.time_s[discharge.start : discharge.stop]
    v = trace.voltage_v[discharge.start : discharge.stop]
    where = trace.where(discharge.start)
    if t[-1] < t0 + pulse_s:
        return None, Note(
            "dcir_pulse_too_short",
            f"the grading discharge lasts {t[-1] - t0:.0f} s, shorter than the "
            f"{pulse_s:g} s DCIR pulse; DCIR not measured",
            where,
            ("dcir_mOhm",),
        ), 0.0, None
    in_pulse = t <= t0 + pulse_s
    if not in_pulse.any():
        return None, Note(
            "dcir_sampling_too_coarse",
            f"the record is sampled every {t[0] - t0:.0f} s at the start of the grading "
            f"discharge, coarser than the {pulse_s:g} s DCIR pulse; DCIR not measured",
            where,
            ("dcir_mOhm",),
        ), 0.0, None
    rest_t = trace.time_s[rest.start : rest.stop]
    rest_v = trace.voltage_v[rest.start : rest.stop]
    before = rest_v[rest_t >= t0 - DCIR_REST_S - TIME_TOLERANCE_S]
    v0 = median(before)
    gain_v1 = 1.0
    interval = median(np.diff(t)) if len(t) > 1 else 0.0
    half = max(DCIR_FIT_S, 1.01 * interval)
    # the rows of the switch itself (spike, ramp) are left out of the fit
    half += TIME_TOLERANCE_S
    near = (np.abs(t - (t0 + pulse_s)) <= half) & (t >= t0 + 0.5 * pulse_s - TIME_TOLERANCE_S)
    if np.count_nonzero(near) >= 2 and np.ptp(t[near]) > 0:
        v1 = fit_line(t[near] - (t0 + pulse_s), v[near])[1]  # the line at the pulse time
        gain_v1 = _intercept_gain(t[near] - (t0 + pulse_s))
    else:
        v1 = float(np.interp(t0 + pulse_s, t, v))
    amps = np.abs(trace.current_a[discharge.start : discharge.stop])
    # the current of the pulse away from the switch's overshoot or ramp
    settled = (t >= t0 + 0.5 * pulse_s - TIME_TOLERANCE_S) & (t <= t0 + pulse_s + half)
    current = median(amps[settled] if settled.any() else amps[in_pulse])
    per_volt = math.hypot(_median_gain(len(before)), gain_v1) / current * 1000.0
    # what the certificate draws: the rest's last minute and the discharge to past the fit
    shown = slice(
        rest.start + int(np.searchsorted(rest_t, t0 - DCIR_REST_S - TIME_TOLERANCE_S)),
        discharge.start + int(np.searchsorted(t, t0 + pulse_s + 2 * half, side="right")),
    )
    seconds, volts = thin_series(trace.time_s[shown] - t0, trace.voltage_v[shown], VIEW_POINTS)
    fitted = t[near] - t0 if np.count_nonzero(near) >= 2 else np.asarray([pulse_s, pulse_s])
    view = PulseView(
        Curve(seconds, volts), float(v0), v1, pulse_s, DCIR_REST_S,
        float(fitted.min()), float(fitted.max()), float(current),
    )
    return (v0 - v1) / current * 1000.0, None, per_volt, view


def rest_view(trace: Trace, rest: Step, relax_s: float) -> tuple[RestView | None, Note | None]:
    """The final rest and its drift fit, or None with a note.

    The drift is the least-squares slope of V over the rest after ``relax_s`` (mV/h;
    negative = falling): ``slope_mv_per_h`` of the view, the metric
    ``rest_voltage_drift_mV_per_h``.
    """
    t = trace.time_s[rest.start : rest.stop]
    v = trace.voltage_v[rest.start : rest.stop]
    keep = t >= t[0] + relax_s
    if np.count_nonzero(keep) < MIN_DRIFT_ROWS or t[-1] - (t[0] + relax_s) < MIN_DRIFT_S:
        return None, Note(
            "final_rest_too_short",
            f"the final rest lasts {t[-1] - t[0]:.0f} s; after the {relax_s:g} s relaxation "
            f"time too little is left to measure the voltage drift",
            trace.where(rest.start),
            ("rest_voltage_drift_mV_per_h",),
        )
    kept, v_fit = t[keep], v[keep]
    t_fit = kept - kept[0]
    slope_v_per_s, intercept_v = fit_line(t_fit, v_fit)
    # the slope's standard error from the residuals (Draper and Smith 1998, 3.1)
    resid = v_fit - (slope_v_per_s * t_fit + intercept_v)
    sxx = float(np.sum((t_fit - t_fit.mean()) ** 2))
    slope_u = math.sqrt(float(resid @ resid) / (len(t_fit) - 2) / sxx) if sxx > 0 else 0.0
    hours, volts = thin_series((t - t[0]) / 3600.0, v, VIEW_POINTS)
    view = RestView(
        Curve(hours, volts),
        float(kept[0] - t[0]) / 3600.0,
        float(intercept_v),
        float(slope_v_per_s * 3600.0 * 1000.0),
        slope_u * 3600.0 * 1000.0,
    )
    return view, None


def record_view(trace: Trace, steps: tuple[Step, ...]) -> RecordView:
    """The whole record thinned to about VIEW_POINTS points per curve, and where its steps lie."""
    hours = trace.time_s - trace.time_s[0]
    hours /= 3600.0  # in place: one array the size of the record, not two
    start_h = float(trace.time_s[0])
    series = [trace.voltage_v, trace.current_a]
    if trace.temperature_c is not None:
        series.append(trace.temperature_c)
    curves = [Curve(x, y) for x, y in thin_series_over(hours, series, VIEW_POINTS)]
    return RecordView(
        curves[0],
        curves[1],
        curves[2] if trace.temperature_c is not None else None,
        tuple(
            StepSpan((s.start_s - start_h) / 3600.0, (s.end_s - start_h) / 3600.0, s.kind)
            for s in steps
        ),
    )


def grading_discharge(
    trace: Trace, steps: tuple[Step, ...], cycle: Cycle
) -> tuple[FloatArray, FloatArray, float]:
    """q (% of the discharge, rising) and V of a cycle's discharge steps, and its capacity (Ah).

    Capacity accumulates row by row with the trapezoid weights of each step, so
    rests or pauses between the discharge steps add nothing.
    """
    # the same trapezoid weights the steps' capacities were integrated with, so the
    # curve's total is exactly the cycle's discharge capacity (each step's found from
    # the rows around it, not from the whole record's)
    parts = [(steps[i].start, steps[i].stop) for i in cycle.discharge_steps]
    weights = [weights_between(trace.time_s, a, b) for a, b in parts]
    w = weights[0] if len(weights) == 1 else np.concatenate(weights) if weights else np.zeros(0)
    # |I| w / 3600 and the rest below, in place: the same arithmetic, without a new array
    # the size of the discharge for every step of it
    dq = np.abs(_rows(trace.current_a, steps, cycle.discharge_steps))
    dq *= w
    dq /= 3600.0
    total = float(dq.sum())
    q = np.cumsum(dq)
    q -= 0.5 * dq  # each row sits mid-way through the charge it owns
    q *= 100.0 / total if total > 0 else 0.0
    return q, _rows(trace.voltage_v, steps, cycle.discharge_steps), total


def _plateau_values(
    values: dict[str, float | None],
    trace: Trace,
    steps: tuple[Step, ...],
    grading: Cycle,
    settings: PlateauSettings,
) -> tuple[tuple[Plateau, ...], tuple[float, ...], Curve | None, Curve | None, Note | None]:
    q, v, total = grading_discharge(trace, steps, grading)
    if total <= 0 or len(q) < 10:
        note = Note(
            "grading_discharge_too_short",
            "the grading discharge has too few samples to look for plateaus",
            None,
            PLATEAU_METRICS,
        )
        return (), (), None, None, note
    analysis = find_plateaus(q, v, total, settings)
    plateaus = analysis.plateaus
    values["plateau_count"] = float(len(plateaus))
    values["total_plateau_length_pct"] = float(sum(p.length_pct for p in plateaus))
    if plateaus:
        main = max(plateaus, key=lambda p: p.length_pct)
        values["main_plateau_voltage_V"] = main.voltage_v
        values["main_plateau_length_pct"] = main.length_pct
    return plateaus, analysis.ica_peaks_v, analysis.curve, analysis.ica, None


def _first_cycle(
    values: dict[str, float | None],
    trace: Trace,
    cycles: tuple[CycleMetrics, ...],
    finished: bool,
    notes: list[Note],
) -> list[Note]:
    """Fill the first-cycle metrics of ``values`` from cycle 1; a note when it was not finished."""
    if cycles and finished and cycles[0].coulombic_efficiency is not None:
        values["first_cycle_efficiency"] = cycles[0].coulombic_efficiency
        values["irreversible_capacity_Ah"] = cycles[0].charge_capacity_ah - (
            cycles[0].discharge_capacity_ah or 0.0
        )
        return []
    if cycles and not any(n.code == INCOMPLETE for n in notes):
        return [
            Note(
                "first_cycle_unfinished",
                "the record ends before the first cycle's discharge was finished, so the "
                "initial coulombic efficiency is not measured",
                trace.where(len(trace) - 1),
                FIRST_CYCLE_METRICS,
            )
        ]
    return []


def _blame_the_cut(
    notes: list[Note], values: dict[str, float | None], judged: tuple[str, ...] = METRIC_NAMES
) -> list[Note]:
    """A cut record's note also names every metric it left unmeasured that no other note names.

    Only the metrics the record is ``judged`` on: another stage's are not its to measure.
    """
    cut = next((n for n in notes if n.code == INCOMPLETE), None)
    if cut is None:
        return notes
    named = {m for n in notes for m in n.blocks}
    missing = tuple(
        k for k, v in values.items() if v is None and k not in named and k in judged
    )
    whole = dataclasses.replace(cut, blocks=cut.blocks + missing)
    return [whole if n is cut else n for n in notes]


def measure(
    trace: Trace,
    segmentation: Segmentation,
    plateau_settings: PlateauSettings,
    *,
    program: Program | None = None,
    dcir_pulse_s: float = 10.0,
    relax_s: float = 600.0,
    stages: tuple[str, ...] = (FORMATION, GRADING),
) -> CellMetrics:
    """Every metric of one cell; a value that cannot be measured is None, with a note saying why.

    The grading cycle is the one ``program`` names (program.py); a record cut short
    before it gets a note that holds the cell, and its grading metrics stay None.
    A record of one stage (``stages``) holds that stage's part of the program
    (program.stage_program) and is measured on its stage's metrics only: a formation
    record has no grading cycle, a grading record's cycle 1 is its grading cycle and
    never a formation cycle; the other stage's metrics stay None, with no note.
    """
    steps = segmentation.steps
    cycles = tuple(measure_cycle(trace, steps, c) for c in segmentation.cycles)
    program = stage_program(program or Program(), stages)
    if GRADING in stages:
        choice = choose_grading(trace, segmentation, program)
    else:
        choice = check_formation(trace, segmentation, program)
    notes: list[Note] = list(choice.notes)
    values: dict[str, float | None] = dict.fromkeys(METRIC_NAMES)
    scatter: dict[str, float] = {}
    values["cycle_count"] = float(sum(1 for c in segmentation.cycles if c.complete))
    if FORMATION in stages:  # a grading record's cycle 1 is its grading cycle
        notes += _first_cycle(values, trace, cycles, choice.first_cycle_finished, notes)
    charge_v = [c.max_charge_voltage_v for c in cycles if c.max_charge_voltage_v is not None]
    discharge_v = [
        c.min_discharge_voltage_v for c in cycles if c.min_discharge_voltage_v is not None
    ]
    values["max_charge_voltage_V"] = max(charge_v) if charge_v else None
    values["min_discharge_voltage_V"] = min(discharge_v) if discharge_v else None
    if trace.temperature_c is not None:
        values["max_temperature_C"] = _max(trace.temperature_c)
    else:
        notes.append(
            Note(
                "no_temperature_column",
                "the file has no temperature column",
                SourceRef(trace.source),
                ("max_temperature_C",),
            )
        )

    plateaus: tuple[Plateau, ...] = ()
    peaks: tuple[float, ...] = ()
    grading_curve = ica_curve = None
    rest_drawn: RestView | None = None
    pulse: PulseView | None = None
    grading = choice.cycle
    if grading is not None:
        gm = cycles[grading.index - 1]
        values["grading_capacity_Ah"] = gm.discharge_capacity_ah
        values["grading_energy_Wh"] = gm.discharge_energy_wh
        values["grading_mean_voltage_V"] = gm.mean_discharge_voltage_v
        values["grading_coulombic_efficiency"] = gm.coulombic_efficiency
        values["grading_cv_duration_s"] = gm.cv_duration_s
        start = _grading_start(steps, grading)
        if start is None:
            note: Note | None = Note(
                "no_rest_before_grading",
                "the grading discharge does not start from a rest, so DCIR is not measured",
                trace.where(steps[grading.discharge_steps[0]].start),
                ("dcir_mOhm",),
            )
        else:
            values["dcir_mOhm"], note, per_volt, pulse = dcir_reading(trace, *start, dcir_pulse_s)
            if values["dcir_mOhm"] is not None:
                scatter["dcir_mOhm_per_V_of_noise"] = per_volt
        notes += [note] if note else []
        rest, note = final_rest(trace, segmentation, program, grading)
        if rest is not None:
            rest_drawn, note = rest_view(trace, rest, relax_s)
            if rest_drawn is not None:
                values["rest_voltage_drift_mV_per_h"] = rest_drawn.slope_mv_per_h
                scatter["rest_voltage_drift_mV_per_h"] = rest_drawn.slope_u_mv_per_h
        notes += [note] if note else []
        plateaus, peaks, grading_curve, ica_curve, note = _plateau_values(
            values, trace, steps, grading, plateau_settings
        )
        notes += [note] if note else []
    elif not choice.notes and GRADING in stages:
        notes.append(
            Note(
                "no_complete_cycle",
                "no charge followed by a discharge was found, so there is no grading discharge",
                SourceRef(trace.source),
                GRADING_METRICS,
            )
        )
    for key, value in values.items():
        if value is not None and not math.isfinite(value):
            values[key] = None
    notes = _blame_the_cut(notes, values, judged_on(stages))
    return CellMetrics(
        values,
        cycles,
        plateaus,
        peaks,
        grading_curve,
        ica_curve,
        tuple(notes),
        record_view(trace, steps),
        rest_drawn,
        grading.index if grading is not None else None,
        scatter,
        pulse=pulse,
    )
