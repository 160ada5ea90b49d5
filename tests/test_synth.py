"""Simulated cycle records: Faraday bookkeeping, file text, determinism, each defect's signature.

Capacities are recomputed here by Coulomb counting (numpy.trapezoid over the
rows, Faraday's law Q = I t), resistance from the voltage step at the start of
the grading discharge, drift by a least-squares line (numpy.polyfit), so the
simulator is checked against outside definitions, not against itself.
"""

from __future__ import annotations

import csv
import dataclasses
import gzip
import io
import pathlib

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.demo import cellmodel, cycletext, ocp, synth
from pipeline.demo import lots as demo
from pipeline.demo.cellmodel import CellRecipe
from pipeline.demo.channel import NOISELESS, Channel
from pipeline.demo.synth import SimulatedRecord

NO_NOISE = {"channel": NOISELESS}


def simulate(seed: int = 7, **changes: object) -> SimulatedRecord:
    return synth.simulate_formation(CellRecipe(**changes), np.random.default_rng(seed))  # type: ignore[arg-type]


def coulombs_ah(record: SimulatedRecord, truth: synth.StepTruth) -> float:
    """Coulomb counting over the step's own rows (trapezoid rule, docs/metrics.md)."""
    rows = slice(truth.start, truth.stop)
    return float(np.trapezoid(np.abs(record.current_a[rows]), record.time_s[rows])) / 3600.0


def dcir_ohm(record: SimulatedRecord, pulse_s: float = 10.0) -> float:
    """(V before the rest -> grading discharge step - V pulse_s into it) / |I| (docs/metrics.md)."""
    grading = record.step_named(synth.GRADING_STEP)
    rows = slice(grading.start, grading.stop)
    before = float(record.voltage_v[grading.start - 1])
    t0 = float(record.time_s[grading.start - 1])
    after = float(np.interp(t0 + pulse_s, record.time_s[rows], record.voltage_v[rows]))
    return (before - after) / abs(float(record.current_a[grading.start]))


def final_rest_drift_mv_per_h(record: SimulatedRecord, relax_s: float = 600.0) -> float:
    rest = record.step_named(synth.FINAL_REST_STEP)
    t = record.time_s[rest.start : rest.stop]
    v = record.voltage_v[rest.start : rest.stop]
    keep = t >= t[0] + relax_s
    return float(np.polyfit(t[keep] / 3600.0, v[keep] * 1000.0, 1)[0])


def longest_flat_pct(record: SimulatedRecord, flat_mv_per_pct: float = 5.0) -> float:
    """Longest run of the grading discharge with |dV/dq| <= threshold (q in % of capacity)."""
    g = record.step_named(synth.GRADING_STEP)
    t, v = record.time_s[g.start : g.stop], record.voltage_v[g.start : g.stop]
    i = np.abs(record.current_a[g.start : g.stop])
    q = np.concatenate(([0.0], np.cumsum(np.diff(t) * 0.5 * (i[1:] + i[:-1]))))
    grid = np.linspace(0.0, 100.0, 1001)
    dv_dq = np.gradient(np.interp(grid, 100 * q / q[-1], v), grid) * 1000
    flat = np.abs(dv_dq) <= flat_mv_per_pct
    best = run = 0
    for f in flat:
        run = run + 1 if f else 0
        best = max(best, run)
    return best * (grid[1] - grid[0])


# ------------------------------------------------------------ constant-current curve


# Faraday's law / Coulomb counting: a constant current I for t seconds passes I t / 3600 Ah.
@settings(max_examples=60, deadline=None)
@given(
    capacity_ah=st.floats(min_value=0.05, max_value=300.0),
    rate_c=st.floats(min_value=0.05, max_value=3.0),
    dt_s=st.floats(min_value=0.5, max_value=120.0),
)
def test_constant_current_capacity_equals_current_times_time(
    capacity_ah: float, rate_c: float, dt_s: float
) -> None:
    current_a = rate_c * capacity_ah
    t, _, i = cellmodel.constant_current_curve(
        ocp.lfp_graphite_cell, capacity_ah, current_a, 0.01, dt_s, 0.0, None
    )
    assert np.all(np.diff(t) > 0) and t[0] == 0.0
    assert np.all(i == -current_a)
    assert float(np.trapezoid(-i, t)) / 3600.0 == pytest.approx(capacity_ah, rel=1e-9)
    assert current_a * float(t[-1]) / 3600.0 == pytest.approx(capacity_ah, rel=1e-12)


