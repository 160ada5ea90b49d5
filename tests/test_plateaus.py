"""Plateau finder against physics outside the project: regular-solution thermodynamics and a
published open-circuit-potential fit; plus invariance to noise and sampling rate."""

from __future__ import annotations

import functools

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import constants, optimize, special

from pipeline.judge.plateaus import find_plateaus, resample_uniform
from pipeline.model import PlateauSettings

T_K = 298.15
RT = constants.R * T_K  # J/mol; scipy.constants (CODATA 2018)
F = constants.physical_constants["Faraday constant"][
    0
]  # C/mol; scipy.constants, exact in the 2019 SI
X0, X1 = 0.002, 0.998  # composition range the simulated discharge sweeps


def _g(x: np.ndarray, omega: float) -> np.ndarray:
    """Regular-solution molar Gibbs energy of mixing, J/mol.

    Source: standard lattice-gas / regular-solution model (Huggins, "Advanced
    Batteries: Materials Science Aspects", Springer 2009; formula from memory, high).
    """
    return omega * x * (1 - x) + RT * (x * np.log(x) + (1 - x) * np.log(1 - x))


def _dg(x: np.ndarray | float, omega: float) -> np.ndarray | float:
    return omega * (1 - 2 * x) + RT * np.log(x / (1 - x))


def common_tangent(omega: float) -> tuple[float, float, float]:
    """Binodal (a, b) and tangent slope (J/mol) by the two-point common-tangent construction.

    Equal slopes g'(a) = g'(b) and a shared tangent line g(b) - g(a) = g'(a)(b - a),
    solved with scipy.optimize.fsolve; independent of the code under test.
    """

    def eqs(v: np.ndarray) -> list[float]:
        a, b = special.expit(v)  # solve in logit space so a, b stay inside (0, 1)
        return [
            float(_dg(a, omega) - _dg(b, omega)),
            float(_g(np.array(b), omega) - _g(np.array(a), omega) - _dg(a, omega) * (b - a)),
        ]

    a, b = special.expit(optimize.fsolve(eqs, special.logit([0.05, 0.9]), xtol=1e-13))
    return float(a), float(b), float(_dg(a, omega))


def equilibrium_potential(x: np.ndarray, omega: float, e0_v: float) -> np.ndarray:
    """E(x) = E0 - mu(x)/F with mu the slope of the lower convex hull of g (phase equilibrium).

    The convex hull is a second, independent route to the two-phase region: where
    the hull bridges the miscibility gap its slope is constant, so E is flat
    (Gibbs phase rule: two phases in a binary system at fixed T, p leave no freedom).
    """
    mids, slope = _hull_slopes(omega)
    return e0_v - np.interp(x, mids, slope) / F


@functools.lru_cache(maxsize=8)
def _hull_slopes(omega: float) -> tuple[np.ndarray, np.ndarray]:
    fine = np.linspace(1e-4, 1 - 1e-4, 200_001)
    g = _g(fine, omega)
    hull = [0]
    for k in range(1, len(fine)):  # lower hull, monotone chain
        while len(hull) >= 2:
            i, j = hull[-2], hull[-1]
            cross = (fine[j] - fine[i]) * (g[k] - g[i]) - (g[j] - g[i]) * (fine[k] - fine[i])
            if cross <= 0:
                hull.pop()
            else:
                break
        hull.append(k)
    hx, hg = fine[hull], g[hull]
    slope = np.diff(hg) / np.diff(hx)
    return 0.5 * (hx[1:] + hx[:-1]), slope


def discharge_of(
    v_of_x,
    *,
    dt_s: float,
    capacity_ah: float = 10.0,
    current_a: float = 2.0,
    noise_v: float = 0.0,
    seed: int = 0,
) -> tuple[np.ndarray, np.ndarray]:
    """A constant-current discharge sweeping x from X0 to X1: q in % and V samples."""
    duration = capacity_ah / current_a * 3600.0
    t = np.arange(0.0, duration + dt_s / 2, dt_s)
    x = X0 + (X1 - X0) * t / duration
    v = (
        v_of_x(x) + np.random.default_rng(seed).normal(0.0, noise_v, len(t))
        if noise_v
        else v_of_x(x)
    )
    return 100.0 * t / duration, v


SETTINGS = PlateauSettings(
    flatness_mv_per_pct=5.0, min_length_pct=5.0, merge_gap_pct=1.0, smoothing_pct=3.0
)


