"""Published open-circuit-potential fits and the regular-solution insertion model, in volts.

Half-cell potentials are vs Li/Li+; full-cell curves map a state of charge onto
the two electrodes' stoichiometries. Everything is a pure numpy function
evaluated in float64. Turning these curves into a cycler record is synth.py's
job; judging a record never uses them.

Variables: ``x`` is the anode's lithium fraction (graphite: 0 empty to 1 LiC6;
LTO: 0 = Li4Ti5O12 to 1 = Li7Ti5O12), ``y`` the cathode's lithium fraction
(1 = fully lithiated, i.e. discharged).
"""

from __future__ import annotations

import math

import numpy as np
import numpy.typing as npt
from scipy import constants, optimize

from pipeline.model import FloatArray

ArrayLike = npt.ArrayLike

GAS_CONSTANT = constants.R  # J/(mol K), CODATA 2018 via scipy.constants
FARADAY = constants.physical_constants["Faraday constant"][0]  # C/mol, exact in the 2019 SI


def _as_float(values: ArrayLike) -> FloatArray:
    return np.asarray(values, dtype=np.float64)


def graphite_chen2020(x: ArrayLike) -> FloatArray:
    """Graphite OCP vs Li (V) at lithium fraction ``x``.

    Source: Chen, Brosa Planella, O'Regan, Gastol, Widanage, Kendrick,
    J. Electrochem. Soc. 167 (2020) 080534, as transcribed in PyBaMM
    ``input/parameters/lithium_ion/Chen2020.py``.

    >>> round(float(graphite_chen2020(0.5)), 4)
    0.1331
    """
    x = _as_float(x)
    return (
        1.9793 * np.exp(-39.3631 * x)
        + 0.2482
        - 0.0909 * np.tanh(29.8538 * (x - 0.1234))
        - 0.04478 * np.tanh(14.9159 * (x - 0.2769))
        - 0.0205 * np.tanh(30.4444 * (x - 0.6103))
    )


def nmc811_chen2020(y: ArrayLike) -> FloatArray:
    """NMC811 OCP vs Li (V) at lithium fraction ``y``.

    Source: Chen et al., J. Electrochem. Soc. 167 (2020) 080534, same file as the
    graphite fit (PyBaMM Chen2020.py). The two large tanh terms nearly cancel, so
    the coefficients are copied digit for digit.

    >>> round(float(nmc811_chen2020(0.5)), 4)
    3.972
    """
    y = _as_float(y)
    return (
        -0.8090 * y
        + 4.4875
        - 0.0428 * np.tanh(18.5138 * (y - 0.5542))
        - 17.7326 * np.tanh(15.7890 * (y - 0.3117))
        + 17.5842 * np.tanh(15.9308 * (y - 0.3120))
    )


def lfp_safari2011(y: ArrayLike) -> FloatArray:
    """LiFePO4 OCP vs Li (V) at lithium fraction ``y``: flat 3.4323 V over the two-phase range.

    Source: Safari & Delacourt, "Modeling of a commercial graphite/LiFePO4 cell",
    J. Electrochem. Soc. 158 (2011) A562, doi 10.1149/1.3567007.

    >>> round(float(lfp_safari2011(0.5)), 4)
    3.4323
    """
    y = _as_float(y)
    one_minus = 1.0 - y
    return (
        3.4323
        - 0.8428 * np.exp(-80.2493 * one_minus**1.3198)
        - 3.2474e-6 * np.exp(20.2645 * one_minus**3.8003)
        + 3.2482e-6 * np.exp(20.2646 * one_minus**3.7995)
    )


def lfp_afshar2017(y: ArrayLike) -> FloatArray:
    """LiFePO4 OCP vs Li (V) at lithium fraction ``y``: a slightly sloped plateau near 3.40 V.

    Source: Afshar, Morris, Khajepour, arXiv:1709.03970 (2017), the LFP curve of
    PyBaMM's Prada2013 parameter set (PyBaMM Prada2013.py).

    >>> round(float(lfp_afshar2017(0.5)), 4)
    3.3976
    """
    y = _as_float(y)
    return 3.4077 - 0.020269 * y + 0.5 * np.exp(-150.0 * y) - 0.9 * np.exp(-30.0 * (1.0 - y))


