"""Simulate the reference lot with PyBaMM's SPMe and write it as a committed test fixture.

Run by hand, never by the tests. PyBaMM is not a dependency of formgate, so run it in a
throwaway virtual environment with exactly the pinned version, from the repository root::

    python -m venv .venv-reference
    .venv-reference/bin/pip install pybamm==26.10.1.1
    .venv-reference/bin/python tests/reference/make_reference_lot.py

It writes ``tests/data/reference_lot/<cell>.csv.gz`` (cycle file v1, noiseless) and
``tests/data/reference_lot/truth.json``; ``--out DIR`` writes elsewhere. The same PyBaMM
version gives the same bytes. It refuses to run with any other PyBaMM version, because the
solver and the parameter sets change between releases and the committed truths would no
longer describe the committed files.

The physics (published)
-----------------------
Each cell is PyBaMM's single-particle model with electrolyte (SPMe), isothermal at 25 °C:
Marquis, Sulzer, Timms, Please, Chapman, J. Electrochem. Soc. 166 (2019) A3693. Parameter
sets, as shipped with PyBaMM:

* NMC811/graphite, ``Chen2020``: Chen, Brosa Planella, O'Regan, Gastol, Widanage,
  Kendrick, J. Electrochem. Soc. 167 (2020) 080534 (a 5 Ah cylindrical cell). Electrode
  width 3 % larger than published, so the cell grades at about 103 % of its 5 Ah nominal.
* LFP/graphite, ``Prada2013``: Prada, Di Domenico, Creff, Bernard, Sauvant-Moynot, Huet,
  J. Electrochem. Soc. 160 (2013) A616; its LFP open-circuit potential is the fit of
  Afshar, Morris, Khajepour, arXiv:1709.03970 (2017), its graphite one Chen et al. 2020.
  Scaled from 2.3 Ah to about 20.5 Ah by the number of electrode pairs in parallel, with
  "Nominal cell capacity [A.h]" set to 20 Ah.

Every model starts at the empty end of its window (PyBaMM ``initial_soc=0``, with the
0 % and 100 % state-of-charge voltages set to the program's limits).

Our own additions (not in the published model; plain modelling choices of this project)
--------------------------------------------------------------------------------------
Everything below is bookkeeping between the current the cycler records (the file) and the
current the SPMe receives; "charge current" is positive.

1. Formation loss. SPMe has no SEI growth from a fresh cell, so the model stands for the
   formed cell and the lithium the first charge loses is a side current. During the
   pre-charge (step 2) and the formation CC charge (step 4) the cell model receives
   ``(1 - phi) I`` of the recorded current ``I``, with ``phi = phi0 exp(-q / q_tau)`` and
   ``q`` the charge recorded since formation began: SEI growth is fastest on a fresh
   surface and slows as the layer grows. In the CV step 5, ``phi`` keeps the value it had
   at the end of step 4 (the recorded current is the model's divided by ``1 - phi``, and
   the CV ends when the *recorded* current reaches C/20). The loss ``phi0 q_tau`` is about
   9 % of the nominal capacity for a normal cell (first-cycle efficiency 0.89-0.92).
2. Leakage (internal short). A constant current ``I_leak`` discharges the model at all
   times and is not recorded: the model receives ``I - I_leak``, rests become a discharge
   at ``I_leak``. Its heat ``I_leak V`` is released inside the cell.
3. Side current in the grading charge (lithium plating). During steps 9 and 10 the model
   receives ``(1 - g)`` of the recorded current (recorded but not stored).
4. Sloped LFP (missing plateau). The published LFP potential blended with a straight line
   of our own: ``(1 - w) U(y) + w (3.75 V - 2.0 V y)``, w = 0.9. Between 3.65 V and 2.5 V
   no curve can slope more than about 11.5 mV per % of its capacity on average, and the
   graphite's flat stages make the sloped cell flattest where they are; this line keeps the
   flattest stretch at about 9.3 mV/% (the LFP rules call below 8 flat) while the cell keeps
   more than 80 % of its nominal capacity. A steeper line would cost more capacity.
5. Contact resistance (high DCIR): PyBaMM's "Contact resistance [Ohm]" with the model
   option ``{"contact resistance": "true"}``.
6. Cell-to-cell spread: capacity by the electrode area; resistance by dividing the two
   exchange-current densities and the electronic and ionic conductivities by a factor.
7. Temperature, computed after the simulation with a lumped model of our own,
   ``dT/dt = (T_amb + P R_th - T) / tau`` (exact per 1 s interval), 25 °C ambient,
   ``P = I (V - OCV)`` with the recorded current and the model's bulk open-circuit voltage,
   plus the leak's heat and any fault heat while the cell charges. The SPMe itself stays
   isothermal: the temperature does not feed back. R_th and tau are our own round values
   for a bare cell in a formation rack.

The program
-----------
The formation and grading program of ``pipeline.demo.synth`` (``cellmodel.FormationProgram`` defaults,
``simulate_formation``), with its step and cycle numbers: 1 rest 300 s; 2 pre-charge 0.05 C
to 12 % of nominal (by charge); 3 rest 600 s; 4 CC 0.2 C to the upper limit; 5 CV to C/20;
6 rest 1800 s; 7 CC discharge 0.2 C to the cut-off; 8 rest 1800 s; 9 CC 0.2 C; 10 CV to
C/20; 11 rest 3600 s; 12 grading discharge C/3 to the cut-off; 13 rest 1800 s; 14 CC 0.2 C
to the storage charge (NMC 50 %, LFP 15 % of the step 12 capacity, by charge passed);
15 rest 10800 s. Cycle 1 is steps 1-7, cycle 2 steps 8-12, cycle 3 steps 13-15. C-rates
are of the nominal capacity. The program is mirrored here, not imported, because this
script runs outside formgate's environment; tests/test_reference_lot.py checks the mirror.

The fixture
-----------
Model output every 1 s. The file keeps every row of a step's first 60 s, then one row
every 10 s, and the step's last row. A step's first row is the model's state just after the
switch (the new current already flowing) and is written 1 ms after the previous step's
last row, so times increase strictly. No noise at all: tests add their own. truth.json
holds the recipe of every cell and the model truths computed from the full 1 s output.
"""