def test_regular_solution_plateau_sits_at_the_common_tangent_and_spans_the_miscibility_gap() -> (
    None
):
    omega = 4 * RT  # Omega = 4RT gives binodal 0.0212 / 0.9788 [derived]
    a, b, mu = common_tangent(omega)
    assert (a, b) == (pytest.approx(0.0212, abs=2e-4), pytest.approx(0.9788, abs=2e-4))
    e0 = 3.43  # an LFP-like E0, vs Li (Padhi 1997; Safari & Delacourt 2011)
    q, v = discharge_of(lambda x: equilibrium_potential(x, omega, e0), dt_s=10.0)
    found = find_plateaus(q, v, 10.0, SETTINGS)
    assert len(found.plateaus) == 1
    p = found.plateaus[0]
    expected_v = e0 - mu / F
    expected_start = 100 * (a - X0) / (X1 - X0)
    expected_end = 100 * (b - X0) / (X1 - X0)
    assert p.voltage_v == pytest.approx(expected_v, abs=0.5e-3)
    assert p.start_pct == pytest.approx(expected_start, abs=1.5)
    assert p.end_pct == pytest.approx(expected_end, abs=1.5)
    assert p.length_ah == pytest.approx(p.length_pct / 100 * 10.0)
    # the flat plateau is the biggest dQ/dV peak, at the plateau voltage
    assert min(found.ica_peaks_v, key=lambda pk: abs(pk - expected_v)) == pytest.approx(
        expected_v, abs=0.005
    )


def test_ideal_solution_has_no_plateau() -> None:
    # Omega = 0: E(0.1) - E(0.9) = 2 (RT/F) ln 9 = 112.9 mV, a slope, not a plateau (derived)
    q, v = discharge_of(lambda x: equilibrium_potential(x, 0.0, 3.4), dt_s=10.0)
    assert find_plateaus(q, v, 10.0, PlateauSettings(flatness_mv_per_pct=1.0)).plateaus == ()


# Published fits, transcribed here independently of pipeline.demo.ocp (Chen et al. 2020, Safari & Delacourt 2011).
def graphite_chen2020(x: np.ndarray) -> np.ndarray:
    # Chen et al., J. Electrochem. Soc. 167 (2020) 080534
    return (
        1.9793 * np.exp(-39.3631 * x)
        + 0.2482
        - 0.0909 * np.tanh(29.8538 * (x - 0.1234))
        - 0.04478 * np.tanh(14.9159 * (x - 0.2769))
        - 0.0205 * np.tanh(30.4444 * (x - 0.6103))
    )


def lfp_safari2011(y: np.ndarray) -> np.ndarray:
    # Safari & Delacourt, J. Electrochem. Soc. 158 (2011) A562
    return (
        3.4323
        - 0.8428 * np.exp(-80.2493 * (1 - y) ** 1.3198)
        - 3.2474e-6 * np.exp(20.2645 * (1 - y) ** 3.8003)
        + 3.2482e-6 * np.exp(20.2646 * (1 - y) ** 3.7995)
    )


def lfp_graphite_ocv(soc: np.ndarray) -> np.ndarray:
    # Our own illustrative map (not from a paper): y = 0.97 - 0.94 SOC, x = 0.02 + 0.83 SOC
    return lfp_safari2011(0.97 - 0.94 * soc) - graphite_chen2020(0.02 + 0.83 * soc)


def test_published_fit_lfp_graphite_plateau_matches_the_flat_region_of_the_fit() -> None:
    assert float(lfp_graphite_ocv(np.array(0.5))) == pytest.approx(
        3.2985, abs=1e-3
    )  # derived from the two fits
    # discharge from SOC 1 to 0 at negligible current
    q, v = discharge_of(lambda x: lfp_graphite_ocv(1 - (x - X0) / (X1 - X0)), dt_s=10.0)
    s = PlateauSettings(
        flatness_mv_per_pct=3.0, min_length_pct=5.0, merge_gap_pct=1.0, smoothing_pct=3.0
    )
    found = find_plateaus(q, v, 10.0, s)
    main = max(found.plateaus, key=lambda p: p.length_pct)
    # LFP/graphite full-cell mid-SOC OCV 3.30 +- 0.05 V (from memory + derived)
    assert main.voltage_v == pytest.approx(3.30, abs=0.05)
    # the flat region computed directly from the fit: |dV/dq| <= 3 mV per % on a fine grid
    fine_q = np.linspace(0, 100, 100_001)
    fine_v = lfp_graphite_ocv(1 - fine_q / 100)
    flat = np.abs(np.gradient(fine_v, fine_q)) * 1000 <= 3.0
    detected = np.zeros_like(flat)
    for p in found.plateaus:
        detected |= (fine_q >= p.start_pct) & (fine_q <= p.end_pct)
    # detected plateaus and the analytic flat region agree on at least 93 % of capacity
    assert np.mean(detected == flat) >= 0.93


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), dt_s=st.sampled_from([1.0, 2.0, 5.0, 10.0]))
def test_plateaus_unchanged_by_sensor_noise_and_sampling_rate(seed: int, dt_s: float) -> None:
    """1 mV rms noise and 1-10 s sampling move a plateau by < 1.5 % and < 1 mV."""
    omega = 3 * RT  # binodal 0.0707 / 0.9293 (common tangent, derived)
    clean_q, clean_v = discharge_of(lambda x: equilibrium_potential(x, omega, 3.43), dt_s=1.0)
    reference = find_plateaus(clean_q, clean_v, 10.0, SETTINGS).plateaus
    q, v = discharge_of(
        lambda x: equilibrium_potential(x, omega, 3.43), dt_s=dt_s, noise_v=1e-3, seed=seed
    )
    noisy = find_plateaus(q, v, 10.0, SETTINGS).plateaus
    assert len(noisy) == len(reference) == 1
    for a, b in zip(noisy, reference, strict=True):
        assert a.start_pct == pytest.approx(b.start_pct, abs=1.5)
        assert a.end_pct == pytest.approx(b.end_pct, abs=1.5)
        assert a.voltage_v == pytest.approx(b.voltage_v, abs=1e-3)


