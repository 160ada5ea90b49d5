"""Measure one cell: per-cycle and per-cell metrics and the grading discharge's plateaus.

Pure: a Trace, its Segmentation and the rule set's measurement parameters in,
CellMetrics out. Every definition is DESIGN.md's ("Metrics"); the names of the
cell-level values are the keys of pipeline.metricdefs. Judging them is evaluate.py's job.
"""

from __future__ import annotations

import math

import numpy as np

from pipeline.metricdefs import METRIC_NAMES
from pipeline.model import (
    CellMetrics,
    Cycle,
    CycleMetrics,
    FloatArray,
    Note,
    Plateau,
    PlateauSettings,
    Segmentation,
    SourceRef,
    Step,
    StepKind,
    StepMode,
    Trace,
)
from pipeline.plateaus import find_plateaus
from pipeline.segmentation import sample_weights

# Shortest stretch of final rest, after the relaxation time, that gives a drift
# slope worth judging (common practice, a proposal: ten minutes and ten samples).
MIN_DRIFT_S = 600.0
MIN_DRIFT_ROWS = 10


def _rows(steps: tuple[Step, ...], indices: tuple[int, ...]) -> np.ndarray:
    if not indices:
        return np.zeros(0, dtype=np.int64)
    return np.concatenate([np.arange(steps[i].start, steps[i].stop) for i in indices])


def _max(values: FloatArray) -> float | None:
    if len(values) == 0 or np.all(np.isnan(values)):
        return None
    return float(np.nanmax(values))


def _min(values: FloatArray) -> float | None:
    if len(values) == 0 or np.all(np.isnan(values)):
        return None
    return float(np.nanmin(values))


def measure_cycle(trace: Trace, steps: tuple[Step, ...], cycle: Cycle) -> CycleMetrics:
    """DESIGN.md per-cycle metrics: capacities (Ah), efficiency, energy (Wh), voltages, CV time."""
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
        max_charge_voltage_v=_max(trace.voltage_v[_rows(steps, cycle.charge_steps)]),
        min_discharge_voltage_v=_min(trace.voltage_v[_rows(steps, cycle.discharge_steps)]),
        cv_duration_s=sum(
            steps[i].duration_s for i in cycle.charge_steps if steps[i].mode is StepMode.CV
        ),
        max_temperature_c=temperature,
    )


def dcir_mohm(
    trace: Trace, steps: tuple[Step, ...], pulse_s: float
) -> tuple[float | None, Note | None]:
    """DC resistance at the last rest-to-discharge transition (mOhm).

    (V at the last rest row - V ``pulse_s`` later, interpolated in the discharge) / mean |I|
    over that pulse. None with a note when there is no such transition or the
    discharge is shorter than the pulse. 10 s is the common pulse (REFERENCE.md 1.6).
    """
    for k in range(len(steps) - 1, 0, -1):
        rest, dis = steps[k - 1], steps[k]
        if rest.kind is StepKind.REST and dis.kind is StepKind.DISCHARGE:
            t0 = float(trace.time_s[rest.stop - 1])
            v0 = float(trace.voltage_v[rest.stop - 1])
            t = trace.time_s[dis.start : dis.stop]
            if t[-1] < t0 + pulse_s:
                return None, Note(
                    "dcir_pulse_too_short",
                    f"the last discharge after a rest lasts {t[-1] - t0:.0f} s, shorter than the "
                    f"{pulse_s:g} s DCIR pulse; DCIR not measured",
                    SourceRef(trace.source, trace.line_of(dis.start)),
                    ("dcir_mOhm",),
                )
            in_pulse = t <= t0 + pulse_s
            if not in_pulse.any():
                return None, Note(
                    "dcir_sampling_too_coarse",
                    f"the record is sampled every {t[0] - t0:.0f} s at the last rest-to-discharge "
                    f"transition, coarser than the {pulse_s:g} s DCIR pulse; DCIR not measured",
                    SourceRef(trace.source, trace.line_of(dis.start)),
                    ("dcir_mOhm",),
                )
            v1 = float(np.interp(t0 + pulse_s, t, trace.voltage_v[dis.start : dis.stop]))
            current = float(np.mean(np.abs(trace.current_a[dis.start : dis.stop][in_pulse])))
            return (v0 - v1) / current * 1000.0, None
    return None, None


def rest_drift_mv_per_h(
    trace: Trace, steps: tuple[Step, ...], relax_s: float
) -> tuple[float | None, Note | None]:
    """Least-squares slope of V over the final rest step after ``relax_s`` (mV/h); negative = falling."""
    rests = [s for s in steps if s.kind is StepKind.REST]
    if not rests:
        return None, None
    rest = rests[-1]
    t = trace.time_s[rest.start : rest.stop]
    v = trace.voltage_v[rest.start : rest.stop]
    keep = t >= t[0] + relax_s
    if np.count_nonzero(keep) < MIN_DRIFT_ROWS or t[-1] - (t[0] + relax_s) < MIN_DRIFT_S:
        return None, Note(
            "final_rest_too_short",
            f"the final rest lasts {t[-1] - t[0]:.0f} s; after the {relax_s:g} s relaxation "
            f"time too little is left to measure the voltage drift",
            SourceRef(trace.source, trace.line_of(rest.start)),
            ("rest_voltage_drift_mV_per_h",),
        )
    slope_v_per_s = np.polyfit(t[keep] - t[keep][0], v[keep], 1)[0]
    return float(slope_v_per_s * 3600.0 * 1000.0), None


