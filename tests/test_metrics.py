"""Metrics exactly as docs/metrics.md defines them, checked on traces whose answers are known."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.acceptance.rules import Program
from pipeline.judge.metricdefs import METRIC_NAMES
from pipeline.judge.metrics import fit_line, measure
from pipeline.judge.segmentation import split_steps
from pipeline.model import PlateauSettings, Trace
from tests.factories import build_trace, cc, rest, simple_formation


def measured(trace: Trace, **kw):
    return measure(trace, split_steps(trace, 0.004, 2.0), PlateauSettings(), **kw)


def test_constant_current_step_capacity_equals_current_times_time() -> None:
    # Coulomb counting / Faraday's law: Q = I t; 1 Ah = 3600 C (SI definition of the coulomb)
    i_a, duration_s = 2.5, 7200.0
    trace = build_trace(
        [rest(600.0, 3.3), cc(duration_s, -i_a, lambda q: 3.3 + 0 * q), rest(600.0, 3.2)], dt_s=1.0
    )
    seg = split_steps(trace, 0.01, 5.0)
    discharge = [s for s in seg.steps if s.kind.value == "discharge"]
    assert len(discharge) == 1
    # the step owns its samples plus half an interval on each side: I * (duration) exactly
    assert discharge[0].capacity_ah == pytest.approx(i_a * duration_s / 3600.0, rel=1e-3)


def test_every_metric_is_measured_on_a_complete_formation_record() -> None:
    m = measured(
        build_trace(simple_formation(capacity_ah=2.0, ice=0.9, r_ohm=0.05, drift_v_per_h=-0.002))
    )
    assert set(m.values) == set(METRIC_NAMES)
    v = m.values
    assert v["cycle_count"] == 2
    assert v["grading_capacity_Ah"] == pytest.approx(2.0, rel=0.01)
    assert v["first_cycle_efficiency"] == pytest.approx(0.9, abs=0.01)
    assert v["irreversible_capacity_Ah"] == pytest.approx(2.0 / 0.9 - 2.0, rel=0.08)
    assert v["dcir_mOhm"] == pytest.approx(50.0, rel=0.05)
    assert v["rest_voltage_drift_mV_per_h"] == pytest.approx(-2.0, rel=1e-6)
    assert v["max_temperature_C"] == 25.0
    assert v["grading_cv_duration_s"] > 0
    assert v["grading_mean_voltage_V"] == pytest.approx(
        3.3 - 0.05, abs=0.01
    )  # mean of 3.0-3.6 V minus I R
    assert v["plateau_count"] == 0  # a straight 0.6 V slope has no plateau
    assert m.cycles[0].coulombic_efficiency == pytest.approx(v["first_cycle_efficiency"])


def test_energy_over_capacity_is_mean_discharge_voltage() -> None:
    m = measured(build_trace(simple_formation()))
    for c in m.cycles:
        assert c.mean_discharge_voltage_v == pytest.approx(
            c.discharge_energy_wh / c.discharge_capacity_ah
        )


def test_missing_final_rest_gives_no_drift_and_a_note() -> None:
    trace = build_trace(simple_formation(final_rest_s=300.0))
    m = measured(trace, program=Program(cycles=2))  # the program known: its end is the program's
    assert m.values["rest_voltage_drift_mV_per_h"] is None
    assert [n.code for n in m.notes] == ["final_rest_too_short"]
    assert m.notes[0].blocks == ("rest_voltage_drift_mV_per_h",)
    # without a program, a last rest of 5 min after rests of 30 min tells that it was cut
    (note,) = measured(trace).notes
    assert note.code == "program_incomplete" and "far shorter than the rests" in note.text


def test_record_without_discharge_has_no_grading_values() -> None:
    trace = build_trace([rest(600.0, 3.3), cc(3600.0, 1.0, lambda q: 3.3 + q)])
    m = measured(trace)
    assert m.values["grading_capacity_Ah"] is None
    # it ends while the charge still flows: cut short, whatever program it ran
    assert [n.code for n in m.notes] == ["program_incomplete"]
    assert m.notes[0].text.endswith("while current still flows: the record was cut short")
    # a record with no discharge that ends at rest has no complete cycle
    ended = build_trace([rest(600.0, 3.3), cc(3600.0, 1.0, lambda q: 3.3 + q), rest(600.0, 3.5)])
    m = measured(ended)
    assert m.values["grading_capacity_Ah"] is None and m.values["cycle_count"] == 0
    assert "no_complete_cycle" in [n.code for n in m.notes]


def test_no_temperature_column_leaves_temperature_unmeasured() -> None:
    m = measured(build_trace(simple_formation(), temperature_c=None))
    assert m.values["max_temperature_C"] is None


@settings(max_examples=20, deadline=None)
@given(
    capacity=st.floats(0.5, 50.0),
    ice=st.floats(0.75, 0.99),
    dt_s=st.sampled_from([1.0, 5.0, 10.0]),
    seed=st.integers(0, 1000),
)
def test_capacities_unchanged_by_noise_and_sampling(
    capacity: float, ice: float, dt_s: float, seed: int
) -> None:
    """Grading capacity and ICE within 0.5 % whatever the sampling (1-10 s) and 1 mV noise."""
    phases = simple_formation(capacity_ah=capacity, ice=ice, final_rest_s=3000.0)
    clean = measured(build_trace(phases, dt_s=1.0)).values
    noisy = measured(build_trace(phases, dt_s=dt_s, noise_v=1e-3, seed=seed)).values
    assert noisy["grading_capacity_Ah"] == pytest.approx(clean["grading_capacity_Ah"], rel=5e-3)
    assert noisy["first_cycle_efficiency"] == pytest.approx(
        clean["first_cycle_efficiency"], rel=5e-3
    )


def test_sampling_coarser_than_the_dcir_pulse_gives_no_dcir_and_a_note() -> None:
    m = measured(build_trace(simple_formation(), dt_s=120.0))
    assert m.values["dcir_mOhm"] is None
    assert "dcir_sampling_too_coarse" in [n.code for n in m.notes]


def test_spikes_and_a_ramp_at_the_grading_switch_do_not_move_dcir() -> None:
    clean_trace = build_trace(simple_formation(r_ohm=0.05), dt_s=1.0)
    clean = measured(clean_trace)
    seg = split_steps(clean_trace, 0.004, 2.0)
    grading = [s for s in seg.steps if s.kind.value == "discharge"][-1]
    k = grading.start
    v, i = np.array(clean_trace.voltage_v), np.array(clean_trace.current_a)
    v[k - 1] += 0.02  # a voltage spike on the last rest row
    i[k] *= 0.3  # the current still ramping up on the first discharge row ...
    i[k + 1] *= 1.4  # ... and overshooting on the next
    v[k : k + 2] -= 0.01
    spiky = Trace(clean_trace.source, clean_trace.metadata, clean_trace.time_s, v, i,
                  clean_trace.temperature_c)
    got = measured(spiky).values["dcir_mOhm"]
    assert clean.values["dcir_mOhm"] == pytest.approx(50.0, rel=0.02)  # the trace's own 50 mOhm
    assert got == pytest.approx(clean.values["dcir_mOhm"], rel=0.01)


@settings(max_examples=200, deadline=None)
@given(
    n=st.integers(0, 3000),
    max_points=st.sampled_from([4, 11, 50, 800]),
    holes=st.lists(
        st.tuples(st.integers(0, 2999), st.sampled_from([np.nan, np.inf, -np.inf]), st.booleans()),
        max_size=4,
    ),
    seed=st.integers(0, 2**32 - 1),
)
def test_thinning_drops_what_is_not_finite_and_thins_the_rest_alike(
    n: int, max_points: int, holes: list[tuple[int, float, bool]], seed: int
) -> None:
    """A series with NaN or infinite points thins as its finite points alone do, wherever they are;
    several series against one x thin as each does alone."""
    from pipeline.judge.thin import thin_series, thin_series_over

    rng = np.random.default_rng(seed)
    x, y = np.arange(float(n)), rng.normal(size=n)
    for row, value, in_x in holes:
        if row < n:
            (x if in_x else y)[row] = value
    finite = np.isfinite(x) & np.isfinite(y)
    xs, ys = thin_series(x, y, max_points)
    fx, fy = thin_series(x[finite], y[finite], max_points)
    assert xs.tobytes() == fx.tobytes() and ys.tobytes() == fy.tobytes()
    assert np.isfinite(xs).all() and np.isfinite(ys).all()
    if finite.any():  # the lowest and highest finite points are kept
        assert ys.min() == y[finite].min() and ys.max() == y[finite].max()
    for alone, (ox, oy) in zip((y, -y), thin_series_over(x, [y, -y], max_points), strict=True):
        tx, ty = thin_series(x, alone, max_points)
        assert ox.tobytes() == tx.tobytes() and oy.tobytes() == ty.tobytes()


@settings(max_examples=200, deadline=None)
@given(
    rows=st.integers(2, 3000),
    span_s=st.floats(1e-3, 1e6),
    noise_v=st.floats(0.0, 0.01),
    seed=st.integers(0, 2**32 - 1),
)
def test_the_line_fit_is_numpys_polyfit(rows: int, span_s: float, noise_v: float, seed: int) -> None:
    # the drift and the DCIR pulse's line are fitted without np.polyfit: the same numbers
    rng = np.random.default_rng(seed)
    t = np.sort(rng.random(rows)) * span_s
    t[0] = 0.0
    v = 3.3 - 2e-7 * t + rng.normal(0.0, noise_v, rows)
    slope, intercept = np.polyfit(t, v, 1)
    assert fit_line(t, v) == (float(slope), float(intercept))