from __future__ import annotations

import argparse
import gzip
import json
import sys
import tomllib
from collections.abc import Callable
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

PYBAMM_VERSION = "26.10.1.1"

try:
    import numpy as np
    import pybamm
except ImportError as exc:  # pragma: no cover - only run by hand
    sys.exit(f"make_reference_lot.py needs pybamm=={PYBAMM_VERSION} and numpy ({exc}); "
             "see this script's docstring for a throwaway environment.")

REPO = Path(__file__).resolve().parents[2]
DEFAULT_OUT = REPO / "tests" / "data" / "reference_lot"
RULES = REPO / "rules"

# ---------------------------------------------------------------- the program (mirrors synth)

INITIAL_REST_S = 300.0
PRE_CHARGE_RATE_C = 0.05
PRE_CHARGE_FRACTION = 0.12
PRE_CHARGE_REST_S = 600.0
CHARGE_RATE_C = 0.2
CV_CUTOFF_C = 0.05
REST_AFTER_CHARGE_S = 1800.0
DISCHARGE_RATE_C = 0.2
REST_AFTER_DISCHARGE_S = 1800.0
REST_BEFORE_GRADING_S = 3600.0
GRADING_RATE_C = 1.0 / 3.0
REST_AFTER_GRADING_S = 1800.0
FINAL_REST_S = 10800.0
CYCLE_OF_STEP = {1: 1, 2: 1, 3: 1, 4: 1, 5: 1, 6: 1, 7: 1, 8: 2, 9: 2, 10: 2, 11: 2, 12: 2,
                 13: 3, 14: 3, 15: 3}
MAX_STEP_S = 20 * 3600.0  # cap on a step that ends on a voltage or current; never reached

# Output: every row of a step's first 60 s, then every 10 s, and the step's last row.
DENSE_S = 60
SPARSE_EVERY_S = 10
FIRST_ROW_OFFSET_S = 0.001

SOLVER_RTOL = 1e-6
SOLVER_ATOL = 1e-8


@dataclass(frozen=True)
class Chemistry:
    """One chemistry's parameter set, limits and our own thermal values."""

    name: str
    parameter_set: str
    paper: str
    cell_type: str
    lot: str
    rules_file: str
    nominal_capacity_ah: float
    min_v: float  # discharge cut-off of the program
    max_v: float  # charge limit (CV level)
    storage_fraction: float  # of the step 12 capacity, by charge passed
    area_key: str  # the parameter that scales the electrode area
    area_base: float  # its value for a cell of capacity_factor 1
    thermal_resistance_k_per_w: float  # our own round values
    thermal_time_constant_s: float
    loss_scale_fraction: float  # q_tau of the formation loss, fraction of nominal