def test_short_flat_runs_are_dropped_and_close_runs_merge() -> None:
    q = np.linspace(0, 100, 5001)
    # flat 10-13 % (too short), flat 20-50 % and 50.5-80 % split by a 0.5 % wiggle
    v = 3.6 - 0.01 * q
    v[(q >= 10) & (q <= 13)] = v[np.searchsorted(q, 10)]
    base = 3.6 - 0.01 * 20
    v[(q >= 20) & (q <= 80)] = base
    v[(q > 50) & (q < 50.5)] = base - 0.02 * np.sin(np.pi * (q[(q > 50) & (q < 50.5)] - 50) / 0.5)
    v[q > 80] = base - 0.01 * (q[q > 80] - 80)
    s = PlateauSettings(
        flatness_mv_per_pct=2.0, min_length_pct=5.0, merge_gap_pct=3.0, smoothing_pct=1.0
    )
    found = find_plateaus(q, v, 1.0, s).plateaus
    assert len(found) == 1
    assert found[0].start_pct == pytest.approx(20, abs=1.0)
    assert found[0].end_pct == pytest.approx(80, abs=1.0)


def test_resample_uniform_averages_samples_in_each_cell() -> None:
    grid, v = resample_uniform(
        np.array([0.0, 0.01, 50.0, 100.0]), np.array([1.0, 3.0, 5.0, 7.0]), 3
    )
    assert grid.tolist() == [0.0, 50.0, 100.0]
    assert v.tolist() == [2.0, 5.0, 7.0]


# ---- dQ/dV on a curve with no plateau ------------------------------------------------------


def _sloped_discharge(noise_v: float, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """A straight 3.4 -> 2.62 V discharge that bends steeply into a 2.5 V cut-off (the last 1 %)."""
    rng = np.random.default_rng(seed)
    q = np.linspace(0.0, 100.0, 20001)
    v = np.where(q < 99.0, 3.4 - 0.78 * q / 99.0, 2.62 - 0.12 * (q - 99.0))
    return q, v + (rng.normal(0.0, noise_v, len(q)) if noise_v else 0.0)


@pytest.mark.parametrize(("noise_v", "seed"), [(0.0, 0), (0.001, 1), (0.002, 2)])
def test_a_curve_without_plateau_has_a_smooth_dqdv_and_no_peak(noise_v: float, seed: int) -> None:
    q, v = _sloped_discharge(noise_v, seed)
    analysis = find_plateaus(q, v, 20.0, PlateauSettings(flatness_mv_per_pct=5.0))
    assert analysis.plateaus == ()
    # no peak, neither a ripple of the voltage bins nor the bend into the cut-off
    assert analysis.ica_peaks_v == ()
    x, y = analysis.ica.x, analysis.ica.y
    middle = (x > 2.8) & (x < 3.3)
    # dQ/dV of a straight line is its constant inverse slope: 20 Ah over 0.78 V
    assert np.median(y[middle]) == pytest.approx(20.0 * 0.99 / 0.78, rel=0.02)
    # counting whole grid cells into 5 mV bins gave a regular ripple of about 20 %; what is
    # left is the sensor noise that smoothing lets through
    assert np.ptp(y[middle]) / np.median(y[middle]) < (0.01 if noise_v == 0 else 0.1)
    # all of the capacity is there, bin by bin
    assert float(np.sum(y) * 0.005) == pytest.approx(20.0, rel=1e-3)
