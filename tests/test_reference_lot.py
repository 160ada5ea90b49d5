"""The reference lot fixture itself: readable, the program's steps, Faraday, truths, published OCVs.

These tests check the committed PyBaMM fixture (tests/reference/README.md) and its loader,
not formgate's judging of it.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from pipeline.demo import ocp
from pipeline.demo.cellmodel import FormationProgram
from pipeline.read.cyclefile import read_cycle_file
from tests.reference.lot import (
    FIXTURE_DIR,
    REFERENCE_CELLS,
    fixture_path,
    load_cell,
    load_truth,
    read_fixture,
)

PROGRAM_STEPS = tuple(range(1, 16))
CYCLE_OF_STEP = {**dict.fromkeys(range(1, 8), 1), **dict.fromkeys(range(8, 13), 2),
                 **dict.fromkeys(range(13, 16), 3)}
REST_STEPS = (1, 3, 6, 8, 11, 13, 15)
CHARGE_STEPS = (2, 4, 5, 9, 10, 14)
DISCHARGE_STEPS = (7, 12)


def _cell(name: str) -> dict:
    return load_truth()["cells"][name]


def _step_charges(time_s: np.ndarray, current_a: np.ndarray, step: np.ndarray) -> dict[int, float]:
    return {n: float(np.trapezoid(current_a[step == n], time_s[step == n])) / 3600.0
            for n in PROGRAM_STEPS}


def test_truth_names_every_cell_and_the_fixture_stays_small() -> None:
    assert tuple(load_truth()["cells"]) == REFERENCE_CELLS
    size = sum(p.stat().st_size for p in FIXTURE_DIR.iterdir())
    assert size < 3_000_000  # the fixture's budget
    for name in REFERENCE_CELLS:
        entry = _cell(name)
        assert entry["pybamm_version"] == load_truth()["pybamm_version"]
        assert (entry["defect"] == "") == (entry["design"] == "normal")


@pytest.mark.parametrize("name", REFERENCE_CELLS)
def test_every_file_reads_as_a_cycle_file(name: str) -> None:
    path = fixture_path(name)
    trace = read_cycle_file(path.read_bytes(), path.name)
    entry = _cell(name)
    assert trace.metadata["cell_id"] == entry["cell_id"]
    assert trace.metadata["cell_type"] == entry["cell_type"]
    assert trace.metadata["station"] == "reference-model"
    assert np.all(np.diff(trace.time_s) > 0)
    assert trace.step is not None and trace.cycle is not None
    assert len(trace.time_s) == len(read_fixture(name)[1])


@pytest.mark.parametrize("name", REFERENCE_CELLS)
def test_steps_follow_the_formation_program(name: str) -> None:
    _, rows = read_fixture(name)
    t, current, step, cycle = rows[:, 0], rows[:, 2], rows[:, 4].astype(int), rows[:, 5].astype(int)
    runs = step[np.concatenate(([0], np.flatnonzero(np.diff(step)) + 1))]
    assert tuple(runs) == PROGRAM_STEPS
    assert all(CYCLE_OF_STEP[s] == c for s, c in zip(step, cycle, strict=True))
    entry = _cell(name)
    nominal = entry["nominal_capacity_Ah"]
    program = FormationProgram()  # the reference lot mirrors synth's default program
    truth = entry["truth"]
    duration = {n: truth["step_end_s"][str(n)] - truth["step_start_s"][str(n)] for n in PROGRAM_STEPS}
    rests = {1: program.initial_rest_s, 3: program.pre_charge_rest_s, 6: program.rest_after_charge_s,
             8: program.rest_after_discharge_s, 11: program.rest_before_grading_s,
             13: program.rest_after_grading_s, 15: program.final_rest_s}
    for n, seconds in rests.items():
        assert duration[n] == pytest.approx(seconds, abs=1e-3)
        assert np.all(current[step == n] == 0.0)
    rates = {2: program.pre_charge_rate_c, 4: program.charge_rate_c, 7: -program.discharge_rate_c,
             9: program.charge_rate_c, 12: -program.grading_rate_c, 14: program.charge_rate_c}
    for n, rate in rates.items():
        assert np.allclose(current[step == n], rate * nominal, rtol=1e-9, atol=1e-6)
    charges = {int(k): v for k, v in truth["step_charge_Ah"].items()}
    assert charges[2] == pytest.approx(program.pre_charge_fraction * nominal, rel=1e-6)
    for n in (5, 10):  # CV steps end at the C/20 cut-off, decaying from the CC level
        i = current[step == n]
        assert i[-1] == pytest.approx(program.cv_cutoff_c * nominal, rel=1e-3)
        assert np.all(np.diff(i) <= 1e-6) and np.all(i > 0)
    assert all(charges[n] > 0 for n in CHARGE_STEPS)
    assert all(charges[n] < 0 for n in DISCHARGE_STEPS)
    assert t[0] == 0.0


@pytest.mark.parametrize("name", REFERENCE_CELLS)
@pytest.mark.parametrize("interval_s", [1.0, 5.0])
def test_resampled_charge_is_conserved(name: str, interval_s: float) -> None:
    record = load_cell(name, interval_s)
    truth = {int(k): v for k, v in record.truth["truth"]["step_charge_Ah"].items()}
    measured = _step_charges(record.time_s, record.current_a, record.step)
    # Faraday: charge is the time integral of current. The resampling leaves out each step's
    # first 0.1 s (at most 0.1 s x 0.2 C per step), far below 0.05 %.
    assert sum(measured.values()) == pytest.approx(sum(truth.values()), rel=5e-4)
    moved = sum(abs(q) for q in truth.values())
    for n in PROGRAM_STEPS:
        assert measured[n] == pytest.approx(truth[n], abs=5e-4 * moved / len(PROGRAM_STEPS))


@pytest.mark.parametrize("name", REFERENCE_CELLS)
def test_efficiency_and_grading_capacity_match_truth(name: str) -> None:
    record = load_cell(name, 10.0)
    q = _step_charges(record.time_s, record.current_a, record.step)
    truth = record.truth["truth"]
    assert -q[12] == pytest.approx(truth["grading_capacity_Ah"], rel=1e-3)
    first = -q[7] / (q[2] + q[4] + q[5])
    assert first == pytest.approx(truth["first_cycle_efficiency"], rel=1e-3)
    grading = -q[12] / (q[9] + q[10])
    assert grading == pytest.approx(truth["grading_coulombic_efficiency"], rel=1e-3)


def test_resampling_keeps_steps_apart_and_follows_the_interval() -> None:
    record = load_cell("lfp_normal_1", 5.0)
    assert np.all(np.diff(record.time_s) > 0)
    truth = record.truth["truth"]
    for n in PROGRAM_STEPS:
        t = record.time_s[record.step == n]
        start = truth["step_start_s"][str(n)]
        assert t[0] == pytest.approx(start + 0.1, abs=1e-3)  # the file keeps ms
        assert t[-1] == pytest.approx(truth["step_end_s"][str(n)], abs=2e-3)
        inner = np.diff(t[1:-1])
        assert np.allclose(inner, 5.0, atol=1e-6)
    with pytest.raises(ValueError, match="interval_s"):
        load_cell("lfp_normal_1", 0.5)


def _published_ocv(entry: dict, negative: float, positive: float) -> float:
    # Graphite: Chen, Brosa Planella, O'Regan, Gastol, Widanage, Kendrick, J. Electrochem. Soc.
    # 167 (2020) 080534 (both parameter sets use it). NMC811: the same paper. LFP: Afshar,
    # Morris, Khajepour, arXiv:1709.03970 (2017), the LFP curve of the Prada 2013 set.
    if entry["chemistry"] == "nmc_graphite":
        cathode = float(ocp.nmc811_chen2020(positive))
    else:
        cathode = float(ocp.lfp_afshar2017(positive))
    return cathode - float(ocp.graphite_chen2020(negative))


@pytest.mark.parametrize("name", REFERENCE_CELLS)
def test_rest_end_voltage_is_the_published_open_circuit_voltage(name: str) -> None:
    entry = _cell(name)
    if entry["recipe"]["ocp_slope_weight"] or entry["recipe"]["leak_a"]:
        pytest.skip("the cell's potential is not the published one, or a leak flows at rest")
    _, rows = read_fixture(name)
    step = rows[:, 4].astype(int)
    for n in ("11", "15"):
        end = entry["truth"]["rest_ends"][n]
        volts = rows[step == int(n), 1][-1]
        assert volts == pytest.approx(end["voltage_V"], abs=2e-6)
        published = _published_ocv(entry, end["negative_stoichiometry"], end["positive_stoichiometry"])
        # After 1 h (step 11) and 3 h (step 15) at rest the particles have relaxed to within
        # a few mV of equilibrium in the SPMe; a few mV is also the fits' own accuracy.
        assert abs(volts - published) < 3e-3, (n, volts, published)
        assert math.isfinite(published)
