"""Simulate a formation + grading record for one invented cell: the program that drives the cell model.

Pure: a recipe and a seeded numpy Generator in, arrays out (no clock, no files, no global
random state). The steps of a typical formation and grading program (rests, constant
current, constant voltage) run on :class:`pipeline.demo.cellmodel.CellModel`, sampled as a
cycler logs them, and each step's truth is kept beside the rows it left. The cell and its
recipe are left to :mod:`pipeline.demo.cellmodel`, what a channel adds to the readings to
:mod:`pipeline.demo.channel`, writing a record as cycle-file text to
:mod:`pipeline.demo.cycletext`, splitting one into a formation and a grading record to
:mod:`pipeline.demo.stages` (which runs the formation file's own program,
:func:`replay_formation`, from here). Writing files is lots.py's job.

Current sign: positive = charge (cycle file version 1); state of charge as in
:mod:`pipeline.demo.cellmodel`.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from pipeline.demo.cellmodel import CellModel, CellRecipe, temperatures
from pipeline.demo.channel import Channel, add_channel_errors
from pipeline.model import FloatArray, IntArray, frozen_array


@dataclass(frozen=True, slots=True)
class StepTruth:
    """What really happened in one program step: rows ``start`` to ``stop - 1``.

    ``charge_ah`` is the exact signed integral of the noiseless current over the
    step (positive = charge), ``soc_start``/``soc_end`` the model's state of charge.
    """

    number: int
    cycle: int
    kind: str  # "rest", "cc_charge", "cv_charge" or "cc_discharge"
    start: int
    stop: int
    start_s: float
    end_s: float
    soc_start: float
    soc_end: float
    charge_ah: float


@dataclass(frozen=True, slots=True)
class SimulatedRecord:
    """A simulated cycler record, rounded as the cycle file writes it, and its true steps."""

    recipe: CellRecipe
    time_s: FloatArray
    voltage_v: FloatArray
    current_a: FloatArray
    temperature_c: FloatArray
    step: IntArray
    cycle: IntArray
    steps: tuple[StepTruth, ...]

    def __post_init__(self) -> None:
        for name in ("time_s", "voltage_v", "current_a", "temperature_c"):
            object.__setattr__(self, name, frozen_array(getattr(self, name)))
        for name in ("step", "cycle"):
            object.__setattr__(self, name, frozen_array(getattr(self, name), np.int64))

    def __len__(self) -> int:
        return len(self.time_s)

    def step_named(self, number: int) -> StepTruth:
        """The program step with this number (ValueError when the program skipped it)."""
        for truth in self.steps:
            if truth.number == number:
                return truth
        raise ValueError(f"no program step {number} in this record")


# Program step numbers, fixed so that tests and readers can name them.
GRADING_STEP = 12
FINAL_REST_STEP = 15
# The rest after cycle 1's discharge: a record written as two files is split inside it.
SPLIT_REST_STEP = 8
# The formation file's own program after cycle 1's discharge: that rest, a charge to the
# storage level and a rest (numbered as a formation program on its own would number them).
STORAGE_CHARGE_STEP = 9
STORAGE_REST_STEP = 10
# Rest after the formation file's storage charge: our own choice, a typical half hour.
STORAGE_REST_S = 1800.0


@dataclass(slots=True)
class Run:
    """The simulation's running state and the rows collected so far (one program run's own)."""

    cell: CellModel
    soc: float
    v_rc: float = 0.0
    t_ds: int = 0  # time in tenths of a second, so written times never collide
    formed: bool = False
    times: list[IntArray] = field(default_factory=list)
    volts: list[FloatArray] = field(default_factory=list)
    amps: list[FloatArray] = field(default_factory=list)
    truths: list[StepTruth] = field(default_factory=list)
    rows: int = 0

    def add(self, number: int, cycle: int, kind: str, rel_ds: IntArray, volts: FloatArray,
            amps: FloatArray, soc_end: float, charge_ah: float) -> None:
        start_s = self.t_ds / 10.0
        self.times.append(self.t_ds + rel_ds)
        self.volts.append(volts)
        self.amps.append(amps)
        n = len(rel_ds)
        self.truths.append(StepTruth(number, cycle, kind, self.rows, self.rows + n, start_s,
                                     (self.t_ds + int(rel_ds[-1])) / 10.0, self.soc, soc_end,
                                     charge_ah))
        self.rows += n
        self.t_ds += int(rel_ds[-1])
        self.soc = soc_end


def _sample_ds(duration_ds: int, interval_ds: int) -> IntArray:
    """Sample times in a step (tenths of s from its start): 0.1 s in, every interval, the end.

    The first row right after the switch is what a cycler logs when a step begins; the
    last row is the step's end, so integrals over a step miss at most 0.1 s of it.
    """
    grid = np.arange(interval_ds, duration_ds, interval_ds, dtype=np.int64)
    return np.unique(np.concatenate(([1], grid, [duration_ds]))).astype(np.int64)


def _first_true_ds(predicate: Callable[[FloatArray], np.ndarray], cap_ds: int) -> int:
    """Smallest tenth of a second in 1..cap_ds where ``predicate(t_s)`` holds, else cap_ds."""
    coarse = np.arange(10, cap_ds + 10, 10, dtype=np.int64)
    hits = np.flatnonzero(predicate(coarse / 10.0))
    if len(hits) == 0:
        return cap_ds
    upper = int(coarse[hits[0]])
    fine = np.arange(max(upper - 9, 1), upper + 1, dtype=np.int64)
    first = int(fine[np.flatnonzero(predicate(fine / 10.0))[0]])
    return min(first, cap_ds)


def _rest(run: Run, number: int, cycle: int, duration_s: float, interval_ds: int) -> None:
    r = run.cell.recipe
    cap = r.capacity_ah * 3600.0
    rel = _sample_ds(max(1, round(duration_s * 10)), interval_ds)
    t = rel / 10.0
    soc = run.soc - r.self_discharge_a * t / cap
    volts = run.cell.ocv(soc, run.formed) + run.v_rc * np.exp(-t / r.relaxation_time_s)
    v_rc_end = run.v_rc * math.exp(-t[-1] / r.relaxation_time_s)
    run.add(number, cycle, "rest", rel, volts, np.zeros(len(rel)), float(soc[-1]), 0.0)
    run.v_rc = v_rc_end


def _constant_current(run: Run, number: int, cycle: int, current_a: float, interval_ds: int, *,
                      soc_limit: float, v_limit: float | None = None,
                      charge_limit_ah: float | None = None) -> None:
    """CC step until the state of charge, the voltage limit or a charge amount is reached."""
    r, cell = run.cell.recipe, run.cell
    cap = r.capacity_ah * 3600.0
    stored = 1.0 - r.charge_side_fraction if current_a > 0 else 1.0
    net_a = stored * current_a - r.self_discharge_a
    soc0, v_rc0, formed = run.soc, run.v_rc, run.formed
    r_p, tau = r.polarisation_ohm, r.relaxation_time_s

    def state(t: FloatArray) -> tuple[FloatArray, FloatArray]:
        soc = soc0 + net_a * t / cap
        v_rc = current_a * r_p + (v_rc0 - current_a * r_p) * np.exp(-t / tau)
        volts = cell.ocv(soc, formed) + current_a * r.resistance_ohm + v_rc
        if current_a > 0:
            volts = volts + cell.end_overpotential(soc, current_a)
        return soc, volts

    limit_s = (soc_limit - soc0) * cap / net_a if net_a != 0 else math.inf
    if limit_s <= 0:
        limit_s = math.inf
    if charge_limit_ah is not None:
        limit_s = min(limit_s, charge_limit_ah * 3600.0 / abs(current_a))
    cap_ds = max(1, math.ceil(min(limit_s, 100 * 3600.0) * 10 - 1e-6))
    if v_limit is not None:
        sign = 1.0 if current_a > 0 else -1.0
        cap_ds = _first_true_ds(lambda t: sign * (state(t)[1] - v_limit) >= 0, cap_ds)
    rel = _sample_ds(cap_ds, interval_ds)
    soc, volts = state(rel / 10.0)
    t_end = rel[-1] / 10.0
    run.add(number, cycle, "cc_charge" if current_a > 0 else "cc_discharge", rel, volts,
            np.full(len(rel), current_a), float(soc[-1]), current_a * t_end / 3600.0)
    run.v_rc = current_a * r_p + (v_rc0 - current_a * r_p) * math.exp(-t_end / tau)


def _constant_voltage(run: Run, number: int, cycle: int, start_a: float, cutoff_a: float,
                      interval_ds: int) -> None:
    """CV hold at the charge limit: current decays exponentially to the cut-off.

    The time constant is chosen so that the step ends exactly full (soc 1) when the
    current reaches the cut-off, leakage and side reaction included, which keeps Faraday
    bookkeeping exact.
    """
    r, cell = run.cell.recipe, run.cell
    cap = r.capacity_ah * 3600.0
    if run.soc >= 1.0 or start_a <= cutoff_a:
        return
    ratio = start_a / cutoff_a
    stored = 1.0 - r.charge_side_fraction
    tau = (1.0 - run.soc) * cap / (
        stored * (start_a - cutoff_a) - r.self_discharge_a * math.log(ratio)
    )
    rel = _sample_ds(max(1, math.ceil(tau * math.log(ratio) * 10)), interval_ds)
    t = rel / 10.0
    amps = start_a * np.exp(-t / tau)
    passed_as = start_a * tau * (1.0 - math.exp(-t[-1] / tau))
    soc_end = run.soc + (stored * passed_as - r.self_discharge_a * t[-1]) / cap
    volts = np.full(len(rel), cell.chem.max_v)
    run.add(number, cycle, "cv_charge", rel, volts, amps, soc_end, passed_as / 3600.0)
    # Whatever the cycler held above the OCV and the ohmic drop relaxes in the next rest.
    ocv_end = float(cell.ocv(np.array([soc_end]), run.formed)[0])
    run.v_rc = cell.chem.max_v - ocv_end - float(amps[-1]) * r.resistance_ohm


def _charge_cc_cv(run: Run, cc_number: int, cycle: int, interval_ds: int) -> None:
    r, p = run.cell.recipe, run.cell.recipe.program
    current_a = p.charge_rate_c * r.nominal_capacity_ah
    _constant_current(run, cc_number, cycle, current_a, interval_ds, soc_limit=1.0,
                      v_limit=run.cell.chem.max_v)
    _constant_voltage(run, cc_number + 1, cycle, current_a,
                      p.cv_cutoff_c * r.nominal_capacity_ah, interval_ds)


def _formation_cycle(run: Run, recipe: CellRecipe, dt: int) -> None:
    """Steps 1-7, the formation cycle: rest, pre-charge, rest, CC-CV charge, rest, discharge."""
    cell, p, nominal = run.cell, recipe.program, recipe.nominal_capacity_ah
    _rest(run, 1, 1, p.initial_rest_s, dt)
    _constant_current(run, 2, 1, p.pre_charge_rate_c * nominal, dt, soc_limit=1.0,
                      v_limit=cell.chem.max_v, charge_limit_ah=p.pre_charge_fraction * nominal)
    _rest(run, 3, 1, p.pre_charge_rest_s, dt)
    _charge_cc_cv(run, 4, 1, dt)
    _rest(run, 6, 1, p.rest_after_charge_s, dt)
    _constant_current(run, 7, 1, -p.discharge_rate_c * nominal, dt, soc_limit=0.0,
                      v_limit=cell.chem.min_v)
    run.formed = True


def simulate_formation(recipe: CellRecipe, rng: np.random.Generator) -> SimulatedRecord:
    """Run the formation + grading program of ``recipe.program`` on the recipe's cell.

    Deterministic for a given recipe and generator state. Rows are rounded as
    :func:`pipeline.demo.cycletext.to_cycle_file` writes them (0.1 s, 10 uV, 10 uA, 0.01 degC).

    >>> rec = simulate_formation(CellRecipe(), np.random.default_rng(1))
    >>> bool(np.all(np.diff(rec.time_s) > 0)), rec.steps[-1].number
    (True, 15)
    """
    cell = CellModel(recipe)
    p, nominal = recipe.program, recipe.nominal_capacity_ah
    dt = round(recipe.sample_interval_s * 10)
    run = Run(cell, soc=-cell.sei)
    _formation_cycle(run, recipe, dt)
    _rest(run, 8, 2, p.rest_after_discharge_s, dt)
    _charge_cc_cv(run, 9, 2, dt)
    _rest(run, 11, 2, p.rest_before_grading_s, dt)
    _constant_current(run, GRADING_STEP, 2, -p.grading_rate_c * nominal, dt, soc_limit=0.0,
                      v_limit=cell.chem.min_v)
    _rest(run, 13, 3, p.rest_after_grading_s, dt)
    storage = cell.chem.storage_soc if p.storage_soc is None else p.storage_soc
    _constant_current(run, 14, 3, p.charge_rate_c * nominal, dt, soc_limit=storage,
                      v_limit=cell.chem.max_v)
    _rest(run, FINAL_REST_STEP, 3, p.final_rest_s, dt)

    time_s = np.concatenate(run.times) / 10.0
    volts = np.concatenate(run.volts)
    amps = np.concatenate(run.amps)
    counts = [t.stop - t.start for t in run.truths]
    step = np.repeat([t.number for t in run.truths], counts)
    cycle = np.repeat([t.cycle for t in run.truths], counts)
    temps = temperatures(recipe, time_s, amps)
    channel = recipe.channel or Channel.for_cell(nominal)
    volts, amps, temps = add_channel_errors(volts, amps, temps, step, channel, rng)
    return SimulatedRecord(
        recipe=recipe,
        time_s=time_s,
        voltage_v=np.round(volts, 5) + 0.0,
        current_a=np.round(amps, 5) + 0.0,
        temperature_c=np.round(temps, 2) + 0.0,
        step=step,
        cycle=cycle,
        steps=tuple(run.truths),
    )


def with_channel(
    record: SimulatedRecord, channel: Channel, rng: np.random.Generator
) -> SimulatedRecord:
    """The same record as ``channel`` would have measured it (a noiseless record in, rounded out).

    Lets one simulated cell be read through channels of different quality; the true
    steps are kept.
    """
    volts, amps, temps = add_channel_errors(
        record.voltage_v, record.current_a, record.temperature_c, record.step, channel, rng
    )
    return dataclasses.replace(
        record,
        recipe=dataclasses.replace(record.recipe, channel=channel),
        voltage_v=np.round(volts, 5) + 0.0,
        current_a=np.round(amps, 5) + 0.0,
        temperature_c=np.round(temps, 2) + 0.0,
    )


def replay_formation(recipe: CellRecipe, rest_s: float, storage_rest_s: float) -> Run:
    """The formation file's own program: the noiseless run of cycle 1, ``rest_s`` of the rest
    after it, a storage charge and a rest.

    Steps 1-7 are the ones :func:`simulate_formation` runs, on the same sample grid, so
    their rows are the whole record's before channel errors (the cell model draws no
    random numbers).
    """
    cell = CellModel(recipe)
    p, nominal = recipe.program, recipe.nominal_capacity_ah
    dt = round(recipe.sample_interval_s * 10)
    run = Run(cell, soc=-cell.sei)
    _formation_cycle(run, recipe, dt)
    _rest(run, SPLIT_REST_STEP, 2, rest_s, dt)
    storage = cell.chem.storage_soc if p.storage_soc is None else p.storage_soc
    _constant_current(run, STORAGE_CHARGE_STEP, 2, p.charge_rate_c * nominal, dt,
                      soc_limit=storage, v_limit=cell.chem.max_v)
    _rest(run, STORAGE_REST_STEP, 2, storage_rest_s, dt)
    return run