def test_constant_current_voltage_is_ocv_minus_ir() -> None:
    cell = ocp.nmc811_graphite_cell
    t, v, _ = cellmodel.constant_current_curve(cell, 5.0, 1.0, 0.03, 10.0, 0.0, None)
    soc = 1.0 - t / 18000.0
    assert np.allclose(v, ocp.nmc811_graphite_cell(soc) - 0.03, atol=1e-12)


def test_constant_current_noise_has_the_requested_rms() -> None:
    rng = np.random.default_rng(3)
    t, v, _ = cellmodel.constant_current_curve(ocp.lfp_graphite_cell, 20.0, 4.0, 0.0, 1.0, 1e-3, rng)
    clean = ocp.lfp_graphite_cell(1.0 - 4.0 * t / 72000.0)
    assert float(np.std(v - clean)) == pytest.approx(1e-3, rel=0.05)


def test_constant_current_refuses_nonsense() -> None:
    with pytest.raises(ValueError, match="must be positive"):
        cellmodel.constant_current_curve(ocp.lfp_graphite_cell, 1.0, -1.0, 0.0, 1.0, 0.0, None)
    with pytest.raises(ValueError, match="random generator"):
        cellmodel.constant_current_curve(ocp.lfp_graphite_cell, 1.0, 1.0, 0.0, 1.0, 1e-3, None)


# ------------------------------------------------------------ the formation record


def test_time_strictly_increases_and_steps_tile_the_record() -> None:
    record = simulate()
    assert np.all(np.diff(record.time_s) > 0)
    assert record.steps[0].start == 0 and record.steps[-1].stop == len(record)
    for before, after in zip(record.steps, record.steps[1:], strict=False):
        assert before.stop == after.start and before.end_s == after.start_s
    for truth in record.steps:
        assert np.all(record.step[truth.start : truth.stop] == truth.number)
        assert np.all(record.cycle[truth.start : truth.stop] == truth.cycle)
    with pytest.raises(ValueError):
        record.voltage_v[0] = 0.0  # read-only arrays in a frozen record


def test_sampling_interval_is_kept_inside_steps() -> None:
    record = simulate(sample_interval_s=10.0)
    gaps = np.diff(record.time_s)
    assert float(gaps.max()) == pytest.approx(10.0, abs=1e-9)
    assert float(gaps.min()) >= 0.1 - 1e-9


def test_faraday_bookkeeping_of_every_step() -> None:
    # Faraday's law: charge passed = capacity x change of state of charge (plus the leak).
    recipe = CellRecipe(self_discharge_a=0.02)
    record = synth.simulate_formation(recipe, np.random.default_rng(1))
    for truth in record.steps:
        leak_ah = recipe.self_discharge_a * (truth.end_s - truth.start_s) / 3600.0
        change = recipe.capacity_ah * (truth.soc_end - truth.soc_start)
        assert truth.charge_ah - leak_ah == pytest.approx(change, abs=1e-9)


def test_faraday_bookkeeping_with_a_side_reaction_on_charge() -> None:
    # Of each charging current only 1 - f reaches the state of charge; discharge is untouched.
    recipe = CellRecipe(self_discharge_a=0.01, charge_side_fraction=0.07)
    record = synth.simulate_formation(recipe, np.random.default_rng(1))
    for truth in record.steps:
        stored = 1.0 - 0.07 if truth.charge_ah > 0 else 1.0
        leak_ah = recipe.self_discharge_a * (truth.end_s - truth.start_s) / 3600.0
        change = recipe.capacity_ah * (truth.soc_end - truth.soc_start)
        assert stored * truth.charge_ah - leak_ah == pytest.approx(change, abs=1e-9)


def test_a_side_reaction_on_charge_lowers_every_cycle_efficiency() -> None:
    record = simulate(charge_side_fraction=0.07, **NO_NOISE)
    charge_2 = sum(coulombs_ah(record, record.step_named(n)) for n in (9, 10))
    grading = coulombs_ah(record, record.step_named(synth.GRADING_STEP))
    assert grading / charge_2 == pytest.approx(0.93, abs=0.002)
    assert grading == pytest.approx(CellRecipe().capacity_ah, rel=0.005)  # the capacity stays
    charge_1 = sum(coulombs_ah(record, record.step_named(n)) for n in (2, 4, 5))
    discharge_1 = coulombs_ah(record, record.step_named(7))
    assert discharge_1 / charge_1 == pytest.approx((1 - 0.09) * 0.93, abs=0.01)


