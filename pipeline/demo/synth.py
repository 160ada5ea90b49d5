"""Simulate a formation + grading record for one invented cell, and write it as a cycle file.

Pure: a recipe and a seeded numpy Generator in, arrays and text out (no clock,
no files, no global random state). The cell model is deliberately small:
a full-cell open-circuit voltage from published electrode fits (pipeline.demo.ocp),
an ohmic resistance, one RC element for relaxation, first-cycle lithium (or sodium)
loss, a side reaction on charge, a leakage current for self-discharge, lumped I^2 R
heating; what a cycler channel records of it (noise, offset, spikes) is channel.py's.
It exists to give the demo and the tests plausible records whose true values
are known; formgate never uses it to judge a real cell. Writing files is lots.py's job.
A record may also be written as two, its formation and its grading (:func:`split_stages`),
as when a cell's stages run on different channels or days.
Longer than most modules because the cell model, the program that drives it and the
cycle-file text are one simulation, each step feeding the next.

Current sign: positive = charge (cycle file version 1). State of charge ``soc``
is the fraction of the cell's reversible capacity: 0 where the open-circuit voltage
meets the discharge cut-off, 1 at the full end of the curve. Before the first
discharge it starts below 0, by the lithium the first charge loses to the solid
electrolyte interphase.
"""

from __future__ import annotations

import dataclasses
import functools
import math
import types
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Protocol

import numpy as np
from scipy import optimize

from pipeline.demo import ocp
from pipeline.demo.channel import NOISELESS as NOISELESS
from pipeline.demo.channel import Channel as Channel
from pipeline.demo.channel import add_channel_errors as add_channel_errors
from pipeline.model import FloatArray, IntArray, Trace, frozen_array

OcvFunction = Callable[[FloatArray], FloatArray]


@dataclass(frozen=True, slots=True)
class Chemistry:
    """A full-cell voltage curve and the limits a formation program uses with it."""

    name: str
    ocv: OcvFunction  # OCV (V) against the curve's own state of charge 0..1
    min_v: float  # discharge cut-off
    max_v: float  # charge limit (CV level)
    # Voltage of the freshly filled cell before its first charge: our own choice, kept inside
    # the voltage range a rule set calls plausible (a real fresh cell may read lower).
    fresh_v: float
    storage_soc: float  # state of charge the program leaves the cell at
    # Extra charge overpotential at full charge and 1 C (see _Cell); our own values, set so CV
    # starts at about 97-99 % of the charge at 0.2 C.
    end_overpotential_v: float


CHEMISTRIES: Mapping[str, Chemistry] = types.MappingProxyType({
    # Limits (LFP/graphite 3.65 V / 2.5 V: common practice and a cell
    # datasheet, low authority). LFP storage state of charge is low because LFP
    # self-discharge screening needs the slope below about 35 % (industry article, low
    # authority; from memory, medium).
    "lfp_graphite": Chemistry("lfp_graphite", ocp.lfp_graphite_cell, 2.5, 3.65, 2.0, 0.15, 2.7),
    # Chen 2020 cell: 2.5 V / 4.2 V (Chen et al. 2020 parameter set, PyBaMM Chen2020.py); storage 50 %.
    "nmc_graphite": Chemistry("nmc_graphite", ocp.nmc811_graphite_cell, 2.5, 4.2, 2.0, 0.5, 0.6),
    # NMC/LTO: such cells run 1.5-1.8 V / 2.7-2.8 V (from memory); our mean-field
    # LTO curve ends more gently than a real one, so our own cut-off sits at 1.85 V.
    "nmc_lto": Chemistry("nmc_lto", ocp.nmc811_lto_cell, 1.85, 2.8, 1.6, 0.5, 0.4),
    # NVPF/hard carbon (sodium-ion), the Chayambuka 2022 cell: 4.2 V charge limit as in PyBaMM's
    # Chayambuka2022 set. Its 2.0 V cut-off lies below the published tables (their full cell
    # reaches 2.35 V at the last hard-carbon point), so our own cut-off is 2.5 V. Fresh cell
    # 1.5 V and storage at 30 %, on the slope below the 3.6 V step where a lost charge shows
    # in the rest voltage (1.6 V per unit of charge there, derived from the Chayambuka tables):
    # our own choices.
    "nvpf_hard_carbon": Chemistry("nvpf_hard_carbon", ocp.nvpf_hard_carbon_cell, 2.5, 4.2, 1.5, 0.3, 0.6),
})