CHEMISTRIES = {
    "nmc_graphite": Chemistry(
        "nmc_graphite", "Chen2020",
        "Chen et al., J. Electrochem. Soc. 167 (2020) 080534",
        "DEMO-NMC-5A", "REF-LOT-01", "nmc_graphite.toml", 5.0, 2.5, 4.2, 0.5,
        # published 1.58 m; 3 % wider so the cell grades at about 103 % of nominal
        "Electrode width [m]", 1.58 * 1.03,
        # bare 21700-size can in a rack: about 10 K/W, heat capacity about 70 J/K (our own)
        10.0, 700.0, 0.15),
    "lfp_graphite": Chemistry(
        "lfp_graphite", "Prada2013",
        "Prada et al., J. Electrochem. Soc. 160 (2013) A616; LFP potential Afshar et al. 2017",
        "DEMO-LFP-20A", "REF-LOT-02", "lfp_graphite.toml", 20.0, 2.5, 3.65, 0.15,
        # 2.3 Ah published; 9.63 electrode pairs give about 20.5 Ah at C/3 to 2.5 V
        "Number of electrodes connected in parallel to make a cell", 9.63,
        # 20 Ah prismatic can: about 2 K/W, heat capacity about 600 J/K (our own)
        2.0, 1200.0, 0.15),
}


@dataclass(frozen=True)
class Recipe:
    """What makes one reference cell what it is; a defect is a named deviation of these."""

    name: str
    cell_id: str
    chemistry: str
    channel: str
    defect: str = ""
    capacity_factor: float = 1.0  # electrode area relative to the chemistry's base cell
    resistance_factor: float = 1.0  # divides exchange-current densities and conductivities
    formation_loss_fraction: float = 0.09  # phi0 q_tau, fraction of nominal
    formation_loss_scale_fraction: float | None = None  # q_tau; None: the chemistry's
    contact_resistance_ohm: float = 0.0
    leak_a: float = 0.0
    grading_side_fraction: float = 0.0
    ocp_slope_weight: float = 0.0
    fault_heat_w: float = 0.0
    expected_hazards: tuple[str, ...] = ()
    note: str = ""


def _normals(chem: str, prefix: str, loss: float, spread: list[tuple[float, float, float]],
             channel_row: str) -> list[Recipe]:
    cells = []
    for n, (cap_pct, res_pct, loss_pct) in enumerate(spread, start=1):
        cells.append(Recipe(
            name=f"{chem.split('_')[0]}_normal_{n}", cell_id=f"{prefix}{n:02d}", chemistry=chem,
            channel=f"{channel_row}-{n:02d}", capacity_factor=1.0 + cap_pct / 100.0,
            resistance_factor=1.0 + res_pct / 100.0,
            formation_loss_fraction=loss + loss_pct / 100.0))
    return cells


# Spread (capacity %, resistance %, formation loss in % of nominal): fixed by hand.
NMC_LOSS = 0.09
LFP_LOSS = 0.085
RECIPES: tuple[Recipe, ...] = (
    *_normals("nmc_graphite", "REF-N", NMC_LOSS,
              [(0.4, -3.0, 0.0), (-0.7, 4.0, 0.6), (0.9, 1.5, -0.7), (-0.2, -4.5, 0.3)], "R1"),
    Recipe("nmc_low_capacity", "REF-N05", "nmc_graphite", "R1-05", "low_capacity",
           capacity_factor=0.725, expected_hazards=("abnormal_capacity",),
           note="electrode area 72.5 % of the base cell: grading capacity about 75 % of nominal"),
    Recipe("nmc_high_dcir", "REF-N06", "nmc_graphite", "R1-06", "high_dcir",
           contact_resistance_ohm=0.058,
           note="58 mOhm contact resistance: DCIR about 3 times the 35 mOhm window"),
    Recipe("nmc_internal_short", "REF-N07", "nmc_graphite", "R1-07", "internal_short",
           leak_a=0.0303, expected_hazards=("internal_short",),
           note="unrecorded leak: the final rest falls at about -5 mV/h"),
    Recipe("nmc_lithium_plating", "REF-N08", "nmc_graphite", "R1-08", "lithium_plating",
           grading_side_fraction=0.075, expected_hazards=("lithium_plating",),
           note="7.5 % of the grading charge recorded but not stored: grading efficiency about 0.92"),
    *_normals("lfp_graphite", "REF-L", LFP_LOSS,
              [(-0.5, 2.0, 0.0), (0.8, -4.0, -0.7), (0.2, 4.5, 0.7), (-0.9, -1.0, 0.4)], "R2"),
    Recipe("lfp_low_first_cycle_efficiency", "REF-L05", "lfp_graphite", "R2-05",
           "low_first_cycle_efficiency", formation_loss_fraction=0.435,
           formation_loss_scale_fraction=0.5,
           note="formation loss about 38 % of nominal: first-cycle efficiency about 0.70"),
    Recipe("lfp_over_temperature", "REF-L06", "lfp_graphite", "R2-06", "over_temperature",
           fault_heat_w=22.0, expected_hazards=("over_temperature",),
           note="22 W fault heat while charging: about 69 degC"),
    Recipe("lfp_missing_plateau", "REF-L07", "lfp_graphite", "R2-07", "missing_plateau",
           ocp_slope_weight=0.9,
           note="LFP potential 90 % a straight line: no flat plateau (capacity falls too)"),
)

