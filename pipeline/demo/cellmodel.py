"""The simulated cell: its chemistry, its recipe, and how its voltage and temperature respond.

Pure: a recipe in, numbers out (no clock, no files, no global random state). The cell
model is deliberately small: a full-cell open-circuit voltage from published electrode fits
(pipeline.demo.ocp), an ohmic resistance, one RC element for relaxation, first-cycle
lithium (or sodium) loss, a side reaction on charge, a leakage current for self-discharge,
lumped I^2 R heating. A recipe carries the settings of the program that drives the cell
(:class:`FormationProgram`); running that program step by step is left to
:mod:`pipeline.demo.synth`; what a cycler channel records of it (noise, offset, spikes) to
:mod:`pipeline.demo.channel`. It exists to give the demo and the tests plausible records
whose true values are known; formgate never uses it to judge a real cell.

Current sign: positive = charge (cycle file version 1). State of charge ``soc``
is the fraction of the cell's reversible capacity: 0 where the open-circuit voltage
meets the discharge cut-off, 1 at the full end of the curve. Before the first
discharge it starts below 0, by the lithium the first charge loses to the solid
electrolyte interphase.
"""

from __future__ import annotations

import functools
import math
import types
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field

import numpy as np
from scipy import optimize

from pipeline.demo import ocp
from pipeline.demo.channel import Channel
from pipeline.model import FloatArray

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
    # Extra charge overpotential at full charge and 1 C (see CellModel); our own values, set so CV
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


@functools.cache
def _soc_floor(chemistry: str) -> float:
    """Where the chemistry's curve reaches its cut-off: our SOC 0 (0 if it starts above)."""
    chem = CHEMISTRIES[chemistry]

    def gap(s: float) -> float:
        return float(chem.ocv(np.asarray(s))) - chem.min_v

    return 0.0 if gap(0.0) >= 0 else float(optimize.brentq(gap, 0.0, 0.5, xtol=1e-12))


class CellModel:
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


def temperatures(recipe: CellRecipe, time_s: FloatArray, current_a: FloatArray) -> FloatArray:
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
    cell = CellModel(recipe)
    storage = recipe.program.storage_soc
    soc = cell.chem.storage_soc if storage is None else storage
    h = 1e-4
    volts = cell.base(np.array([soc - h, soc + h]))
    dv_dsoc = float(volts[1] - volts[0]) / (2 * h)
    return -drift_mv_per_h / 1000.0 * recipe.capacity_ah / dv_dsoc
