"""Published open-circuit-potential fits against the check values of their sources.

Values and tolerances are check values computed (derived) from the published
fits, with physical sanity windows; each assertion names
the paper it comes from.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from pipeline.demo import cellmodel, ocp

MV = 1e-3


# Chen, Brosa Planella, O'Regan, Gastol, Widanage, Kendrick, J. Electrochem. Soc. 167 (2020)
# 080534, graphite fit as transcribed in PyBaMM Chen2020.py (values derived from the fit).
@pytest.mark.parametrize(
    ("x", "expected_v"),
    [(0.0279, 1.0637), (0.05, 0.6786), (0.1, 0.4065), (0.2, 0.2170), (0.3, 0.1630),
     (0.5, 0.1331), (0.6, 0.1188), (0.7, 0.0922), (0.9, 0.0920)],
)
def test_graphite_chen2020_matches_published_fit(x: float, expected_v: float) -> None:
    assert float(ocp.graphite_chen2020(x)) == pytest.approx(expected_v, abs=0.5 * MV)


# Chen et al., J. Electrochem. Soc. 167 (2020) 080534, NMC811 fit (values derived from the fit).
@pytest.mark.parametrize(
    ("y", "expected_v"),
    [(0.2661, 4.2849), (0.3, 4.2054), (0.4, 4.1047), (0.5, 3.9720), (0.6, 3.8245),
     (0.7, 3.7304), (0.8, 3.6491), (0.9, 3.5682), (0.9084, 3.5614), (1.0, 3.4873)],
)
def test_nmc811_chen2020_matches_published_fit(y: float, expected_v: float) -> None:
    assert float(ocp.nmc811_chen2020(y)) == pytest.approx(expected_v, abs=0.5 * MV)


# Chen et al. 2020 full cell with the stoichiometry windows x 0.0279 -> 0.9014 and
# y 0.9084 -> 0.2661 (derived from the Chen 2020 fits; windows partly from memory, medium).
@pytest.mark.parametrize(
    ("soc", "expected_v"),
    [(0.0, 2.4977), (0.1, 3.2577), (0.2, 3.4493), (0.3, 3.5483), (0.5, 3.7078),
     (0.7, 3.9236), (0.8, 4.0215), (0.9, 4.0941), (1.0, 4.1929)],
)
def test_chen2020_full_cell_ocv(soc: float, expected_v: float) -> None:
    assert float(ocp.nmc811_graphite_cell(soc)) == pytest.approx(expected_v, abs=1 * MV)
    # The same value from the two electrode fits and the windows typed in here.
    by_hand = ocp.nmc811_chen2020(0.9084 + (0.2661 - 0.9084) * soc) - ocp.graphite_chen2020(
        0.0279 + (0.9014 - 0.0279) * soc
    )
    assert float(by_hand) == pytest.approx(expected_v, abs=1 * MV)


def test_chen2020_full_cell_mean_ocv_over_soc() -> None:
    # SOC-averaged OCV 3.694 V [derived from the Chen 2020 fits].
    soc = np.linspace(0.0, 1.0, 100_001)
    assert float(np.mean(ocp.nmc811_graphite_cell(soc))) == pytest.approx(3.694, abs=1 * MV)


# Safari & Delacourt, J. Electrochem. Soc. 158 (2011) A562, doi 10.1149/1.3567007
# (values derived from the fit; one transcription rounds to 3.4324, hence 0.2 mV).
@pytest.mark.parametrize("y", [0.2, 0.3, 0.4, 0.5, 0.6, 0.7])
def test_safari_delacourt_plateau(y: float) -> None:
    assert float(ocp.lfp_safari2011(y)) == pytest.approx(3.4323, abs=0.2 * MV)


@pytest.mark.parametrize(
    ("y", "expected_v", "tol_mv"),
    [(0.05, 3.4898, 0.5), (0.1, 3.4360, 0.5), (0.8, 3.4322, 0.5), (0.9, 3.4142, 0.5),
     (0.95, 3.2515, 1.0), (0.99, 2.7312, 1.0)],
)
def test_safari_delacourt_ends(y: float, expected_v: float, tol_mv: float) -> None:
    assert float(ocp.lfp_safari2011(y)) == pytest.approx(expected_v, abs=tol_mv * MV)


# Afshar, Morris, Khajepour, arXiv:1709.03970 (2017), as used by PyBaMM's Prada2013 set
# (PyBaMM Prada2013.py; values derived from the fit).
@pytest.mark.parametrize(
    ("y", "expected_v"),
    [(0.01, 3.5191), (0.05, 3.4070), (0.1, 3.4057), (0.3, 3.4016), (0.5, 3.3976),
     (0.7, 3.3934), (0.9, 3.3446), (0.95, 3.1876), (0.99, 2.7209)],
)
def test_afshar2017(y: float, expected_v: float) -> None:
    assert float(ocp.lfp_afshar2017(y)) == pytest.approx(expected_v, abs=0.5 * MV)


def test_two_lfp_fits_agree_within_published_spread() -> None:
    # Derived from the two fits: the Afshar plateau sits about 30 mV below Safari-Delacourt;
    # allow the +-30-40 mV spread between published fits.
    y = np.linspace(0.2, 0.7, 51)  # the flat part of both fits
    gap = ocp.lfp_safari2011(y) - ocp.lfp_afshar2017(y)
    assert np.all((gap > 0.0) & (gap < 0.040))


# Synthetic LFP/graphite cell, our own illustrative map (not from a paper); values derived
# from the Safari & Delacourt 2011 and Chen et al. 2020 fits.
@pytest.mark.parametrize(
    ("soc", "expected_v"),
    [(0.1, 3.0305), (0.2, 3.2097), (0.3, 3.2492), (0.5, 3.2985), (0.7, 3.3141), (0.9, 3.3414)],
)
def test_synthetic_lfp_graphite_cell(soc: float, expected_v: float) -> None:
    assert float(ocp.lfp_graphite_cell(soc)) == pytest.approx(expected_v, abs=1 * MV)


def test_synthetic_lfp_graphite_mean_ocv() -> None:
    # Mean over SOC 3.226 V [derived from the two fits].
    soc = np.linspace(0.0, 1.0, 100_001)
    assert float(np.mean(ocp.lfp_graphite_cell(soc))) == pytest.approx(3.226, abs=1 * MV)


# Physical sanity windows; each names its source.
def test_physical_windows() -> None:
    # LFP two-phase potential 3.43 +- 0.03 V (Padhi 1997; Safari & Delacourt 2011).
    assert float(ocp.lfp_safari2011(0.5)) == pytest.approx(3.43, abs=0.03)
    assert float(ocp.lfp_afshar2017(0.5)) == pytest.approx(3.43, abs=0.035)
    # Graphite stage 2 -> 1 plateau 0.09 +- 0.015 V vs Li (Ohzuku 1993 / Dahn 1991,
    # from memory).
    assert float(ocp.graphite_chen2020(0.8)) == pytest.approx(0.09, abs=0.015)
    # LFP/graphite mid-SOC OCV 3.30 +- 0.05 V (from memory and derived).
    assert float(ocp.lfp_graphite_cell(0.5)) == pytest.approx(3.30, abs=0.05)
    # NMC/graphite 50 % SOC OCV 3.70 +- 0.07 V (Chen 2020 derived, from memory).
    assert float(ocp.nmc811_graphite_cell(0.5)) == pytest.approx(3.70, abs=0.07)


# LTO: flat 1.55 V two-phase plateau, Ohzuku, Ueda, Yamamoto, J. Electrochem. Soc. 142 (1995)
# 1431 (1.55 +- 0.03 V).
def test_lto_plateau_voltage_and_flatness() -> None:
    x = np.linspace(0.05, 0.95, 91)
    v = ocp.lto_plateau(x)
    assert np.all(np.abs(v - 1.55) <= 0.03)
    assert float(np.ptp(v)) == 0.0  # two-phase: no slope at all in equilibrium (Gibbs phase rule)


def test_lto_plateau_ends_rise_and_fall() -> None:
    assert float(ocp.lto_plateau(0.001)) > 1.58
    assert float(ocp.lto_plateau(0.999)) < 1.52
    x = np.linspace(0.0005, 0.9995, 2001)
    assert np.all(np.diff(ocp.lto_plateau(x)) <= 1e-12)


def test_nmc_lto_cell_spans_its_voltage_range() -> None:
    # LMO or NMC / LTO cells run about 1.5-2.8 V, nominal 2.3-2.5 V (from memory).
    soc = np.linspace(0.0, 1.0, 1001)
    v = ocp.nmc811_lto_cell(soc)
    assert 1.5 < v[0] < 1.9 and 2.7 < v[-1] <= 2.8
    assert 2.2 < float(np.mean(v)) < 2.5
    assert np.all(np.diff(v) > 0)


def test_fits_are_vectorised_float64() -> None:
    x = np.linspace(0.1, 0.9, 7)
    for fit in (ocp.graphite_chen2020, ocp.nmc811_chen2020, ocp.lfp_safari2011,
                ocp.lfp_afshar2017, ocp.lto_plateau, ocp.hard_carbon_chayambuka2022,
                ocp.nvpf_chayambuka2022, ocp.nvpf_hard_carbon_cell):
        out = fit(x)
        assert out.dtype == np.float64 and out.shape == x.shape
        assert np.allclose(out, [float(fit(v)) for v in x], rtol=0, atol=1e-15)


# Regular-solution model (Huggins, Advanced Batteries, Springer 2009; formula from memory, high).
def test_regular_solution_is_e0_at_half_filling() -> None:
    assert float(ocp.regular_solution_potential(0.5, 3.0, 3.43)) == pytest.approx(3.43, abs=1e-15)


def test_regular_solution_rejects_compositions_outside_the_lattice() -> None:
    with pytest.raises(ValueError, match="strictly between 0 and 1"):
        ocp.regular_solution_potential([0.2, 1.0], 1.0, 1.0)


def test_binodal_needs_a_miscibility_gap() -> None:
    # A gap exists only when Omega > 2RT (critical temperature Omega / 2R), from memory, high.
    with pytest.raises(ValueError, match="must exceed 2"):
        ocp.binodal(2.0)


def test_equilibrium_without_gap_is_the_single_phase_curve() -> None:
    x = np.linspace(0.01, 0.99, 99)
    assert np.array_equal(
        ocp.regular_solution_equilibrium(x, 1.5, 2.0), ocp.regular_solution_potential(x, 1.5, 2.0)
    )


@given(st.floats(min_value=2.05, max_value=12.0))
def test_binodal_solves_the_common_tangent_equation(a: float) -> None:
    low, high = ocp.binodal(a)
    assert 0.0 < low < 0.5 < high < 1.0
    assert low + high == pytest.approx(1.0, abs=1e-12)
    # ln(x/(1-x)) = (Omega/RT)(2x - 1), the common-tangent condition (from memory, high).
    assert np.log(low / (1 - low)) == pytest.approx(a * (2 * low - 1), abs=1e-9)
    # Binodal lies outside the spinodal x(1-x) = RT / (2 Omega).
    spinodal_low = 0.5 * (1 - np.sqrt(1 - 2 / a))
    assert low < spinodal_low


@given(
    st.floats(min_value=0.0, max_value=8.0),
    st.floats(min_value=0.5, max_value=4.5),
)
def test_equilibrium_curve_never_rises_with_more_lithium(a: float, e0: float) -> None:
    x = np.linspace(1e-4, 1 - 1e-4, 4001)
    v = ocp.regular_solution_equilibrium(x, a, e0)
    assert np.all(np.diff(v) <= 1e-12)
    if a > 2.0:
        low, high = ocp.binodal(a)
        inside = (x >= low) & (x <= high)
        assert np.all(v[inside] == e0)
        # Continuous at the binodal: the single-phase curve meets E0 there.
        assert float(ocp.regular_solution_potential(low, a, e0)) == pytest.approx(e0, abs=1e-9)


# ---------------------------------------------------------------- sodium-ion: NVPF / hard carbon
# Chayambuka, Mulder, Danilov, Notten, Electrochim. Acta 404 (2022) 139764: open-circuit
# potentials of the hard-carbon and Na3V2(PO4)2F3 electrodes as tabulated in PyBaMM's
# Chayambuka2022 parameter set (data/U_n.csv, data/U_p.csv). The points below are typed in
# from that table, not read from pipeline/demo/ocp.py.
@pytest.mark.parametrize(
    ("x", "expected_v"),
    [(0.001436794, 1.318963892), (0.060758448, 0.844570264), (0.232688871, 0.317967115),
     (0.403954777, 0.110332349), (0.574861484, 0.075112923), (0.799899424, 0.056901553),
     (0.995806356, 0.021574368)],
)
def test_hard_carbon_chayambuka2022_goes_through_the_published_points(x: float, expected_v: float) -> None:
    assert float(ocp.hard_carbon_chayambuka2022(x)) == pytest.approx(expected_v, abs=1e-9)


@pytest.mark.parametrize(
    ("y", "expected_v"),
    [(0.21, 4.288102031), (0.261497402, 4.172472367), (0.474174208, 4.152479924),
     (0.582273973, 3.941995276), (0.696598205, 3.69292017), (0.930500897, 3.649245158),
     (0.999940293, 3.031684459)],
)
def test_nvpf_chayambuka2022_goes_through_the_published_points(y: float, expected_v: float) -> None:
    assert float(ocp.nvpf_chayambuka2022(y)) == pytest.approx(expected_v, abs=1e-9)


@pytest.mark.parametrize(
    ("curve", "table"),
    [(ocp.hard_carbon_chayambuka2022, ocp.HARD_CARBON_CHAYAMBUKA2022),
     (ocp.nvpf_chayambuka2022, ocp.NVPF_CHAYAMBUKA2022)],
)
def test_sodium_tables_are_joined_without_overshoot(
    curve: object, table: tuple[tuple[float, float], ...]
) -> None:
    # A monotone cubic stays between each pair of published points.
    for (x0, v0), (x1, v1) in itertools.pairwise(table):
        x = np.linspace(x0, x1, 41)
        v = curve(x)  # type: ignore[operator]
        assert np.all(v >= min(v0, v1) - 1e-12) and np.all(v <= max(v0, v1) + 1e-12)
    # Outside the published range the end values hold: nothing is extrapolated.
    assert float(curve(table[0][0] - 0.1)) == pytest.approx(table[0][1], abs=1e-12)  # type: ignore[operator]
    assert float(curve(table[-1][0] + 0.1)) == pytest.approx(table[-1][1], abs=1e-12)  # type: ignore[operator]


def test_hard_carbon_slopes_then_sits_on_a_plateau_below_0_1_volt() -> None:
    # Stevens & Dahn, J. Electrochem. Soc. 147 (2000) 1271: a sloping region down to about
    # 0.1 V vs Na, then a low-voltage plateau (values from memory, medium); checked on the
    # Chayambuka 2022 table.
    x = np.linspace(0.0015, 0.9958, 4001)
    v = ocp.hard_carbon_chayambuka2022(x)
    assert np.all(np.diff(v) < 0)  # more sodium, lower potential
    plateau = x >= 0.45
    assert np.all(v[plateau] < 0.1) and np.all(v[plateau] > 0.0)
    slope_mv = np.abs(np.gradient(v, x)) / 100 * 1000  # mV per 1 % of sodium
    assert float(slope_mv[(x >= 0.5) & (x <= 0.98)].max()) < 2.5
    assert float(slope_mv[(x >= 0.01) & (x <= 0.3)].min()) > 10.0
    assert float(ocp.hard_carbon_chayambuka2022(0.05)) > 0.8  # the sloping region starts near 1 V


def test_nvpf_hard_carbon_windows_come_from_the_published_parameter_set() -> None:
    # PyBaMM Chayambuka2022: initial (full) concentrations 13520 of 14540 mol/m3 (hard carbon)
    # and 3320 of 15320 mol/m3 (NVPF); capacity ratio from c_max x active fraction x thickness.
    assert ocp.NA_HARD_CARBON_WINDOW[1] == pytest.approx(0.92985, abs=1e-5)
    assert ocp.NA_NVPF_WINDOW[1] == pytest.approx(0.21671, abs=1e-5)
    ratio = ocp.NA_CAPACITY_RATIO
    assert ratio == pytest.approx(14540 * 0.489 * 64e-6 / (15320 * 0.55 * 68e-6), rel=1e-12)
    # Sodium conservation: what leaves the hard carbon arrives in the NVPF.
    moved_n = ocp.NA_HARD_CARBON_WINDOW[1] - ocp.NA_HARD_CARBON_WINDOW[0]
    moved_p = ocp.NA_NVPF_WINDOW[0] - ocp.NA_NVPF_WINDOW[1]
    assert moved_p == pytest.approx(ocp.NA_CAPACITY_RATIO * moved_n, rel=1e-12)


@pytest.mark.parametrize("soc", [0.0, 0.1, 0.3, 0.5, 0.7, 0.9, 1.0])
def test_nvpf_hard_carbon_cell_is_positive_minus_negative(soc: float) -> None:
    # Windows typed in here: hard carbon 0.0015 -> 13520/14540, NVPF from 3320/15320 plus the
    # sodium the hard carbon gives up times 0.79419 (derived from the PyBaMM Chayambuka2022 set).
    x = 0.0015 + (13520 / 14540 - 0.0015) * soc
    y = 3320 / 15320 + 0.79419 * (13520 / 14540 - x)
    by_hand = ocp.nvpf_chayambuka2022(y) - ocp.hard_carbon_chayambuka2022(x)
    assert float(ocp.nvpf_hard_carbon_cell(soc)) == pytest.approx(float(by_hand), abs=0.2 * MV)


def test_nvpf_hard_carbon_cell_is_monotone_and_spans_the_cut_offs() -> None:
    soc = np.linspace(0.0, 1.0, 20001)
    v = ocp.nvpf_hard_carbon_cell(soc)
    assert np.all(np.diff(v) > 0)
    chem = cellmodel.CHEMISTRIES["nvpf_hard_carbon"]
    # Empty below the 2.5 V discharge cut-off, full within 0.1 V below the 4.2 V charge limit.
    assert float(v[0]) < chem.min_v < float(v[-1])
    assert chem.max_v - 0.1 < float(v[-1]) < chem.max_v
    # Open-circuit mean between the cut-off and full charge: 3.685 V (derived from the
    # Chayambuka 2022 tables); NVPF/hard carbon about 3.6-3.7 V nominal (from memory, low).
    used = v[v >= chem.min_v]
    assert float(np.mean(used)) == pytest.approx(3.685, abs=2 * MV)
    # The upper NVPF step on the hard-carbon plateau: flat near 4.1 V over the top 40 %
    # (derived); then the sharp step down to about 3.6 V near 50 %.
    top = soc >= 0.6
    assert np.all((v[top] > 4.06) & (v[top] < 4.14))
    assert float(ocp.nvpf_hard_carbon_cell(0.46)) < 3.60 < 3.95 < float(ocp.nvpf_hard_carbon_cell(0.53))