def test_coulomb_counting_matches_the_true_charge_of_each_step() -> None:
    record = simulate(**NO_NOISE)
    for truth in record.steps:
        if truth.kind == "rest":
            assert coulombs_ah(record, truth) == 0.0
        else:
            # The first row of a step is 0.1 s after the switch; the trapezoid rule misses that.
            missed_ah = 0.1 * float(np.abs(record.current_a[truth.start])) / 3600.0
            counted = coulombs_ah(record, truth)
            assert counted == pytest.approx(abs(truth.charge_ah), rel=1e-4, abs=1.5 * missed_ah)


@pytest.mark.parametrize("chemistry", sorted(cellmodel.CHEMISTRIES))
def test_measured_capacities_come_out_where_the_recipe_says(chemistry: str) -> None:
    recipe = CellRecipe(
        chemistry=chemistry,
        nominal_capacity_ah=5.0,
        capacity_factor=1.03,
        resistance_ohm=0.02,
        polarisation_ohm=0.01,
        first_cycle_loss_fraction=0.08,
    )
    record = synth.simulate_formation(recipe, np.random.default_rng(2))
    grading = coulombs_ah(record, record.step_named(synth.GRADING_STEP))
    assert grading == pytest.approx(recipe.capacity_ah, rel=0.005)
    charge_1 = sum(coulombs_ah(record, record.step_named(n)) for n in (2, 4, 5))
    discharge_1 = coulombs_ah(record, record.step_named(7))
    assert discharge_1 / charge_1 == pytest.approx(1 - recipe.first_cycle_loss_fraction, abs=0.01)


@pytest.mark.parametrize("chemistry", sorted(cellmodel.CHEMISTRIES))
def test_charge_is_cc_then_cv_at_the_limit_and_discharge_ends_at_cut_off(chemistry: str) -> None:
    chem = cellmodel.CHEMISTRIES[chemistry]
    record = simulate(chemistry=chemistry, **NO_NOISE)
    cc, cv = record.step_named(9), record.step_named(10)
    # CC reaches the limit without a jump, then the cycler holds it.
    assert float(record.voltage_v[cc.stop - 1]) == pytest.approx(chem.max_v, abs=0.005)
    assert np.all(record.voltage_v[cv.start : cv.stop] == chem.max_v)
    currents = record.current_a[cv.start : cv.stop]
    assert np.all(np.diff(currents) < 0)
    # CV ends at C/20 (common practice), within one 0.1 s tick.
    assert float(currents[-1]) == pytest.approx(0.05 * 20.0, rel=0.002)
    # At rest after the full charge the voltage relaxes below the CV level.
    rest = record.step_named(11)
    assert float(record.voltage_v[rest.stop - 1]) < chem.max_v
    grading = record.step_named(synth.GRADING_STEP)
    assert float(record.voltage_v[grading.stop - 1]) == pytest.approx(chem.min_v, abs=0.005)


def test_one_hertz_sampling_gives_the_same_cell() -> None:
    coarse = simulate(sample_interval_s=10.0)
    fine = simulate(sample_interval_s=1.0)
    assert 9 * len(coarse) < len(fine) < 10 * len(coarse)
    assert np.all(np.diff(fine.time_s) > 0)
    grading = synth.GRADING_STEP
    assert coulombs_ah(fine, fine.step_named(grading)) == pytest.approx(
        coulombs_ah(coarse, coarse.step_named(grading)), rel=5e-4
    )


def test_temperature_starts_at_ambient_and_joule_heating_is_small() -> None:
    record = simulate(**NO_NOISE)
    assert float(record.temperature_c[0]) == pytest.approx(25.0, abs=0.01)
    # Lumped model: steady rise = I^2 R R_th at 1/3 C, 6.67 A x 6 mOhm x 3 K/W ~ 0.8 K.
    assert 25.3 < float(record.temperature_c.max()) < 26.0


def test_recipe_refuses_nonsense() -> None:
    with pytest.raises(ValueError, match="unknown chemistry"):
        CellRecipe(chemistry="lead_acid")
    with pytest.raises(ValueError, match=r"multiple of 0\.1 s"):
        CellRecipe(sample_interval_s=0.25)
    with pytest.raises(ValueError, match="capacity_factor must be positive"):
        CellRecipe(capacity_factor=0.0)
    with pytest.raises(ValueError, match="first_cycle_loss_fraction"):
        CellRecipe(first_cycle_loss_fraction=1.0)
    with pytest.raises(ValueError, match="charge_side_fraction"):
        CellRecipe(charge_side_fraction=0.5)


