"""Outside physics the rest of formgate leans on: Faraday's law, RT/F, the regular solution.

Each value is recomputed here from first principles (scipy.constants, atomic
weights, a common-tangent construction written out in the test) and compared
with published check values and with pipeline.demo.ocp.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import constants, optimize

from pipeline.demo import ocp

F = constants.physical_constants["Faraday constant"][0]  # C/mol, exact in the 2019 SI
R = constants.R  # J/(mol K), CODATA 2018 via scipy.constants
COULOMB_PER_MAH = 3.6  # 1 mAh = 3.6 C

# IUPAC standard atomic weights (abridged/conventional values), typed in from memory.
ATOMIC_WEIGHT = {
    "Li": 6.94,
    "C": 12.011,
    "O": 15.999,
    "P": 30.973762,
    "Ti": 47.867,
    "Mn": 54.938043,
    "Fe": 55.845,
    "Co": 58.933194,
    "Ni": 58.6934,
}


def molar_mass(formula: dict[str, float]) -> float:
    return sum(ATOMIC_WEIGHT[element] * count for element, count in formula.items())


def theoretical_mah_per_g(carriers: float, formula: dict[str, float]) -> float:
    # Faraday's law: Q = n F / (3.6 M) in mAh/g (F exact in the 2019 SI, via scipy.constants).
    return carriers * F / (COULOMB_PER_MAH * molar_mass(formula))


def test_faraday_constant_is_the_si_value() -> None:
    # 96485.33212 C/mol, exact in the 2019 SI (scipy.constants, CODATA 2018).
    faraday = F
    assert faraday == pytest.approx(96485.33212, abs=1e-5)
    assert faraday == pytest.approx(constants.N_A * constants.e, rel=1e-15)


# Theoretical capacities (Faraday's law, derived; literature values from memory, high).
@pytest.mark.parametrize(
    ("name", "carriers", "formula", "expected", "tol"),
    [
        ("LiFePO4", 1, {"Li": 1, "Fe": 1, "P": 1, "O": 4}, 169.9, 0.3),
        ("graphite per C6", 1, {"C": 6}, 371.9, 0.5),
        ("Li4Ti5O12 (3 Li)", 3, {"Li": 4, "Ti": 5, "O": 12}, 175.1, 0.3),
        ("LiMn2O4", 1, {"Li": 1, "Mn": 2, "O": 4}, 148.2, 0.3),
        ("NMC811", 1, {"Li": 1, "Ni": 0.8, "Mn": 0.1, "Co": 0.1, "O": 2}, 275.5, 0.5),
    ],
)
def test_theoretical_capacity_from_faradays_law(
    name: str, carriers: int, formula: dict[str, float], expected: float, tol: float
) -> None:
    assert theoretical_mah_per_g(carriers, formula) == pytest.approx(expected, abs=tol), name


def test_thermal_voltage() -> None:
    # RT/F at 298.15 K = 25.6926 mV (derived from scipy.constants, CODATA 2018).
    rt_over_f_mv = R * 298.15 / F * 1000
    assert rt_over_f_mv == pytest.approx(25.6926, abs=0.0005)
    assert ocp.thermal_voltage_v(298.15) * 1000 == pytest.approx(25.6926, abs=0.0005)
    # (ln 10) RT/F = 59.159 mV per decade (derived from scipy.constants).
    assert math.log(10) * R * 298.15 / F * 1000 == pytest.approx(59.159, abs=0.002)
    # Derived from CODATA 2018 via scipy.constants: 25.262 mV at 293.15 K and 26.123 mV at 303.15 K.
    assert ocp.thermal_voltage_v(293.15) * 1000 == pytest.approx(25.262, abs=0.001)
    assert ocp.thermal_voltage_v(303.15) * 1000 == pytest.approx(26.123, abs=0.001)


def gibbs(x: float, a: float) -> float:
    """Regular-solution free energy of mixing per site, in units of RT (Huggins 2009; from memory, high)."""
    return a * x * (1 - x) + x * math.log(x) + (1 - x) * math.log(1 - x)


def gibbs_slope(x: float, a: float) -> float:
    return a * (1 - 2 * x) + math.log(x / (1 - x))


def common_tangent(a: float) -> tuple[float, float]:
    """Two points whose tangents to g(x) coincide: equal slopes and equal intercepts.

    Solved as a two-unknown system with scipy.optimize.root, without using the
    symmetry of the model, so it checks ocp.binodal independently.
    """

    def equations(z: np.ndarray) -> list[float]:
        x1, x2 = (1 / (1 + math.exp(-v)) for v in z)  # logits keep x inside (0, 1)
        s1, s2 = gibbs_slope(x1, a), gibbs_slope(x2, a)
        intercept1 = gibbs(x1, a) - s1 * x1
        intercept2 = gibbs(x2, a) - s2 * x2
        return [s1 - s2, intercept1 - intercept2]

    guess = np.array([math.log(0.05 / 0.95), math.log(0.9 / 0.1)])
    sol = optimize.root(equations, guess, method="hybr", tol=1e-13)
    assert max(abs(r) for r in equations(sol.x)) < 1e-12, sol.message
    x1, x2 = sorted(1 / (1 + math.exp(-v)) for v in sol.x)
    return x1, x2


# Binodal for Omega = 2.5, 3 and 4 RT (common tangent, derived).
@pytest.mark.parametrize(
    ("a", "low", "high"),
    [(2.5, 0.1448, 0.8552), (3.0, 0.0707, 0.9293), (4.0, 0.0212, 0.9788)],
)
def test_binodal_by_common_tangent(a: float, low: float, high: float) -> None:
    x1, x2 = common_tangent(a)
    assert (x1, x2) == (pytest.approx(low, abs=2e-4), pytest.approx(high, abs=2e-4))
    assert ocp.binodal(a) == (pytest.approx(x1, abs=1e-9), pytest.approx(x2, abs=1e-9))


def test_equilibrium_potential_is_the_common_tangent_slope() -> None:
    # mu = mu0 + RT g'(x): in the two-phase range the potential is set by the common
    # tangent's slope (Gibbs phase rule, from memory, high), here 0, so E = E0.
    a, e0 = 3.0, 3.4
    x1, x2 = common_tangent(a)
    slope = gibbs_slope(x1, a)
    expected = e0 - ocp.thermal_voltage_v() * slope
    mid = np.linspace(x1 + 1e-6, x2 - 1e-6, 50)
    assert np.allclose(ocp.regular_solution_equilibrium(mid, a, e0), expected, atol=1e-9)


# Spinodal x(1-x) = RT / (2 Omega), closed form (derived).
@pytest.mark.parametrize(
    ("a", "low", "high"), [(2.5, 0.2764, 0.7236), (3.0, 0.2113, 0.7887), (4.0, 0.1464, 0.8536)]
)
def test_spinodal_closed_form_and_potential_extrema(a: float, low: float, high: float) -> None:
    root = math.sqrt(1 - 2 / a)
    assert ((1 - root) / 2, (1 + root) / 2) == (
        pytest.approx(low, abs=2e-4), pytest.approx(high, abs=2e-4))
    # The single-phase potential loops: its local minimum and maximum sit at the spinodal.
    def potential(x: float) -> float:
        return float(ocp.regular_solution_potential(x, a, 0.0))

    x_min = optimize.minimize_scalar(potential, bounds=(0.01, 0.5), method="bounded",
                                     options={"xatol": 1e-10}).x
    x_max = optimize.minimize_scalar(lambda x: -potential(x), bounds=(0.5, 0.99),
                                     method="bounded", options={"xatol": 1e-10}).x
    assert (x_min, x_max) == (pytest.approx(low, abs=2e-4), pytest.approx(high, abs=2e-4))


def test_ideal_solution_slope() -> None:
    # Derived: E(0.1) - E(0.9) = 2 (RT/F) ln 9 = 112.90 mV at 298.15 K.
    closed_form = 2 * R * 298.15 / F * math.log(9) * 1000
    assert closed_form == pytest.approx(112.90, abs=0.05)
    e = ocp.regular_solution_potential(np.array([0.1, 0.9]), 0.0, 1.0)
    assert (e[0] - e[1]) * 1000 == pytest.approx(112.90, abs=0.05)


def test_self_discharge_current_from_k_value() -> None:
    # I = K / (dV/dQ), derived from the Chen et al. 2020 fits. Chen 2020 5 Ah cell at 50 % SOC:
    # dV/dSOC about 0.89 V, dV/dQ about 0.179 V/Ah; K = 1 mV/day gives about 0.233 mA.
    h = 1e-4
    dv_dsoc = float(ocp.nmc811_graphite_cell(0.5 + h) - ocp.nmc811_graphite_cell(0.5 - h)) / (2 * h)
    assert dv_dsoc == pytest.approx(0.89, abs=0.01)
    dv_dq = dv_dsoc / 5.0
    assert dv_dq == pytest.approx(0.179, abs=0.002)
    current_ma = (1e-3 / 24) / dv_dq * 1000
    assert current_ma == pytest.approx(0.233, abs=0.005)
