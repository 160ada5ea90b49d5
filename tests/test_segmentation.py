"""Segmentation: steps and cycles from current and voltage alone, and from a step column."""

from __future__ import annotations

import numpy as np

from pipeline.judge.segmentation import group_cycles, sample_weights, split_steps, weights_between
from pipeline.model import StepKind, StepMode, Trace
from tests.factories import build_trace, simple_formation


def kinds_modes(seg):
    return [(s.kind.value, s.mode.value) for s in seg.steps]


def test_formation_program_is_cut_into_its_steps() -> None:
    trace = build_trace(simple_formation())
    seg = split_steps(trace, rest_current_a=0.004, one_c_a=2.0)
    assert kinds_modes(seg) == [
        ("rest", "none"),
        ("charge", "cc"),
        ("charge", "cv"),
        ("rest", "none"),
        ("discharge", "cc"),
        ("rest", "none"),
        ("charge", "cc"),
        ("charge", "cv"),
        ("rest", "none"),
        ("discharge", "cc"),
        ("rest", "none"),
    ]
    assert [(c.charge_steps, c.discharge_steps) for c in seg.cycles] == [
        ((1, 2), (4,)),
        ((6, 7), (9,)),
    ]
    assert seg.notes == ()


def test_steps_tile_the_trace_without_gaps() -> None:
    trace = build_trace(simple_formation(), dt_s=7.0)
    seg = split_steps(trace, 0.004, 2.0)
    assert seg.steps[0].start == 0 and seg.steps[-1].stop == len(trace)
    for a, b in zip(seg.steps, seg.steps[1:], strict=False):
        assert a.stop == b.start and a.end_s == b.start_s


def test_capacity_is_additive_over_steps() -> None:
    # the trapezoid integral of |I| over the whole record equals the sum over steps
    trace = build_trace(simple_formation(), dt_s=10.0)
    seg = split_steps(trace, 0.004, 2.0)
    total_ah = np.trapezoid(np.abs(trace.current_a), trace.time_s) / 3600.0
    assert sum(s.capacity_ah for s in seg.steps) == pytest_approx(total_ah)


def pytest_approx(x, rel=1e-12):
    import pytest

    return pytest.approx(x, rel=rel)


def test_sample_weights_integrate_like_the_trapezoid_rule() -> None:
    rng = np.random.default_rng(3)
    t = np.cumsum(rng.uniform(0.1, 5.0, 200))
    y = rng.normal(size=200)
    assert float(np.dot(sample_weights(t), y)) == pytest_approx(float(np.trapezoid(y, t)), rel=1e-9)


def _summed_weights(t: np.ndarray) -> np.ndarray:
    """The weights as their definition sums them: half of each interval into an array of zeros."""
    w = np.zeros(len(t))
    if len(t) > 1:
        dt = np.diff(t)
        w[:-1] += 0.5 * dt
        w[1:] += 0.5 * dt
    return w