@dataclass(frozen=True, slots=True)
class FormationProgram:
    """The cycler program: a typical formation + grading sequence (common practice).

    Rates are C-rates of the nominal capacity; durations in seconds. Steps:
    rest, pre-charge to a partial charge, rest, CC-CV charge, rest, CC discharge
    (cycle 1); rest, CC-CV charge, rest, grading CC discharge (cycle 2, its start
    from rest is where DCIR is read); rest, charge to storage, final rest (cycle 3).
    """

    initial_rest_s: float = 300.0
    pre_charge_rate_c: float = 0.05  # 0.02-0.1 C first charge (common practice)
    pre_charge_fraction: float = 0.12  # charge passed, fraction of capacity (10-30 %)
    pre_charge_rest_s: float = 600.0
    charge_rate_c: float = 0.2  # CC 0.1-0.5 C (common practice)
    cv_cutoff_c: float = 0.05  # C/20, the most common CV end (common practice)
    rest_after_charge_s: float = 1800.0
    discharge_rate_c: float = 0.2
    rest_after_discharge_s: float = 1800.0
    rest_before_grading_s: float = 3600.0
    grading_rate_c: float = 1.0 / 3.0  # 0.2-1 C (common practice); 1/3 C as IEC 62660-1 (from memory)
    rest_after_grading_s: float = 1800.0
    storage_soc: float | None = None  # None: the chemistry's default
    final_rest_s: float = 10800.0


@dataclass(frozen=True, slots=True)
class CellRecipe:
    """Everything that makes one simulated cell what it is. Defects are just other values.

    ``resistance_ohm`` is ohmic (instantaneous); ``polarisation_ohm`` with
    ``relaxation_time_s`` is the RC element, so a 10 s DCIR reads about
    R + R_p (1 - exp(-10 / tau)) plus the OCV change over the pulse.
    ``first_cycle_loss_fraction`` = 1 - first-cycle efficiency. ``self_discharge_a``
    is a leakage current flowing at all times (an internal short is a large one).
    ``charge_side_fraction`` is the part of every charging current that a side reaction
    takes and never gives back on discharge, so each cycle's coulombic efficiency is about
    1 - that fraction (metal plated on the anode that reacts with the electrolyte, for one;
    plating lowers coulombic efficiency: O'Kane et al., J. Electrochem. Soc. 167 (2020)
    090540; the lumped model is our own).
    ``sloped_fraction`` 0..1 blends the OCV with a straight line (1: no plateau).
    ``fault_heat_w`` is heat released while the cell charges (a local fault).

    Defaults describe an invented 20 Ah LFP/graphite cell: resistances of the order
    of such cells (from memory, low), thermal values our own, 1 mV rms
    voltage noise (common practice for a cycler channel).
    """

    chemistry: str = "lfp_graphite"
    nominal_capacity_ah: float = 20.0
    capacity_factor: float = 1.0
    resistance_ohm: float = 0.004
    polarisation_ohm: float = 0.002
    relaxation_time_s: float = 120.0
    first_cycle_loss_fraction: float = 0.09
    self_discharge_a: float = 0.0
    charge_side_fraction: float = 0.0
    sloped_fraction: float = 0.0
    ambient_c: float = 25.0
    ambient_swing_c: float = 0.0  # amplitude of a 24 h sine on the room temperature
    thermal_resistance_k_per_w: float = 3.0
    thermal_time_constant_s: float = 1800.0
    fault_heat_w: float = 0.0
    fresh_cell_v: float | None = None  # None: the chemistry's default
    sample_interval_s: float = 10.0
    channel: Channel | None = None  # None: Channel.for_cell(nominal_capacity_ah)
    program: FormationProgram = field(default_factory=FormationProgram)

    def __post_init__(self) -> None:
        if self.chemistry not in CHEMISTRIES:
            known = ", ".join(sorted(CHEMISTRIES))
            raise ValueError(f"unknown chemistry {self.chemistry!r}; use one of {known}")
        positive = ("nominal_capacity_ah", "capacity_factor", "resistance_ohm",
                    "relaxation_time_s", "thermal_resistance_k_per_w", "thermal_time_constant_s")
        for name in positive:
            if not getattr(self, name) > 0:
                raise ValueError(f"CellRecipe.{name} must be positive")
        if not 0.0 <= self.first_cycle_loss_fraction < 0.9:
            raise ValueError("CellRecipe.first_cycle_loss_fraction must lie in [0, 0.9)")
        if not 0.0 <= self.charge_side_fraction < 0.5:
            raise ValueError("CellRecipe.charge_side_fraction must lie in [0, 0.5)")
        if not 0.0 <= self.sloped_fraction <= 1.0:
            raise ValueError("CellRecipe.sloped_fraction must lie in [0, 1]")
        tenths = self.sample_interval_s * 10.0
        if self.sample_interval_s < 0.1 or abs(tenths - round(tenths)) > 1e-9:
            raise ValueError("CellRecipe.sample_interval_s must be a positive multiple of 0.1 s")
        if min(self.polarisation_ohm, self.self_discharge_a, self.fault_heat_w) < 0:
            raise ValueError("CellRecipe resistances, leakage and heat cannot be negative")

    @property
    def capacity_ah(self) -> float:
        """The cell's reversible capacity (Ah): nominal x capacity_factor."""
        return self.nominal_capacity_ah * self.capacity_factor


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