# ---------------------------------------------------------------- parameters


def _scaled(function: Callable[..., Any], factor: float) -> Callable[..., Any]:
    def scaled(*args: Any) -> Any:
        return function(*args) / factor
    return scaled


SLOPE_LINE_TOP_V = 3.75  # the line's value at y = 0 (our own)
SLOPE_LINE_V_PER_Y = 2.0  # its fall per unit of lithium fraction (our own)


def _sloped_lfp_ocp(published: Callable[[Any], Any], weight: float) -> Callable[[Any], Any]:
    def sloped(sto: Any) -> Any:
        line = SLOPE_LINE_TOP_V - SLOPE_LINE_V_PER_Y * sto
        return (1.0 - weight) * published(sto) + weight * line
    return sloped


def parameters(recipe: Recipe) -> tuple[pybamm.ParameterValues, dict[str, str], dict[str, Any]]:
    """The cell's PyBaMM parameter values, model options, and the values we changed."""
    chem = CHEMISTRIES[recipe.chemistry]
    p = pybamm.ParameterValues(chem.parameter_set)
    changed: dict[str, Any] = {
        chem.area_key: chem.area_base * recipe.capacity_factor,
        "Nominal cell capacity [A.h]": chem.nominal_capacity_ah,
        "Open-circuit voltage at 0% SOC [V]": chem.min_v,
        "Open-circuit voltage at 100% SOC [V]": chem.max_v,
        # The model's own stop events sit outside the program's limits, so that only the
        # program's terminations end a step.
        "Lower voltage cut-off [V]": chem.min_v - 0.3,
        "Upper voltage cut-off [V]": chem.max_v + 0.05,
    }
    p.update(changed)
    if recipe.resistance_factor != 1.0:
        k = recipe.resistance_factor
        for key in ("Negative electrode exchange-current density [A.m-2]",
                    "Positive electrode exchange-current density [A.m-2]",
                    "Electrolyte conductivity [S.m-1]"):
            p[key] = _scaled(p[key], k)
        for key in ("Negative electrode conductivity [S.m-1]",
                    "Positive electrode conductivity [S.m-1]"):
            p[key] = p[key] / k
            changed[key] = p[key]
        changed["resistance factor (divides exchange-current densities and conductivities)"] = k
    options: dict[str, str] = {}
    if recipe.contact_resistance_ohm:
        options["contact resistance"] = "true"
        p.update({"Contact resistance [Ohm]": recipe.contact_resistance_ohm})
        changed["Contact resistance [Ohm]"] = recipe.contact_resistance_ohm
    if recipe.ocp_slope_weight:
        p["Positive electrode OCP [V]"] = _sloped_lfp_ocp(p["Positive electrode OCP [V]"],
                                                          recipe.ocp_slope_weight)
        changed["Positive electrode OCP [V]"] = (
            f"(1 - {recipe.ocp_slope_weight}) x published + {recipe.ocp_slope_weight} x "
            f"({SLOPE_LINE_TOP_V} V - {SLOPE_LINE_V_PER_Y} V x stoichiometry)")
    return p, options, changed


# ---------------------------------------------------------------- the experiment


@dataclass
class StepPlan:
    """One program step: its PyBaMM step and how the recorded current follows from the model's."""

    number: int
    kind: str  # "rest", "cc", "cv"
    step: Any
    recorded: Callable[[Any, Any], Any]  # (t since step start, model charge current) -> recorded


def _current_step(model_charge_a: float | Callable[[Any], Any], duration_s: float,
                  stop: str | None) -> Any:
    value: Any
    if callable(model_charge_a):
        func = model_charge_a

        def value(t: Any) -> Any:
            return -func(t)  # PyBaMM: positive = discharge
    else:
        value = -model_charge_a
    kwargs: dict[str, Any] = {"duration": duration_s, "period": 1}
    if stop is not None:
        kwargs["termination"] = stop
    return pybamm.step.current(value, **kwargs)