def test_sample_weights_are_the_summed_halves_to_the_bit_and_any_part_is_found_alone() -> None:
    rng = np.random.default_rng(11)
    for n in (0, 1, 2, 3, 17, 400):
        for t in (
            np.cumsum(rng.uniform(0.0, 5.0, n)),
            rng.choice([0.0, -0.0, 1.0, 5e-324, -5e-324, 2.5], size=n),  # signed zeros too
        ):
            whole = sample_weights(t)
            assert whole.tobytes() == _summed_weights(t).tobytes()
            for start in range(0, n + 1, max(1, n // 7)):
                for stop in range(start, n + 1, max(1, n // 5)):
                    assert weights_between(t, start, stop).tobytes() == whole[start:stop].tobytes()


def test_single_sample_blip_does_not_split_a_rest() -> None:
    t = np.arange(0, 100.0)
    i = np.zeros(100)
    i[50] = 0.5  # one noisy sample above the rest threshold
    trace = Trace("blip.csv", {}, t, np.full(100, 3.3), i)
    seg = split_steps(trace, 0.01, 5.0)
    assert [s.kind for s in seg.steps] == [StepKind.REST]


def test_step_column_boundaries_are_used_and_disagreement_is_noted() -> None:
    t = np.arange(0, 60.0)
    i = np.concatenate([np.zeros(20), np.full(20, 1.0), np.full(20, -1.0)])
    step = np.concatenate([np.full(20, 1), np.full(40, 2)])  # step 2 holds charge and discharge
    trace = Trace("steps.csv", {}, t, np.full(60, 3.3), i, step=step)
    seg = split_steps(trace, 0.01, 5.0)
    assert [s.program_step for s in seg.steps] == [1, 2]
    assert [n.code for n in seg.notes] == ["step_column_disagrees"]
    assert seg.notes[0].where is not None and seg.notes[0].where.line == 2 + 20


def test_program_cv_step_alone_is_recognised_as_cv() -> None:
    t = np.arange(0, 600.0, 10.0)
    i = 2.0 * np.exp(-t / 100.0)
    trace = Trace("cv.csv", {}, t, np.full(len(t), 3.65), i, step=np.full(len(t), 4))
    seg = split_steps(trace, 0.001, 0.5)
    assert kinds_modes(seg) == [("charge", "cv")]


def test_discharge_before_any_charge_belongs_to_no_cycle_and_trailing_charge_is_incomplete() -> (
    None
):
    kinds = [
        StepKind.DISCHARGE,
        StepKind.REST,
        StepKind.CHARGE,
        StepKind.DISCHARGE,
        StepKind.CHARGE,
    ]
    from pipeline.model import Step

    steps = [
        Step(k, kind, StepMode.CC, k, k + 1, k, k + 1, 1.0, 1.0, 0.0)
        for k, kind in enumerate(kinds)
    ]
    cycles = group_cycles(steps)
    assert [(c.charge_steps, c.discharge_steps, c.complete) for c in cycles] == [
        ((2,), (3,), True),
        ((4,), (), False),
    ]


def test_cycle_column_that_splits_a_discharge_is_noted() -> None:
    trace = build_trace(simple_formation())
    cycle = np.ones(len(trace), dtype=int)
    seg0 = split_steps(trace, 0.004, 2.0)
    grading = seg0.steps[9]
    cycle[grading.start + 5 :] = 2
    noted = Trace(
        trace.source, trace.metadata, trace.time_s, trace.voltage_v, trace.current_a, cycle=cycle
    )
    seg = split_steps(noted, 0.004, 2.0)
    assert [n.code for n in seg.notes] == ["cycle_column_disagrees"]


# ---- noisy channels --------------------------------------------------------------------------


def _noisy_rest_and_pulse(rng: np.random.Generator, *, pulse_a: float, pulse_s: float) -> Trace:
    """1 s samples: 30 min rest, a discharge pulse, 30 min rest; rest current noise 25 mA rms
    around a 4 mA offset (0.05 % and 0.008 % of a 50 A range)."""
    n_rest = 1800
    i = np.concatenate(
        [np.zeros(n_rest), np.full(int(pulse_s), -pulse_a), np.zeros(n_rest)]
    )
    rest = i == 0
    i = i + np.where(rest, 0.004, 0.0) + rng.normal(0.0, 0.025, len(i))
    t = np.arange(len(i), dtype=float)
    return Trace("noisy.csv", {}, t, np.full(len(i), 3.3), i)


def test_band_finds_the_channels_offset_and_noise() -> None:
    from scipy import stats

    from pipeline.judge.rest_band import estimate_band

    rng = np.random.default_rng(11)
    trace = _noisy_rest_and_pulse(rng, pulse_a=20.0, pulse_s=60.0)
    band = estimate_band(trace.current_a, 0.04, 20.0)
    near = trace.current_a[np.abs(trace.current_a) < 0.2]
    # outside reference: scipy's normal-consistent median absolute deviation
    assert band.noise_a == pytest_approx(float(stats.median_abs_deviation(near, scale="normal")), rel=0.05)
    assert band.offset_a == pytest_approx(0.004, rel=0.5)
    assert band.noise_a == pytest_approx(0.025, rel=0.1)
    assert band.threshold_a == pytest_approx(5 * band.noise_a, rel=1e-12)
    # five standard deviations: a normal row strays beyond with probability 5.7e-7
    # (two-sided tail, scipy.stats.norm)
    assert 2 * stats.norm.sf(5.0) == pytest_approx(5.733e-7, rel=1e-3)


def test_noise_at_rest_never_makes_a_step_but_a_real_short_pulse_does() -> None:
    rng = np.random.default_rng(5)
    quiet = _noisy_rest_and_pulse(rng, pulse_a=0.0, pulse_s=0.0)
    seg = split_steps(quiet, 0.04, 20.0)
    assert [s.kind for s in seg.steps] == [StepKind.REST]
    pulse = _noisy_rest_and_pulse(rng, pulse_a=20.0, pulse_s=10.0)  # a 10 s DCIR pulse at 1 C
    seg = split_steps(pulse, 0.04, 20.0)
    assert [s.kind for s in seg.steps] == [StepKind.REST, StepKind.DISCHARGE, StepKind.REST]
    assert seg.steps[1].capacity_ah == pytest_approx(20.0 * 10.0 / 3600.0, rel=0.1)


def test_spikes_at_step_changes_do_not_make_steps() -> None:
    rng = np.random.default_rng(8)
    trace = _noisy_rest_and_pulse(rng, pulse_a=6.0, pulse_s=600.0)
    i = np.array(trace.current_a)
    start = 1800
    stop = start + 600
    i[start] = -9.0  # overshoot into the discharge
    i[stop] = 2.0  # the opposite way as the current switches off
    spiky = Trace("spiky.csv", {}, trace.time_s, trace.voltage_v, i)
    seg = split_steps(spiky, 0.04, 20.0)
    assert [s.kind for s in seg.steps] == [StepKind.REST, StepKind.DISCHARGE, StepKind.REST]


def test_a_noisy_program_rest_is_a_rest_without_a_note_and_a_rest_carrying_current_gets_one() -> None:
    rng = np.random.default_rng(2)
    trace = _noisy_rest_and_pulse(rng, pulse_a=6.0, pulse_s=600.0)
    step = np.concatenate([np.full(1800, 1), np.full(600, 2), np.full(1800, 3)])
    seg = split_steps(Trace("s.csv", {}, trace.time_s, trace.voltage_v, trace.current_a, step=step), 0.04, 20.0)
    assert [s.kind for s in seg.steps] == [StepKind.REST, StepKind.DISCHARGE, StepKind.REST]
    assert seg.notes == ()
    # the program says "rest" for a block in which 5 minutes of 2 A flow: that is noted
    i = np.array(trace.current_a)
    i[300:600] += 2.0
    seg = split_steps(Trace("s.csv", {}, trace.time_s, trace.voltage_v, i, step=step), 0.04, 20.0)
    assert [s.kind for s in seg.steps] == [StepKind.REST, StepKind.DISCHARGE, StepKind.REST]
    assert [n.code for n in seg.notes] == ["step_column_disagrees"]
    assert seg.notes[0].text == (
        "program step 1 is a rest by its median current but carries 0.167 Ah of current in "
        "300 of its 1800 rows (first on line 302)"
    )


def test_rows_hovering_at_the_threshold_do_not_chatter() -> None:
    from pipeline.judge.rest_band import row_kinds
    from pipeline.model import CurrentBand

    band = CurrentBand(0.0, 0.0, 0.1, 0.1, 0)
    i = np.array([0.0, 0.5, 0.09, 0.11, 0.07, 0.02, 0.07, 0.2])
    assert row_kinds(i, band).tolist() == [0, 1, 1, 1, 1, 0, 0, 1]


def _charge_cv_steps(seg) -> list:
    return [s for s in seg.steps if s.kind is StepKind.CHARGE and s.mode is StepMode.CV]


def test_a_switch_row_after_a_cv_tail_neither_hides_the_tail_nor_lengthens_it() -> None:
    """Without a step column, the first row of the rest after a CV charge, taken while the
    channel switches off, still carries part of the current and joins the charge; its voltage
    has already left the hold (NMC, about 12 mV down) or not quite (LFP, about 8 mV). The CV
    tail is found either way and ends where the program's rest begins, as with a step column.
    Reference cells (PyBaMM SPMe, tests/reference/README.md) through the project's channel
    model: noise, and a switch transient at every step change."""
    from pipeline.demo.channel import Channel, add_channel_errors
    from tests.reference.lot import load_cell

    for name in ("nmc_normal_1", "lfp_normal_1"):
        true = load_cell(name, 5.0)
        one_c = float(true.truth["nominal_capacity_Ah"])
        rest_a = 0.002 * one_c  # the shipped rule sets' rest current
        plain = Trace(f"{name}.csv", {}, true.time_s, true.voltage_v, true.current_a)
        noiseless = _charge_cv_steps(split_steps(plain, rest_a, one_c))
        assert len(noiseless) == 2, name  # formation and grading charge
        # the first row of each program step after a CV step: where its rest begins
        rest_starts = {s.stop for s in noiseless}
        assert all(true.step[k] != true.step[k - 1] for k in rest_starts), name
        rng = np.random.default_rng(22)
        channel = Channel(2.5 * one_c, current_noise_fraction=2e-4, offset_fraction=0.0,
                          voltage_noise_v=5e-4)
        for draw in range(30):
            volts, amps, _ = add_channel_errors(
                true.voltage_v, true.current_a, true.temperature_c, true.step, channel, rng
            )
            seg = split_steps(Trace("n.csv", {}, true.time_s, volts, amps), rest_a, one_c)
            found = _charge_cv_steps(seg)
            assert len(found) == 2, (name, draw)
            for got, want in zip(found, noiseless, strict=True):
                assert got.stop == want.stop, (name, draw)  # no switch row in the CV time
                assert abs(got.start_s - want.start_s) <= 5.0 + 1e-9, (name, draw)
            # the rows handed on stay in the rest that follows: the steps still tile the record
            assert all(a.stop == b.start for a, b in zip(seg.steps, seg.steps[1:], strict=False))
            assert seg.steps[-1].stop == len(true.time_s)


def test_a_cv_tail_whose_current_halves_every_row_keeps_its_last_rows() -> None:
    """A steep exponential CV tail sampled slowly (each row about half the one before) is no
    switch: only a row that breaks the tail's own decay is (our own scenario)."""
    t = np.arange(0, 1200.0, 10.0)
    i = np.concatenate([np.zeros(30), np.full(40, 2.0), 2.0 * 0.5 ** np.arange(1, 11),
                        np.zeros(40)])
    v = np.concatenate([np.full(30, 3.3), np.linspace(3.4, 3.645, 40), np.full(10, 3.65),
                        np.full(40, 3.55)])
    seg = split_steps(Trace("steep.csv", {}, t, v, i), 0.0005, 2.0)
    cv = _charge_cv_steps(seg)
    assert len(cv) == 1 and (cv[0].start, cv[0].stop) == (70, 80)