def thermal_voltage_v(temperature_k: float = 298.15) -> float:
    """RT/F in volts (25.6926 mV at 298.15 K, derived from scipy.constants, CODATA 2018)."""
    return float(GAS_CONSTANT * temperature_k / FARADAY)


def regular_solution_potential(
    x: ArrayLike, omega_over_rt: float, e0_v: float, temperature_k: float = 298.15
) -> FloatArray:
    """Single-phase mean-field potential E(x) of a regular-solution insertion host (V).

    E(x) = E0 - (RT/F)[ln(x/(1-x)) + (Omega/RT)(1-2x)]; more lithium, lower potential.
    For Omega > 2RT this curve loops between the spinodal points and is not the
    equilibrium curve there (see :func:`regular_solution_equilibrium`).
    Source: standard lattice-gas / regular-solution result, e.g. Huggins,
    "Advanced Batteries: Materials Science Aspects" (Springer 2009) (formula from memory, high).

    >>> float(regular_solution_potential(0.5, 3.0, 1.55))
    1.55
    """
    x = _as_float(x)
    if np.any((x <= 0.0) | (x >= 1.0)):
        raise ValueError("regular-solution site fraction must lie strictly between 0 and 1")
    vt = thermal_voltage_v(temperature_k)
    return e0_v - vt * (np.log(x / (1.0 - x)) + omega_over_rt * (1.0 - 2.0 * x))


def binodal(omega_over_rt: float) -> tuple[float, float]:
    """The two coexisting compositions of the symmetric regular solution (Omega/RT > 2).

    Solves ln(x/(1-x)) = (Omega/RT)(2x-1) for its root below 1/2 with
    scipy.optimize.brentq (the common-tangent condition of this symmetric model,
    from memory, high); the other root is 1 - x by symmetry. The search runs on
    u = ln(x/(1-x)) so that very small compositions stay well conditioned.

    >>> tuple(round(v, 4) for v in binodal(3.0))
    (0.0707, 0.9293)
    """
    a = float(omega_over_rt)
    if not a > 2.0:
        raise ValueError(f"no miscibility gap for Omega/RT = {a:g}: it must exceed 2")

    def excess(u: float) -> float:
        x = 1.0 / (1.0 + math.exp(-u))
        return u - a * (2.0 * x - 1.0)

    # Lower spinodal: x(1-x) = 1/(2a); excess() is positive there and negative at u = -a - 1.
    x_spinodal = 0.5 * (1.0 - math.sqrt(1.0 - 2.0 / a))
    u_spinodal = math.log(x_spinodal / (1.0 - x_spinodal))
    u_root = optimize.brentq(excess, -a - 1.0, u_spinodal, xtol=1e-14, rtol=1e-14, maxiter=200)
    low = 1.0 / (1.0 + math.exp(-u_root))
    return low, 1.0 - low


def regular_solution_equilibrium(
    x: ArrayLike, omega_over_rt: float, e0_v: float, temperature_k: float = 298.15
) -> FloatArray:
    """Equilibrium potential of the regular-solution host (V): flat at E0 across the binodal.

    Between the binodal compositions two phases coexist and, by the Gibbs phase
    rule, the potential is fixed; for this symmetric model the common tangent is
    horizontal, so that potential is E0 (from memory, high). Outside it equals
    :func:`regular_solution_potential`. With Omega <= 2RT there is no gap.

    >>> float(regular_solution_equilibrium(0.3, 3.0, 1.55))
    1.55
    """
    x = _as_float(x)
    single = regular_solution_potential(x, omega_over_rt, e0_v, temperature_k)
    if omega_over_rt <= 2.0:
        return single
    low, high = binodal(omega_over_rt)
    return np.where((x >= low) & (x <= high), e0_v, single)