class _Program:
    """Builds the program's steps for one recipe; tracks the formation side current."""

    def __init__(self, recipe: Recipe) -> None:
        self.r = recipe
        self.chem = CHEMISTRIES[recipe.chemistry]
        nominal = self.chem.nominal_capacity_ah
        scale = recipe.formation_loss_scale_fraction or self.chem.loss_scale_fraction
        self.q_tau_ah = scale * nominal
        self.phi0 = recipe.formation_loss_fraction / scale
        if not 0 <= self.phi0 < 1:
            raise ValueError(f"{recipe.name}: formation side fraction {self.phi0} out of [0, 1)")
        self.q_recorded_ah = 0.0  # recorded formation charge before the current step

    def phi(self, q_ah: Any, exp: Callable[[Any], Any]) -> Any:
        return self.phi0 * exp(-q_ah / self.q_tau_ah)

    def rest(self, number: int, duration_s: float) -> StepPlan:
        leak = self.r.leak_a
        if leak:
            step = _current_step(-leak, duration_s, None)
        else:
            step = pybamm.step.rest(duration_s, period=1)
        return StepPlan(number, "rest", step, lambda t, i: 0.0 * t)

    def cc(self, number: int, rate_c: float, *, charge_ah: float | None = None,
           formation: bool = False, side_fraction: float = 0.0) -> StepPlan:
        chem, leak = self.chem, self.r.leak_a
        recorded_a = rate_c * chem.nominal_capacity_ah
        if charge_ah is not None:
            duration = 3600.0 * charge_ah / abs(recorded_a)
        else:
            duration = MAX_STEP_S
        stop = f"> {chem.max_v} V" if recorded_a > 0 else f"< {chem.min_v} V"
        model: float | Callable[[Any], Any]
        if formation and self.phi0 > 0:
            q0 = self.q_recorded_ah

            def model(t: Any) -> Any:
                exp = pybamm.exp if isinstance(t, pybamm.Symbol) else np.exp
                q = q0 + recorded_a * t / 3600.0
                return (1.0 - self.phi(q, exp)) * recorded_a - leak
        else:
            model = (1.0 - side_fraction) * recorded_a - leak
        return StepPlan(number, "cc", _current_step(model, duration, stop),
                        lambda t, i: 0.0 * t + recorded_a)

    def cv(self, number: int, side_fraction: float) -> StepPlan:
        chem, leak = self.chem, self.r.leak_a
        cutoff_a = CV_CUTOFF_C * chem.nominal_capacity_ah
        model_cutoff = (1.0 - side_fraction) * cutoff_a - leak
        step = pybamm.step.voltage(chem.max_v, duration=MAX_STEP_S,
                                   termination=f"{model_cutoff:.9f} A", period=1)
        return StepPlan(number, "cv", step, lambda t, i: (i + leak) / (1.0 - side_fraction))


def _stage_one(prog: _Program) -> list[StepPlan]:
    nominal = prog.chem.nominal_capacity_ah
    plans = [prog.rest(1, INITIAL_REST_S)]
    pre_ah = PRE_CHARGE_FRACTION * nominal
    plans.append(prog.cc(2, PRE_CHARGE_RATE_C, charge_ah=pre_ah, formation=True))
    prog.q_recorded_ah = pre_ah
    plans.append(prog.rest(3, PRE_CHARGE_REST_S))
    plans.append(prog.cc(4, CHARGE_RATE_C, formation=True))
    return plans


def _stage_two(prog: _Program, phi_end: float) -> list[StepPlan]:
    g = prog.r.grading_side_fraction
    return [
        prog.cv(5, phi_end),
        prog.rest(6, REST_AFTER_CHARGE_S),
        prog.cc(7, -DISCHARGE_RATE_C),
        prog.rest(8, REST_AFTER_DISCHARGE_S),
        prog.cc(9, CHARGE_RATE_C, side_fraction=g),
        prog.cv(10, g),
        prog.rest(11, REST_BEFORE_GRADING_S),
        prog.cc(12, -GRADING_RATE_C),
        prog.rest(13, REST_AFTER_GRADING_S),
    ]


def _stage_three(prog: _Program, grading_ah: float) -> list[StepPlan]:
    storage_ah = prog.chem.storage_fraction * grading_ah
    return [prog.cc(14, CHARGE_RATE_C, charge_ah=storage_ah), prog.rest(15, FINAL_REST_S)]


@dataclass
class StepData:
    number: int
    kind: str
    t: Any
    v: Any
    i_model: Any
    i_rec: Any
    ocv: Any
    sto_neg: float
    sto_pos: float


def _solve(model: Any, p: Any, plans: list[StepPlan], start: Any, initial_soc: float) -> Any:
    solver = pybamm.IDAKLUSolver(rtol=SOLVER_RTOL, atol=SOLVER_ATOL)
    sim = pybamm.Simulation(model, parameter_values=p, solver=solver,
                            experiment=pybamm.Experiment([plan.step for plan in plans]))
    if start is None:
        return sim.solve(initial_soc=initial_soc)
    return sim.solve(starting_solution=start)