# ------------------------------------------------------------ the cycle file text


METADATA = {"cell_id": "T-001", "lot": "TEST-LOT", "cell_type": "DEMO-LFP-20A", "station": "bench"}


def test_cycle_file_parses_with_the_csv_module() -> None:
    record = simulate()
    text = cycletext.to_cycle_file(record, METADATA)
    lines = text.splitlines()
    assert lines[:4] == [f"# {k}: {v}" for k, v in METADATA.items()]
    rows = list(csv.reader(io.StringIO("\n".join(lines[4:]))))
    assert rows[0] == ["time_s", "voltage_V", "current_A", "temperature_C", "step", "cycle"]
    body = rows[1:]
    assert len(body) == len(record)
    columns = np.array(body, dtype=float).T
    for got, want in zip(
        columns,
        (record.time_s, record.voltage_v, record.current_a, record.temperature_c, record.step, record.cycle),
        strict=True,
    ):
        assert np.array_equal(got, want)  # the record is already rounded as written
    assert text.endswith("\n") and "-0.00000" not in text


def test_cycle_file_without_step_columns() -> None:
    text = cycletext.to_cycle_file(simulate(), {"cell_id": "T-002"}, include_step_columns=False)
    header = text.splitlines()[1]
    assert header == "time_s,voltage_V,current_A,temperature_C"
    assert all(row.count(",") == 3 for row in text.splitlines()[1:])


@pytest.mark.parametrize("metadata", [{"cell_id": "a\nb"}, {"bad:key": "x"}, {"": "x"}])
def test_cycle_file_refuses_metadata_it_cannot_write(metadata: dict[str, str]) -> None:
    with pytest.raises(ValueError):
        cycletext.to_cycle_file(simulate(), metadata)


def test_same_seed_same_text_other_seed_other_text() -> None:
    one = cycletext.to_cycle_file(simulate(seed=11), METADATA)
    assert cycletext.to_cycle_file(simulate(seed=11), METADATA) == one
    assert cycletext.to_cycle_file(simulate(seed=12), METADATA) != one


def test_cycle_file_reads_back_unchanged() -> None:
    reader = pytest.importorskip("pipeline.read.cyclefile")
    record = simulate()
    trace = reader.read_cycle_file(cycletext.to_cycle_file(record, METADATA).encode(), "t.csv")
    expected = cycletext.to_trace(record, METADATA, source="t.csv")
    for name in ("time_s", "voltage_v", "current_a", "temperature_c", "step", "cycle"):
        assert np.array_equal(getattr(trace, name), getattr(expected, name)), name
    assert dict(trace.metadata) == METADATA
    assert trace.first_data_line == expected.first_data_line


# ------------------------------------------------------------ the demo lot and its defects


def demo_cell(defect: str) -> demo.DemoCell:
    return next(c for c in demo.DEMO_CELLS if c.defect == defect)


@pytest.fixture(scope="module")
def lot() -> dict[str, SimulatedRecord]:
    """The demo lot as the model makes it, before the channel's measurement errors."""
    records = {}
    for cell in demo.DEMO_CELLS:
        rng = demo._seed_for(cell, 2026)
        recipe = dataclasses.replace(demo.demo_recipe(cell, rng), **NO_NOISE)
        records[cell.cell_id] = synth.simulate_formation(recipe, rng)
    return records


def test_demo_lot_description() -> None:
    assert {c.cell_type for c in demo.DEMO_CELLS} == {"DEMO-LFP-20A"}
    assert {c.lot for c in demo.DEMO_CELLS} == {"DEMO-LOT-01"}
    assert sorted(c.defect for c in demo.DEMO_CELLS if c.defect) == sorted(demo.DEFECTS + demo.REVIEW_CASES)
    assert sum(1 for c in demo.DEMO_CELLS if not c.defect) == 8
    assert {c.cell_type for c in demo.DEMO_NA_CELLS} == {"DEMO-NA-10A"}
    assert {c.lot for c in demo.DEMO_NA_CELLS} == {"DEMO-LOT-03"}
    assert all(c.cell_id.startswith("NA3-") for c in demo.DEMO_NA_CELLS)
    assert sorted(c.defect for c in demo.DEMO_NA_CELLS if c.defect) == sorted(demo.SODIUM_DEFECTS)
    assert sum(1 for c in demo.DEMO_NA_CELLS if not c.defect) == 5
    assert demo.ALL_DEMO_CELLS == demo.DEMO_CELLS + demo.DEMO_NMC_CELLS + demo.DEMO_NA_CELLS
    assert len({c.cell_id for c in demo.ALL_DEMO_CELLS}) == 30
    assert len({c.file_name for c in demo.ALL_DEMO_CELLS}) == 30