@functools.cache
def _soc_floor(chemistry: str) -> float:
    """Where the chemistry's curve reaches its cut-off: our SOC 0 (0 if it starts above)."""
    chem = CHEMISTRIES[chemistry]

    def gap(s: float) -> float:
        return float(chem.ocv(np.asarray(s))) - chem.min_v

    return 0.0 if gap(0.0) >= 0 else float(optimize.brentq(gap, 0.0, 0.5, xtol=1e-12))


class _Cell:
    """Open-circuit voltage of one recipe's cell, with the SEI region and the slope defect."""

    SLOPE_START = 0.01  # below this state of charge the curve keeps its steep end

    def __init__(self, recipe: CellRecipe) -> None:
        self.chem = CHEMISTRIES[recipe.chemistry]
        self.recipe = recipe
        self.floor = _soc_floor(recipe.chemistry)
        loss = recipe.first_cycle_loss_fraction
        self.sei = loss / (1.0 - loss)  # extra first charge per unit of reversible capacity
        self.fresh_v = self.chem.fresh_v if recipe.fresh_cell_v is None else recipe.fresh_cell_v
        self.v_slope_start = float(self._curve(np.array([self.SLOPE_START]))[0])
        self.v_start = float(self.base(np.zeros(1))[0])
        eps = 1e-6
        self.slope0 = float((self.base(np.array([eps])) - self.base(np.zeros(1)))[0] / eps)

    def _curve(self, soc: FloatArray) -> FloatArray:
        s = np.clip(soc, 0.0, 1.0)
        return self.chem.ocv(self.floor + (1.0 - self.floor) * s)

    def base(self, soc: FloatArray) -> FloatArray:
        """Reversible OCV over 0..1, with the plateau sloped by ``sloped_fraction``."""
        v = self._curve(soc)
        w = self.recipe.sloped_fraction
        if w == 0.0:
            return v
        a = self.SLOPE_START
        v_end = float(self._curve(np.ones(1))[0])
        along = (np.clip(soc, a, 1.0) - a) / (1.0 - a)
        line = self.v_slope_start + (v_end - self.v_slope_start) * along
        return np.where(soc >= a, (1.0 - w) * v + w * line, v)

    def ocv(self, soc: FloatArray, formed: bool) -> FloatArray:
        soc = np.asarray(soc, dtype=np.float64)
        v = self.base(soc)
        if not np.any(soc < 0):
            return v
        if formed or self.sei == 0.0:
            below = self.v_start + self.slope0 * soc
        else:
            # First charge of a fresh cell: a quick rise, then a slow shoulder while the SEI
            # forms (shape is our own; first-charge SEI growth: from memory, high).
            u = np.clip((soc + self.sei) / self.sei, 0.0, 1.0)
            shape = 0.8 * (1.0 - np.exp(-u / 0.05)) / (1.0 - math.exp(-20.0)) + 0.2 * u
            below = self.fresh_v + (self.v_start - self.fresh_v) * shape
        return np.where(soc < 0, below, v)

    def end_overpotential(self, soc: FloatArray, current_a: float) -> FloatArray:
        # Concentration overpotential that grows steeply near full charge, so the CC charge
        # reaches the CV level before the cell is full (a phenomenological term of our own).
        rate = current_a / self.recipe.nominal_capacity_ah
        return self.chem.end_overpotential_v * rate * np.exp((np.asarray(soc) - 1.0) / 0.02)