def _collect(solution: Any, plans: list[StepPlan], first: int) -> list[StepData]:
    out = []
    for plan, cycle in zip(plans, solution.cycles[first:first + len(plans)], strict=True):
        t = np.asarray(cycle["Time [s]"].entries, dtype=float)
        i_model = -np.asarray(cycle["Current [A]"].entries, dtype=float)
        out.append(StepData(
            number=plan.number, kind=plan.kind, t=t,
            v=np.asarray(cycle["Voltage [V]"].entries, dtype=float),
            i_model=i_model,
            i_rec=np.asarray(plan.recorded(t - t[0], i_model), dtype=float),
            ocv=np.asarray(cycle["Battery open-circuit voltage [V]"].entries, dtype=float),
            sto_neg=float(cycle["Average negative particle stoichiometry"].entries[-1]),
            sto_pos=float(cycle["Average positive particle stoichiometry"].entries[-1]),
        ))
    return out


def simulate(recipe: Recipe) -> tuple[list[StepData], dict[str, Any]]:
    """Run the whole program on one cell; return its steps at 1 s and what was set."""
    chem = CHEMISTRIES[recipe.chemistry]
    p, options, changed = parameters(recipe)
    model = pybamm.lithium_ion.SPMe(options=options)
    prog = _Program(recipe)
    # A leaking cell starts a little above the empty end, so that the leak during step 1 takes
    # it to the empty end rather than below the cut-off (our own choice).
    initial_soc = recipe.leak_a * INITIAL_REST_S / 3600.0 / (chem.nominal_capacity_ah * 1.03)

    plans = _stage_one(prog)
    sol = _solve(model, p, plans, None, initial_soc)
    steps = _collect(sol, plans, 0)
    step4 = steps[-1]
    q_end = prog.q_recorded_ah + float(np.trapezoid(step4.i_rec, step4.t)) / 3600.0
    phi_end = float(prog.phi(q_end, np.exp))

    plans2 = _stage_two(prog, phi_end)
    sol = _solve(model, p, plans2, sol, initial_soc)
    steps += _collect(sol, plans2, len(plans))
    grading = steps[-2]
    grading_ah = -float(np.trapezoid(grading.i_rec, grading.t)) / 3600.0

    plans3 = _stage_three(prog, grading_ah)
    sol = _solve(model, p, plans3, sol, initial_soc)
    steps += _collect(sol, plans3, len(plans) + len(plans2))

    settings = {
        "model": "SPMe",
        "model_options": options,
        "parameter_set": chem.parameter_set,
        "parameter_source": chem.paper,
        "parameters_changed": changed,
        "initial_soc": initial_soc,
        "solver": {"name": "IDAKLUSolver", "rtol": SOLVER_RTOL, "atol": SOLVER_ATOL},
        "formation_side_current": {"phi0": prog.phi0, "q_tau_Ah": prog.q_tau_ah,
                                   "phi_in_cv_step_5": phi_end},
    }
    return steps, settings


# ---------------------------------------------------------------- temperature


def temperatures(recipe: Recipe, steps: list[StepData]) -> list[Any]:
    """Lumped thermal model on the 1 s output, exact per interval (our own model)."""
    chem = CHEMISTRIES[recipe.chemistry]
    ambient = 25.0
    t = np.concatenate([s.t for s in steps])
    power = np.concatenate([
        s.i_rec * (s.v - s.ocv) + recipe.leak_a * s.v
        + np.where(s.i_rec > 0, recipe.fault_heat_w, 0.0)
        for s in steps])
    temps = np.empty(len(t))
    temps[0] = ambient
    decay = np.exp(-np.diff(t) / chem.thermal_time_constant_s)
    mean_power = 0.5 * (power[1:] + power[:-1])
    for k in range(1, len(t)):
        steady = ambient + mean_power[k - 1] * chem.thermal_resistance_k_per_w
        temps[k] = steady + (temps[k - 1] - steady) * decay[k - 1]
    out, start = [], 0
    for s in steps:
        out.append(temps[start:start + len(s.t)])
        start += len(s.t)
    return out


# ---------------------------------------------------------------- truths


def _r(x: float, digits: int = 10) -> float:
    return float(f"{x:.{digits}g}")