def test_normal_cells_spread_as_a_lot(lot: dict[str, SimulatedRecord]) -> None:
    normal = [lot[c.cell_id] for c in demo.DEMO_CELLS if not c.defect]
    caps = np.array([coulombs_ah(r, r.step_named(synth.GRADING_STEP)) for r in normal])
    assert np.all((caps > 20.0) & (caps < 20.0 * 1.04))  # about 2 % above nominal, +-1 %
    dcir = np.array([dcir_ohm(r) for r in normal])
    assert float(np.ptp(dcir) / np.median(dcir)) < 0.15
    assert all(final_rest_drift_mv_per_h(r) > -0.3 for r in normal)
    assert all(float(r.temperature_c.max()) < 30.0 for r in normal)


def test_channel_errors_have_the_size_the_channel_declares() -> None:
    # robust location and scale of the rest rows (median; 1.4826 x MAD, Iglewicz and Hoaglin 1993)
    channel = Channel(range_a=50.0, current_noise_fraction=5e-4, offset_fraction=1e-4)
    record = simulate(seed=3, channel=channel)
    true = simulate(seed=3, **NO_NOISE)
    rest = true.current_a == 0.0
    rest[np.flatnonzero(np.diff(true.step) != 0) + 1] = False  # step changes carry their spike
    at_rest = record.current_a[rest]
    assert float(np.median(at_rest)) == pytest.approx(0.005, abs=0.001)
    mad = float(np.median(np.abs(at_rest - np.median(at_rest))))
    assert 1.4826 * mad == pytest.approx(0.025, rel=0.05)
    noise_v = record.voltage_v[rest] - true.voltage_v[rest]
    assert float(np.std(noise_v)) == pytest.approx(0.001, rel=0.05)
    # the switch shows on the first row of a step only
    flowing = ~rest & (np.abs(true.current_a) > 0)
    flowing[np.flatnonzero(np.diff(true.step) != 0) + 1] = False
    assert float(np.max(np.abs(record.current_a[flowing] - true.current_a[flowing]))) < 6 * 0.025


def clean_record(cell: demo.DemoCell) -> SimulatedRecord:
    """The demo cell without sensor noise (plateaus are judged on the noiseless curve here)."""
    recipe = dataclasses.replace(demo.demo_recipe(cell, np.random.default_rng(0)), **NO_NOISE)
    return synth.simulate_formation(recipe, np.random.default_rng(0))


def test_normal_cells_show_the_lfp_plateau() -> None:
    # LFP/FePO4 is two-phase, so its discharge is flat (Padhi et al. 1997; Gibbs phase rule).
    for cell in demo.DEMO_CELLS[:3]:
        assert longest_flat_pct(clean_record(cell)) > 30.0


def test_low_capacity_cell(lot: dict[str, SimulatedRecord]) -> None:
    record = lot[demo_cell("low_capacity").cell_id]
    grading = record.step_named(synth.GRADING_STEP)
    assert coulombs_ah(record, grading) == pytest.approx(0.90 * 20.0, rel=0.01)


def test_low_first_cycle_efficiency_cell(lot: dict[str, SimulatedRecord]) -> None:
    record = lot[demo_cell("low_first_cycle_efficiency").cell_id]
    charge = sum(coulombs_ah(record, record.step_named(n)) for n in (2, 4, 5))
    assert coulombs_ah(record, record.step_named(7)) / charge == pytest.approx(0.78, abs=0.01)


def test_high_dcir_cell(lot: dict[str, SimulatedRecord]) -> None:
    normal = np.median([dcir_ohm(lot[c.cell_id]) for c in demo.DEMO_CELLS if not c.defect])
    high = dcir_ohm(lot[demo_cell("high_dcir").cell_id])
    assert high > 2.0 * normal


def test_internal_short_cell_drifts_down_at_rest(lot: dict[str, SimulatedRecord]) -> None:
    drift = final_rest_drift_mv_per_h(lot[demo_cell("internal_short").cell_id])
    assert -5.0 < drift < -2.0


def test_missing_plateau_cell(lot: dict[str, SimulatedRecord]) -> None:
    cell = demo_cell("missing_plateau")
    assert longest_flat_pct(clean_record(cell)) < 5.0
    assert longest_flat_pct(lot[cell.cell_id]) < 5.0