# LTO: interaction chosen so the two-phase range spans about 2-98 % of the 3 Li (our choice);
# plateau 1.55 V vs Li from Ohzuku, Ueda, Yamamoto, J. Electrochem. Soc. 142 (1995) 1431.
LTO_OMEGA_OVER_RT = 4.0
LTO_PLATEAU_V = 1.55


def lto_plateau(x: ArrayLike) -> FloatArray:
    """Li4+3xTi5O12 OCP vs Li (V): flat 1.55 V two-phase plateau with rising/falling ends.

    Built from :func:`regular_solution_equilibrium` with Omega = 4 RT and
    E0 = 1.55 V: flat between the binodal compositions 0.0212 and 0.9788, rising
    as x -> 0 and falling as x -> 1 (logarithmically, as the mean-field model
    does). Plateau voltage: Ohzuku, Ueda, Yamamoto, J. Electrochem. Soc. 142
    (1995) 1431; the interaction value is our own choice.

    >>> float(lto_plateau(0.5))
    1.55
    """
    return regular_solution_equilibrium(x, LTO_OMEGA_OVER_RT, LTO_PLATEAU_V)


def _soc_map(soc: ArrayLike, at_empty: float, at_full: float) -> FloatArray:
    return at_empty + (at_full - at_empty) * _as_float(soc)


# Stoichiometry windows of Chen et al. 2020 (0.9014 from the PyBaMM Chen2020.py initial state,
# the other three from memory, medium certainty).
CHEN_GRAPHITE_WINDOW = (0.0279, 0.9014)
CHEN_NMC_WINDOW = (0.9084, 0.2661)
# Illustrative LFP/graphite balance, our own choice (not from a paper).
LFP_WINDOW = (0.97, 0.03)
LFP_GRAPHITE_WINDOW = (0.02, 0.85)
# Our own illustrative NMC811/LTO balance: NMC over the Chen window, LTO from nearly empty to
# nearly full so the full cell spans roughly 1.7-2.8 V (as LMO or NMC / LTO cells do, from memory, medium).
LTO_WINDOW = (0.00001, 0.995)


def nmc811_graphite_cell(soc: ArrayLike) -> FloatArray:
    """Full-cell OCV (V) of the Chen 2020 NMC811/graphite cell at state of charge ``soc`` (0-1).

    Linear stoichiometry map between the Chen et al. 2020 windows above:
    V = U_NMC811(y) - U_graphite(x).

    >>> round(float(nmc811_graphite_cell(0.5)), 4)
    3.7078
    """
    return nmc811_chen2020(_soc_map(soc, *CHEN_NMC_WINDOW)) - graphite_chen2020(
        _soc_map(soc, *CHEN_GRAPHITE_WINDOW)
    )


def lfp_graphite_cell(soc: ArrayLike) -> FloatArray:
    """Full-cell OCV (V) of an illustrative LFP/graphite cell at state of charge ``soc`` (0-1).

    Our own illustrative map (not from a paper): y = 0.97 - 0.94 SOC, x = 0.02 + 0.83 SOC,
    V = U_LFP,Safari-Delacourt(y) - U_graphite,Chen(x).

    >>> round(float(lfp_graphite_cell(0.5)), 4)
    3.2985
    """
    return lfp_safari2011(_soc_map(soc, *LFP_WINDOW)) - graphite_chen2020(
        _soc_map(soc, *LFP_GRAPHITE_WINDOW)
    )


def nmc811_lto_cell(soc: ArrayLike) -> FloatArray:
    """Full-cell OCV (V) of an illustrative NMC811/LTO cell at state of charge ``soc`` (0-1).

    Cathode: Chen 2020 NMC811 fit over its Chen window; anode: :func:`lto_plateau`
    from x = 0.00001 to 0.995. Our own balance, not from a paper.
    """
    return nmc811_chen2020(_soc_map(soc, *CHEN_NMC_WINDOW)) - lto_plateau(
        _soc_map(soc, *LTO_WINDOW)
    )