def truths(recipe: Recipe, steps: list[StepData], temps: list[Any]) -> dict[str, Any]:
    by = {s.number: s for s in steps}
    charge = {s.number: float(np.trapezoid(s.i_rec, s.t)) / 3600.0 for s in steps}
    grading = by[12]
    grading_ah = -charge[12]
    energy_wh = -float(np.trapezoid(grading.i_rec * grading.v, grading.t)) / 3600.0
    current = abs(float(grading.i_rec[0]))
    v_10s = float(np.interp(grading.t[0] + 10.0, grading.t, grading.v))
    final = by[15]
    keep = final.t - final.t[0] >= 600.0
    drift = float(np.polyfit(final.t[keep] / 3600.0, final.v[keep] * 1000.0, 1)[0])
    # What the cycler recorded but the model did not receive (besides the leak): phi * I_rec.
    side_ah = sum(float(np.trapezoid(s.i_rec - s.i_model - recipe.leak_a, s.t)) / 3600.0
                  for s in steps if s.number in (2, 4, 5))
    charging = [s for s in steps if s.kind in ("cc", "cv") and s.i_rec[0] > 0]
    discharging = [s for s in steps if s.kind == "cc" and s.i_rec[0] < 0]
    return {
        "step_charge_Ah": {str(n): _r(q) for n, q in charge.items()},
        "step_start_s": {str(s.number): _r(float(s.t[0]), 12) for s in steps},
        "step_end_s": {str(s.number): _r(float(s.t[-1]), 12) for s in steps},
        "grading_capacity_Ah": _r(grading_ah),
        "grading_capacity_fraction_of_nominal": _r(grading_ah / CHEMISTRIES[recipe.chemistry]
                                                   .nominal_capacity_ah),
        "first_cycle_efficiency": _r(-charge[7] / (charge[2] + charge[4] + charge[5])),
        "grading_coulombic_efficiency": _r(-charge[12] / (charge[9] + charge[10])),
        "grading_mean_voltage_V": _r(energy_wh / grading_ah),
        "dcir_mOhm": _r((float(by[11].v[-1]) - v_10s) / current * 1000.0),
        "rest_voltage_drift_mV_per_h": _r(drift),
        "max_temperature_C": _r(float(max(np.max(x) for x in temps))),
        "max_charge_voltage_V": _r(float(max(np.max(s.v) for s in charging))),
        "min_discharge_voltage_V": _r(float(min(np.min(s.v) for s in discharging))),
        "formation_side_charge_Ah": _r(side_ah),
        "rest_ends": {
            str(n): {"voltage_V": _r(float(by[n].v[-1])),
                     "negative_stoichiometry": _r(by[n].sto_neg),
                     "positive_stoichiometry": _r(by[n].sto_pos)}
            for n in (11, 15)
        },
    }


# The metrics the generator can judge from its own truths (plateau metrics it cannot: those
# are set by design below and checked with formgate itself before the fixture is committed).
_JUDGED = ("first_cycle_efficiency", "cycle_count", "grading_capacity_Ah",
           "grading_coulombic_efficiency", "grading_mean_voltage_V", "dcir_mOhm",
           "max_charge_voltage_V", "min_discharge_voltage_V", "max_temperature_C",
           "rest_voltage_drift_mV_per_h")
_PLATEAU_FAILS = {"lfp_missing_plateau": ("plateau_present", "plateau_total")}


def judge(recipe: Recipe, truth: dict[str, Any]) -> dict[str, Any]:
    """Apply the shipped rule file's windows to the truths: verdict, failed checks, hazards."""
    chem = CHEMISTRIES[recipe.chemistry]
    rules = tomllib.loads((RULES / chem.rules_file).read_text(encoding="utf-8"))
    values = dict(truth, cycle_count=2)
    failed_reject, failed_review, hazards = [], [], []
    for name, check in rules["check"].items():
        if check["metric"] not in _JUDGED:
            if name in _PLATEAU_FAILS.get(recipe.name, ()):
                (failed_reject if check["severity"] == "reject" else failed_review).append(name)
            continue
        if "cell_types" in check and chem.cell_type not in check["cell_types"]:
            continue
        value = values[check["metric"]]
        scale = chem.nominal_capacity_ah if check.get("relative_to") == "nominal_capacity" else 1.0
        low, high = check.get("low"), check.get("high")
        if (low is not None and value < low * scale) or (high is not None and value > high * scale):
            if check["severity"] == "reject":
                failed_reject.append(name)
                if check.get("hazard"):
                    hazards.append(check["hazard"])
            else:
                failed_review.append(name)
    verdict = "fail" if failed_reject else ("hold" if failed_review else "pass")
    return {
        "rules_revision": rules["rule_set"]["revision"],
        "expected_verdict": verdict,
        "expected_hazards": sorted(set(hazards)),
        "expected_failed_checks": sorted(failed_reject + failed_review),
    }


# ---------------------------------------------------------------- writing


def _fixture_rows(step: StepData, temps: Any) -> list[str]:
    rel = step.t - step.t[0]
    # The solver's 1 s grid is not exactly whole seconds from the step's start (round-off
    # of order 1e-5 s late in a long run), so rows are picked by the nearest time.
    dense = np.flatnonzero(rel <= DENSE_S + 0.01)
    targets = np.arange(DENSE_S + SPARSE_EVERY_S, rel[-1], SPARSE_EVERY_S)
    sparse = np.minimum(np.searchsorted(rel, targets - 0.01), len(rel) - 1)
    idx = np.unique(np.concatenate([dense, sparse, [len(rel) - 1]]))
    # The step's last row may fall within a few ms of the row before it: keep the last row.
    if len(idx) > 1 and step.t[idx[-1]] - step.t[idx[-2]] < 0.005:
        idx = np.delete(idx, -2)
    rows = []
    for k in idx:
        t = float(step.t[k]) + (FIRST_ROW_OFFSET_S if k == 0 and step.number != 1 else 0.0)
        rows.append(f"{t:.3f},{step.v[k]:.6f},{step.i_rec[k] + 0.0:.6f},{temps[k]:.3f},"
                    f"{step.number},{CYCLE_OF_STEP[step.number]}")
    return rows