def test_over_temperature_cell(lot: dict[str, SimulatedRecord]) -> None:
    record = lot[demo_cell("over_temperature").cell_id]
    charging = record.current_a > 0
    assert float(record.temperature_c[charging].max()) >= 60.0
    assert float(record.temperature_c[~charging][-1]) < 30.0  # it cools at the final rest


@pytest.fixture(scope="module")
def sodium_lot() -> dict[str, SimulatedRecord]:
    """The sodium-ion demo lot as the model makes it, before the channel's measurement errors."""
    records = {}
    for cell in demo.DEMO_NA_CELLS:
        rng = demo._seed_for(cell, 2026)
        recipe = dataclasses.replace(demo.demo_recipe(cell, rng), **NO_NOISE)
        records[cell.cell_id] = synth.simulate_formation(recipe, rng)
    return records


def sodium_cell(defect: str) -> demo.DemoCell:
    return next(c for c in demo.DEMO_NA_CELLS if c.defect == defect)


def test_normal_sodium_cells(sodium_lot: dict[str, SimulatedRecord]) -> None:
    normal = [sodium_lot[c.cell_id] for c in demo.DEMO_NA_CELLS if not c.defect]
    caps = np.array([coulombs_ah(r, r.step_named(synth.GRADING_STEP)) for r in normal])
    assert np.all((caps > 10.0) & (caps < 10.0 * 1.04))  # about 2 % above nominal, +-1 %
    for r in normal:
        charge = sum(coulombs_ah(r, r.step_named(n)) for n in (2, 4, 5))
        # 80-90 % first-cycle efficiency of hard carbon in sodium-ion cells (from memory, medium)
        assert 0.80 < coulombs_ah(r, r.step_named(7)) / charge < 0.90
        assert final_rest_drift_mv_per_h(r) > -0.3
        # The upper NVPF step on the hard-carbon plateau: flat over about 43 % of the
        # discharge at 6 mV per % (derived, Chayambuka et al. 2022 tables).
        assert 38.0 < longest_flat_pct(r, 6.0) < 48.0


def test_sodium_plating_cell_returns_less_of_its_charge(sodium_lot: dict[str, SimulatedRecord]) -> None:
    record = sodium_lot[sodium_cell("sodium_plating").cell_id]
    charge = sum(coulombs_ah(record, record.step_named(n)) for n in (9, 10))
    grading = coulombs_ah(record, record.step_named(synth.GRADING_STEP))
    assert grading / charge == pytest.approx(1.0 - demo.PLATING_SIDE_FRACTION, abs=0.003)
    assert grading / charge < 0.95  # below the sodium rule set's reject limit


def test_sodium_short_and_high_dcir_cells(sodium_lot: dict[str, SimulatedRecord]) -> None:
    drift = final_rest_drift_mv_per_h(sodium_lot[sodium_cell("internal_short").cell_id])
    assert -5.0 < drift < -2.0
    normal = np.median([dcir_ohm(sodium_lot[c.cell_id]) for c in demo.DEMO_NA_CELLS if not c.defect])
    assert dcir_ohm(sodium_lot[sodium_cell("high_dcir").cell_id]) > 2.0 * normal


def test_write_demo_lot(tmp_path: pathlib.Path) -> None:
    folder = tmp_path / "inbox"
    paths = demo.write_demo_lot(folder)
    assert [p.name for p in paths] == [c.file_name for c in demo.DEMO_CELLS]
    assert sorted(p.name for p in folder.iterdir()) == sorted(p.name for p in paths)  # no .part
    gz = [p for p in paths if p.name.endswith(".csv.gz")]
    assert len(gz) == 1
    text = gzip.decompress(gz[0].read_bytes()).decode("utf-8")
    assert "# cell_type: DEMO-LFP-20A" in text and "# station: demo-line-1" in text
    for path in paths:
        head = (
            (gzip.decompress(path.read_bytes()) if path.suffix == ".gz" else path.read_bytes())
            .decode("utf-8")
            .splitlines()[:8]
        )
        keys = [line[2:].split(":", 1)[0] for line in head if line.startswith("# ")]
        assert keys == ["cell_id", "lot", "cell_type", "channel", "station", "program", "started_at"]
    again = demo.write_demo_lot(tmp_path / "again")
    assert [p.read_bytes() for p in again] == [p.read_bytes() for p in paths]