def grading_discharge(
    trace: Trace, steps: tuple[Step, ...], cycle: Cycle
) -> tuple[FloatArray, FloatArray, float]:
    """q (% of the discharge, rising) and V of a cycle's discharge steps, and its capacity (Ah).

    Capacity accumulates row by row with the trapezoid weights of each step, so
    rests or pauses between the discharge steps add nothing.
    """
    rows = _rows(steps, cycle.discharge_steps)
    # the same trapezoid weights the steps' capacities were integrated with, so the
    # curve's total is exactly the cycle's discharge capacity
    dq = np.abs(trace.current_a[rows]) * sample_weights(trace.time_s)[rows] / 3600.0
    total = float(dq.sum())
    q = np.cumsum(dq) - 0.5 * dq  # each row sits mid-way through the charge it owns
    scale = 100.0 / total if total > 0 else 0.0
    return q * scale, trace.voltage_v[rows], total


def measure(
    trace: Trace,
    segmentation: Segmentation,
    plateau_settings: PlateauSettings,
    *,
    dcir_pulse_s: float = 10.0,
    relax_s: float = 600.0,
) -> CellMetrics:
    """Every DESIGN.md metric of one cell; values that cannot be measured are None."""
    steps = segmentation.steps
    cycles = tuple(measure_cycle(trace, steps, c) for c in segmentation.cycles)
    notes: list[Note] = []
    values: dict[str, float | None] = dict.fromkeys(METRIC_NAMES)
    complete = [c for c in segmentation.cycles if c.complete]
    values["cycle_count"] = float(len(complete))
    if cycles and cycles[0].coulombic_efficiency is not None:
        values["first_cycle_efficiency"] = cycles[0].coulombic_efficiency
        values["irreversible_capacity_Ah"] = cycles[0].charge_capacity_ah - (
            cycles[0].discharge_capacity_ah or 0.0
        )
    charge_v = [c.max_charge_voltage_v for c in cycles if c.max_charge_voltage_v is not None]
    discharge_v = [
        c.min_discharge_voltage_v for c in cycles if c.min_discharge_voltage_v is not None
    ]
    values["max_charge_voltage_V"] = max(charge_v) if charge_v else None
    values["min_discharge_voltage_V"] = min(discharge_v) if discharge_v else None
    if trace.temperature_c is not None:
        values["max_temperature_C"] = _max(trace.temperature_c)
    values["dcir_mOhm"], note = dcir_mohm(trace, steps, dcir_pulse_s)
    notes += [note] if note else []
    values["rest_voltage_drift_mV_per_h"], note = rest_drift_mv_per_h(trace, steps, relax_s)
    notes += [note] if note else []

    plateaus: tuple[Plateau, ...] = ()
    peaks: tuple[float, ...] = ()
    grading_curve = ica_curve = None
    if complete:
        grading = complete[-1]
        gm = cycles[grading.index - 1]
        values["grading_capacity_Ah"] = gm.discharge_capacity_ah
        values["grading_energy_Wh"] = gm.discharge_energy_wh
        values["grading_mean_voltage_V"] = gm.mean_discharge_voltage_v
        values["grading_coulombic_efficiency"] = gm.coulombic_efficiency
        values["grading_cv_duration_s"] = gm.cv_duration_s
        q, v, total = grading_discharge(trace, steps, grading)
        if total > 0 and len(q) >= 10:
            analysis = find_plateaus(q, v, total, plateau_settings)
            plateaus, peaks = analysis.plateaus, analysis.ica_peaks_v
            grading_curve, ica_curve = analysis.curve, analysis.ica
            values["plateau_count"] = float(len(plateaus))
            values["total_plateau_length_pct"] = float(sum(p.length_pct for p in plateaus))
            if plateaus:
                main = max(plateaus, key=lambda p: p.length_pct)
                values["main_plateau_voltage_V"] = main.voltage_v
                values["main_plateau_length_pct"] = main.length_pct
        else:
            notes.append(
                Note(
                    "grading_discharge_too_short",
                    "the grading discharge has too few samples to look for plateaus",
                    None,
                    (
                        "plateau_count",
                        "main_plateau_voltage_V",
                        "main_plateau_length_pct",
                        "total_plateau_length_pct",
                    ),
                )
            )
    else:
        notes.append(
            Note(
                "no_complete_cycle",
                "no charge followed by a discharge was found, so there is no grading discharge",
                SourceRef(trace.source),
            )
        )
    for key, value in values.items():
        if value is not None and not math.isfinite(value):
            values[key] = None
    return CellMetrics(values, cycles, plateaus, peaks, grading_curve, ica_curve, tuple(notes))