def cycle_file_text(recipe: Recipe, steps: list[StepData], temps: list[Any], index: int) -> str:
    chem = CHEMISTRIES[recipe.chemistry]
    metadata = {
        "cell_id": recipe.cell_id,
        "lot": chem.lot,
        "cell_type": chem.cell_type,
        "channel": recipe.channel,
        "station": "reference-model",
        "program": f"{chem.name}-formation-grading-v1",
        "started_at": f"2026-11-02T06:{index:02d}:00+00:00",
    }
    lines = [f"# {k}: {v}" for k, v in metadata.items()]
    lines.append("time_s,voltage_V,current_A,temperature_C,step,cycle")
    for step, temp in zip(steps, temps, strict=True):
        lines.extend(_fixture_rows(step, temp))
    return "\n".join(lines) + "\n"


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, default=DEFAULT_OUT)
    parser.add_argument("--only", nargs="*", help="simulate only these cells (trial runs)")
    args = parser.parse_args(argv)
    if pybamm.__version__ != PYBAMM_VERSION:
        sys.exit(f"make_reference_lot.py is pinned to pybamm=={PYBAMM_VERSION}; this is "
                 f"pybamm {pybamm.__version__}. Install the pinned version in a throwaway "
                 "environment (see the docstring): another version would write other numbers "
                 "than the committed truths.")
    pybamm.set_logging_level("ERROR")
    args.out.mkdir(parents=True, exist_ok=True)
    truth_all: dict[str, Any] = {}
    for index, recipe in enumerate(RECIPES):
        if args.only and recipe.name not in args.only:
            continue
        steps, settings = simulate(recipe)
        temps = temperatures(recipe, steps)
        truth = truths(recipe, steps, temps)
        recipe_dict = {k: v for k, v in asdict(recipe).items()
                       if k not in ("name", "cell_id", "chemistry", "channel", "defect", "note",
                                    "expected_hazards")}
        entry = {
            "cell_id": recipe.cell_id,
            "file": f"{recipe.name}.csv.gz",
            "chemistry": recipe.chemistry,
            "cell_type": CHEMISTRIES[recipe.chemistry].cell_type,
            "nominal_capacity_Ah": CHEMISTRIES[recipe.chemistry].nominal_capacity_ah,
            "parameter_set": settings.pop("parameter_set"),
            "parameter_source": settings.pop("parameter_source"),
            "pybamm_version": pybamm.__version__,
            "model": settings.pop("model"),
            "model_options": settings.pop("model_options"),
            "defect": recipe.defect,
            "design": "defect" if recipe.defect else "normal",
            "recipe": {"note": recipe.note, **recipe_dict},
            "simulation": settings,
            "thermal_model": {
                "ambient_C": 25.0,
                "thermal_resistance_K_per_W": CHEMISTRIES[recipe.chemistry].thermal_resistance_k_per_w,
                "time_constant_s": CHEMISTRIES[recipe.chemistry].thermal_time_constant_s,
            },
            **judge(recipe, truth),
            "design_hazards": list(recipe.expected_hazards),
            "truth": truth,
        }
        truth_all[recipe.name] = json.loads(json.dumps(entry, default=str))
        text = cycle_file_text(recipe, steps, temps, index)
        data = gzip.compress(text.encode("ascii"), compresslevel=9, mtime=0)
        (args.out / f"{recipe.name}.csv.gz").write_bytes(data)
        t = truth
        print(f"{recipe.name:32s} Q={t['grading_capacity_Ah']:.4f} FCE={t['first_cycle_efficiency']:.4f} "
              f"CE={t['grading_coulombic_efficiency']:.4f} Vm={t['grading_mean_voltage_V']:.4f} "
              f"DCIR={t['dcir_mOhm']:.2f} drift={t['rest_voltage_drift_mV_per_h']:.3f} "
              f"Tmax={t['max_temperature_C']:.2f} {entry['expected_verdict']} "
              f"{entry['expected_failed_checks']} {len(data) / 1000:.0f} kB", flush=True)
    document = {
        "description": "Reference lot simulated with PyBaMM's SPMe; see tests/reference/README.md.",
        "pybamm_version": PYBAMM_VERSION,
        "cells": truth_all,
    }
    (args.out / "truth.json").write_text(json.dumps(document, indent=1) + "\n", encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())