@dataclass(slots=True)
class _Run:
    """The simulation's running state and the rows collected so far (local to one call)."""

    cell: _Cell
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


def _rest(run: _Run, number: int, cycle: int, duration_s: float, interval_ds: int) -> None:
    r = run.cell.recipe
    cap = r.capacity_ah * 3600.0
    rel = _sample_ds(max(1, round(duration_s * 10)), interval_ds)
    t = rel / 10.0
    soc = run.soc - r.self_discharge_a * t / cap
    volts = run.cell.ocv(soc, run.formed) + run.v_rc * np.exp(-t / r.relaxation_time_s)
    v_rc_end = run.v_rc * math.exp(-t[-1] / r.relaxation_time_s)
    run.add(number, cycle, "rest", rel, volts, np.zeros(len(rel)), float(soc[-1]), 0.0)
    run.v_rc = v_rc_end


def _constant_current(run: _Run, number: int, cycle: int, current_a: float, interval_ds: int, *,
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


def _constant_voltage(run: _Run, number: int, cycle: int, start_a: float, cutoff_a: float,
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


def _temperatures(recipe: CellRecipe, time_s: FloatArray, current_a: FloatArray) -> FloatArray:
    """Lumped thermal model: dT/dt = (T_room + P R_th - T) / tau_th, exact per interval.

    P = I^2 (R + R_p) plus ``fault_heat_w`` while charging (Joule heating; our lumped model).
    """
    r = recipe
    room = r.ambient_c + r.ambient_swing_c * np.sin(2 * np.pi * time_s / 86400.0)
    heat = current_a**2 * (r.resistance_ohm + r.polarisation_ohm)
    heat = heat + np.where(current_a > 0, r.fault_heat_w, 0.0)
    temps = np.empty(len(time_s))
    temps[0] = room[0]
    decay = np.exp(-np.diff(time_s) / r.thermal_time_constant_s)
    power = 0.5 * (heat[1:] + heat[:-1])
    for k in range(1, len(time_s)):
        steady = room[k] + power[k - 1] * r.thermal_resistance_k_per_w
        temps[k] = steady + (temps[k - 1] - steady) * decay[k - 1]
    return temps


def _charge_cc_cv(run: _Run, cc_number: int, cycle: int, interval_ds: int) -> None:
    r, p = run.cell.recipe, run.cell.recipe.program
    current_a = p.charge_rate_c * r.nominal_capacity_ah
    _constant_current(run, cc_number, cycle, current_a, interval_ds, soc_limit=1.0,
                      v_limit=run.cell.chem.max_v)
    _constant_voltage(run, cc_number + 1, cycle, current_a,
                      p.cv_cutoff_c * r.nominal_capacity_ah, interval_ds)


def _formation_cycle(run: _Run, recipe: CellRecipe, dt: int) -> None:
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
    :func:`to_cycle_file` writes them (0.1 s, 10 uV, 10 uA, 0.01 degC).

    >>> rec = simulate_formation(CellRecipe(), np.random.default_rng(1))
    >>> bool(np.all(np.diff(rec.time_s) > 0)), rec.steps[-1].number
    (True, 15)
    """
    cell = _Cell(recipe)
    p, nominal = recipe.program, recipe.nominal_capacity_ah
    dt = round(recipe.sample_interval_s * 10)
    run = _Run(cell, soc=-cell.sei)
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
    temps = _temperatures(recipe, time_s, amps)
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


COLUMNS = ("time_s", "voltage_V", "current_A", "temperature_C")
STEP_COLUMNS = ("step", "cycle")


class Columns(Protocol):
    """What a cycle file is written from: a SimulatedRecord, or any record with these arrays."""

    @property
    def time_s(self) -> FloatArray: ...
    @property
    def voltage_v(self) -> FloatArray: ...
    @property
    def current_a(self) -> FloatArray: ...
    @property
    def temperature_c(self) -> FloatArray: ...
    @property
    def step(self) -> IntArray: ...
    @property
    def cycle(self) -> IntArray: ...


def to_cycle_file(record: Columns, metadata: Mapping[str, str], *,
                  include_step_columns: bool = True) -> str:
    """Cycle file version 1 text: ``# key: value`` lines, a header row, one row per sample.

    Fixed formats: time %.1f s, voltage %.5f V, current %.5f A, temperature %.2f degC.

    >>> rec = simulate_formation(CellRecipe(), np.random.default_rng(1))
    >>> to_cycle_file(rec, {"cell_id": "X1"}).splitlines()[:2]
    ['# cell_id: X1', 'time_s,voltage_V,current_A,temperature_C,step,cycle']
    """
    lines = []
    for key, value in metadata.items():
        if not key or any(c in key for c in ":\r\n") or key != key.strip():
            raise ValueError(f"metadata key {key!r} cannot be written as '# key: value'")
        if any(c in value for c in "\r\n"):
            raise ValueError(f"metadata value of {key!r} contains a line break")
        lines.append(f"# {key}: {value}")
    header = COLUMNS + (STEP_COLUMNS if include_step_columns else ())
    lines.append(",".join(header))
    columns = [
        [f"{v:.1f}" for v in record.time_s.tolist()],
        [f"{v:.5f}" for v in record.voltage_v.tolist()],
        [f"{v:.5f}" for v in record.current_a.tolist()],
        [f"{v:.2f}" for v in record.temperature_c.tolist()],
    ]
    if include_step_columns:
        columns += [[str(v) for v in record.step.tolist()], [str(v) for v in record.cycle.tolist()]]
    lines.extend(",".join(row) for row in zip(*columns, strict=True))
    return "\n".join(lines) + "\n"


def to_trace(
    record: SimulatedRecord, metadata: Mapping[str, str], source: str = "simulated"
) -> Trace:
    """The record as the shared Trace a reader would produce from its cycle file."""
    return Trace(
        source=source,
        metadata=metadata,
        time_s=record.time_s,
        voltage_v=record.voltage_v,
        current_a=record.current_a,
        temperature_c=record.temperature_c,
        step=record.step,
        cycle=record.cycle,
        first_data_line=len(metadata) + 2,
    )


def constant_current_curve(
    ocv: Callable[[FloatArray], FloatArray],
    capacity_ah: float,
    current_a: float,
    resistance_ohm: float,
    dt_s: float,
    noise_v_rms: float,
    rng: np.random.Generator | None,
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """One CC discharge from full to empty: V = OCV(soc) - I R + noise, I < 0 in the result.

    ``current_a`` is the discharge current's magnitude (A, > 0); ``ocv`` maps state
    of charge 0..1 to volts. Samples every ``dt_s`` seconds from 0, plus the end at
    t = 3600 capacity / I, so the samples hold exactly ``capacity_ah`` (Faraday).
    ``rng`` may be None only when ``noise_v_rms`` is 0.

    >>> t, v, i = constant_current_curve(ocp.lfp_graphite_cell, 2.0, 0.4, 0.05, 60.0, 0.0, None)
    >>> round(float(np.trapezoid(-i, t)) / 3600, 6), float(t[-1])
    (2.0, 18000.0)
    """
    if not (capacity_ah > 0 and current_a > 0 and dt_s > 0 and resistance_ohm >= 0):
        raise ValueError("capacity, current and dt must be positive, resistance not negative")
    if noise_v_rms < 0:
        raise ValueError("noise_v_rms cannot be negative")
    end_s = 3600.0 * capacity_ah / current_a
    time_s = np.arange(0.0, end_s, dt_s)
    if end_s - time_s[-1] < 1e-9 * end_s:
        time_s = time_s[:-1]
    time_s = np.append(time_s, end_s)
    soc = np.clip(1.0 - current_a * time_s / (3600.0 * capacity_ah), 0.0, 1.0)
    voltage_v = np.asarray(ocv(soc), dtype=np.float64) - current_a * resistance_ohm
    if noise_v_rms > 0:
        if rng is None:
            raise ValueError("a random generator is needed when noise_v_rms > 0")
        voltage_v = voltage_v + rng.normal(0.0, noise_v_rms, len(time_s))
    return time_s, voltage_v, np.full(len(time_s), -float(current_a))


def self_discharge_for_drift(recipe: CellRecipe, drift_mv_per_h: float) -> float:
    """Leakage current (A) that makes the final rest voltage drift by ``drift_mv_per_h`` (< 0).

    I = K / (dV/dQ): the rest-voltage slope divided by the OCV slope per Ah at the
    storage state of charge (K-value relation, derived from the definition of K; common practice).
    """
    cell = _Cell(recipe)
    storage = recipe.program.storage_soc
    soc = cell.chem.storage_soc if storage is None else storage
    h = 1e-4
    volts = cell.base(np.array([soc - h, soc + h]))
    dv_dsoc = float(volts[1] - volts[0]) / (2 * h)
    return -drift_mv_per_h / 1000.0 * recipe.capacity_ah / dv_dsoc


# The rest after cycle 1's discharge: a record written as two files is split inside it.
SPLIT_REST_STEP = 8
# The formation file's own program after cycle 1's discharge: that rest, a charge to the
# storage level and a rest (numbered as a formation program on its own would number them).
STORAGE_CHARGE_STEP = 9
STORAGE_REST_STEP = 10
# Rest after the formation file's storage charge: our own choice, a typical half hour.
STORAGE_REST_S = 1800.0


@dataclass(frozen=True, slots=True)
class StageRecords:
    """One simulated cell written as two records: its formation and its grading.

    ``cut`` is the row of the whole record where the grading record starts: the
    formation record holds the whole record's rows before it, then a charge to the
    storage level and a rest of its own; the grading record holds the rows from it on,
    its time counted from 0, its steps and cycles numbered from 1.
    """

    formation: SimulatedRecord
    grading: SimulatedRecord
    cut: int


def _replay_formation(recipe: CellRecipe, rest_s: float, storage_rest_s: float) -> _Run:
    """The noiseless run of cycle 1, ``rest_s`` of the rest after it, a storage charge and a rest.

    Steps 1-7 are the ones :func:`simulate_formation` runs, on the same sample grid, so
    their rows are the whole record's before channel errors (the cell model draws no
    random numbers).
    """
    cell = _Cell(recipe)
    p, nominal = recipe.program, recipe.nominal_capacity_ah
    dt = round(recipe.sample_interval_s * 10)
    run = _Run(cell, soc=-cell.sei)
    _formation_cycle(run, recipe, dt)
    _rest(run, SPLIT_REST_STEP, 2, rest_s, dt)
    storage = cell.chem.storage_soc if p.storage_soc is None else p.storage_soc
    _constant_current(run, STORAGE_CHARGE_STEP, 2, p.charge_rate_c * nominal, dt,
                      soc_limit=storage, v_limit=cell.chem.max_v)
    _rest(run, STORAGE_REST_STEP, 2, storage_rest_s, dt)
    return run


def split_stages(
    record: SimulatedRecord,
    rng: np.random.Generator,
    *,
    at_s: float | None = None,
    storage_rest_s: float = STORAGE_REST_S,
) -> StageRecords:
    """``record`` (of :func:`simulate_formation`) as a formation record and a grading record.

    The split falls at ``at_s`` (s from the start; default the middle) inside the rest
    after cycle 1's discharge, as when a cell leaves its formation channel for another
    channel or day. Both keep the whole record's rows, so the channel errors those carry
    stay; the formation record's storage charge and rest are simulated on the cell model
    from the state at the split and read through the record's channel (noise, offset, the
    switch spike) with ``rng``. What the cell went through between the two records is not
    in either (it holds no charge or discharge of any cycle).
    """
    rest = record.step_named(SPLIT_REST_STEP)
    at = 0.5 * (rest.start_s + rest.end_s) if at_s is None else at_s
    cut = int(np.searchsorted(record.time_s, at))
    if not rest.start < cut < rest.stop:
        raise ValueError(
            f"the split at {at:g} s must leave rows of the rest after cycle 1 "
            f"({rest.start_s:g}-{rest.end_s:g} s) on both sides"
        )
    recipe = record.recipe
    run = _replay_formation(recipe, float(record.time_s[cut - 1]) - rest.start_s, storage_rest_s)
    if sum(t.stop - t.start for t in run.truths[:SPLIT_REST_STEP]) != cut:
        raise ValueError("the record is not simulate_formation's for its recipe")
    return StageRecords(
        _formation_part(record, run, cut, rng), _grading_part(record, cut), cut
    )


def _formation_part(
    record: SimulatedRecord, run: _Run, cut: int, rng: np.random.Generator
) -> SimulatedRecord:
    """The whole record's rows before ``cut``, then the run's storage charge and rest."""
    recipe = record.recipe
    time_s = np.concatenate(run.times) / 10.0
    volts, amps = np.concatenate(run.volts), np.concatenate(run.amps)
    counts = [t.stop - t.start for t in run.truths]
    step = np.repeat([t.number for t in run.truths], counts)
    temps = _temperatures(recipe, time_s, amps)
    # the last kept row goes in with the new ones, so the storage charge's first row shows the switch
    tail = slice(cut - 1, None)
    channel = recipe.channel or Channel.for_cell(recipe.nominal_capacity_ah)
    volts, amps, temps = add_channel_errors(
        volts[tail], amps[tail], temps[tail], step[tail], channel, rng
    )
    return SimulatedRecord(
        recipe=recipe,
        time_s=np.concatenate((record.time_s[:cut], time_s[cut:])),
        voltage_v=np.concatenate((record.voltage_v[:cut], np.round(volts[1:], 5) + 0.0)),
        current_a=np.concatenate((record.current_a[:cut], np.round(amps[1:], 5) + 0.0)),
        temperature_c=np.concatenate((record.temperature_c[:cut], np.round(temps[1:], 2) + 0.0)),
        step=step,
        cycle=np.repeat([t.cycle for t in run.truths], counts),
        steps=tuple(run.truths),
    )


def _grading_part(record: SimulatedRecord, cut: int) -> SimulatedRecord:
    """The whole record's rows from ``cut`` on: time from 0, steps and cycles from 1."""
    t0 = float(record.time_s[cut])
    first = record.step_named(SPLIT_REST_STEP)
    shift_step, shift_cycle = first.number - 1, first.cycle - 1
    # the rest loses only leakage: its state of charge at the cut, on a straight line
    share = (t0 - first.start_s) / (first.end_s - first.start_s)
    truths = [
        StepTruth(
            t.number - shift_step,
            t.cycle - shift_cycle,
            t.kind,
            max(t.start, cut) - cut,
            t.stop - cut,
            max(t.start_s, t0) - t0,
            t.end_s - t0,
            t.soc_start + share * (t.soc_end - t.soc_start) if t is first else t.soc_start,
            t.soc_end,
            t.charge_ah,
        )
        for t in record.steps
        if t.stop > cut
    ]
    return SimulatedRecord(
        recipe=record.recipe,
        time_s=np.round((record.time_s[cut:] - t0) * 10.0) / 10.0,
        voltage_v=record.voltage_v[cut:],
        current_a=record.current_a[cut:],
        temperature_c=record.temperature_c[cut:],
        step=record.step[cut:] - shift_step,
        cycle=record.cycle[cut:] - shift_cycle,
        steps=tuple(truths),
    )


def stage_metadata(metadata: Mapping[str, str], stage: str) -> dict[str, str]:
    """``metadata`` with the ``stage`` a record of one stage says it holds (after the rest)."""
    return {**{k: v for k, v in metadata.items() if k != "stage"}, "stage": stage}
