"""Published open-circuit-potential fits and the regular-solution insertion model, in volts.

Half-cell potentials are vs Li/Li+ (sodium-ion electrodes: vs Na/Na+); full-cell
curves map a state of charge onto the two electrodes' stoichiometries. Everything is
a pure numpy function evaluated in float64. Turning these curves into a cycler
record is the job of cellmodel.py and synth.py; judging a record never uses them.

Variables: ``x`` is the anode's lithium (or sodium) fraction (graphite: 0 empty to 1
LiC6; LTO: 0 = Li4Ti5O12 to 1 = Li7Ti5O12; hard carbon: 0 empty to 1 full), ``y`` the
cathode's lithium (or sodium) fraction (1 = fully lithiated or sodiated, i.e. discharged).
"""

from __future__ import annotations

import math

import numpy as np
import numpy.typing as npt
from scipy import constants, interpolate, optimize

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


# ---------------------------------------------------------------- sodium-ion: NVPF / hard carbon
#
# Source of both tables: Chayambuka, Mulder, Danilov, Notten, "Physics-based modeling of
# sodium-ion batteries part II. Model and validation", Electrochim. Acta 404 (2022) 139764,
# doi 10.1016/j.electacta.2021.139764: the open-circuit potentials of its hard-carbon negative
# and Na3V2(PO4)2F3 (NVPF) positive electrode, as tabulated in PyBaMM's Chayambuka2022
# parameter set (input/parameters/sodium_ion/data/U_n.csv and U_p.csv), every point copied.
# Between the points the curve is a monotone cubic (scipy PchipInterpolator: no overshoot);
# outside the tabulated range the end values hold, nothing is extrapolated.

# Hard carbon vs Na/Na+ (sodium fraction x, volts): slopes from 1.32 V to about 0.1 V up to
# x = 0.40, then a low-voltage plateau from 0.09 V to 0.035 V, the shape Stevens & Dahn,
# J. Electrochem. Soc. 147 (2000) 1271, describe for sodium in hard carbon.
HARD_CARBON_CHAYAMBUKA2022 = (
    (0.001436794, 1.318963892), (0.001643334, 1.21982507), (0.00811789, 1.112038542),
    (0.01027308, 1.077546494), (0.035479844, 0.978299913), (0.060758448, 0.844570264),
    (0.090185795, 0.719443422), (0.127982471, 0.577039126), (0.169900951, 0.456168787),
    (0.232688871, 0.317967115), (0.320485995, 0.1753473), (0.403954777, 0.110332349),
    (0.483167055, 0.088439192), (0.574861484, 0.075112923), (0.687380455, 0.066007238),
    (0.799899424, 0.056901553), (0.891593855, 0.043575284), (0.960353451, 0.038968561),
    (0.987446008, 0.034541438), (0.995806356, 0.021574368),
)
# Na3V2(PO4)2F3 vs Na/Na+ (sodium fraction y, volts): two flat steps, about 4.15-4.17 V and
# 3.68-3.70 V, with a sharp fall near y = 0.58 between them (same source). The published
# points rise by 0.27 mV between y = 0.26 and 0.33; they are kept as published.
NVPF_CHAYAMBUKA2022 = (
    (0.21, 4.288102031), (0.21004478, 4.210892773), (0.219269532, 4.175283892),
    (0.261497402, 4.172472367), (0.332354842, 4.172738781), (0.409317336, 4.158176665),
    (0.474174208, 4.152479924), (0.526985168, 4.143767596), (0.560316674, 4.11121965),
    (0.575706188, 4.048901275), (0.582273973, 3.941995276), (0.585975815, 3.805375531),
    (0.590901654, 3.725196032), (0.598588947, 3.695521965), (0.655863013, 3.698707605),
    (0.696598205, 3.69292017), (0.741871138, 3.684179499), (0.802205196, 3.678465753),
    (0.864031932, 3.675727917), (0.930500897, 3.649245158), (0.959279735, 3.62262069),
    (0.979341333, 3.530616911), (0.980053837, 3.450437411), (0.983058101, 3.391026925),
    (0.992282853, 3.355418044), (0.996268304, 3.162363722), (0.999940293, 3.031684459),
)


def _table_curve(points: tuple[tuple[float, float], ...]) -> interpolate.PchipInterpolator:
    table = np.asarray(points, dtype=np.float64)
    return interpolate.PchipInterpolator(table[:, 0], table[:, 1], extrapolate=False)


_HARD_CARBON = _table_curve(HARD_CARBON_CHAYAMBUKA2022)
_NVPF = _table_curve(NVPF_CHAYAMBUKA2022)


def _on_table(curve: interpolate.PchipInterpolator, values: ArrayLike) -> FloatArray:
    x = np.clip(_as_float(values), curve.x[0], curve.x[-1])
    return np.asarray(curve(x), dtype=np.float64)


def hard_carbon_chayambuka2022(x: ArrayLike) -> FloatArray:
    """Hard-carbon OCP vs Na (V) at sodium fraction ``x``: a slope, then a plateau below 0.1 V.

    Source: Chayambuka et al., Electrochim. Acta 404 (2022) 139764, tabulated in PyBaMM's
    Chayambuka2022 parameter set; monotone cubic between the published points.

    >>> round(float(hard_carbon_chayambuka2022(0.483167055)), 6)
    0.088439
    """
    return _on_table(_HARD_CARBON, x)


def nvpf_chayambuka2022(y: ArrayLike) -> FloatArray:
    """Na3V2(PO4)2F3 OCP vs Na (V) at sodium fraction ``y``: steps near 4.16 V and 3.69 V.

    Source: Chayambuka et al., Electrochim. Acta 404 (2022) 139764, tabulated in PyBaMM's
    Chayambuka2022 parameter set; monotone cubic between the published points.

    >>> round(float(nvpf_chayambuka2022(0.696598205)), 6)
    3.69292
    """
    return _on_table(_NVPF, y)


# The cell of PyBaMM's Chayambuka2022 parameter set, full at its initial state: hard carbon at
# 13520 / 14540 mol/m3 and NVPF at 3320 / 15320 mol/m3 (published set). Discharging moves
# sodium from one to the other in the ratio of the electrodes' capacities, 14540 x 0.489 x 64 um
# over 15320 x 0.55 x 68 um = 0.7942 (derived from the same set's maximum concentrations,
# active volume fractions and thicknesses). The empty end is the first tabulated hard-carbon
# point, rounded up to 0.0015: the full-cell OCV there is 2.35 V.
NA_HARD_CARBON_FULL = 13520.0 / 14540.0
NA_NVPF_FULL = 3320.0 / 15320.0
NA_CAPACITY_RATIO = (14540.0 * 0.489 * 64.0) / (15320.0 * 0.55 * 68.0)
NA_HARD_CARBON_EMPTY = 0.0015
NA_HARD_CARBON_WINDOW = (NA_HARD_CARBON_EMPTY, NA_HARD_CARBON_FULL)
NA_NVPF_WINDOW = (
    NA_NVPF_FULL + NA_CAPACITY_RATIO * (NA_HARD_CARBON_FULL - NA_HARD_CARBON_EMPTY),
    NA_NVPF_FULL,
)


def nvpf_hard_carbon_cell(soc: ArrayLike) -> FloatArray:
    """Full-cell OCV (V) of the Chayambuka 2022 NVPF/hard-carbon cell at state of charge ``soc``.

    V = U_NVPF(y) - U_hard_carbon(x), both from Chayambuka et al. 2022, with x and y linear
    in ``soc`` over the windows above (hard carbon 0.0015 -> 0.9299, NVPF 0.9540 -> 0.2167).
    Discharging from full it shows a flat stretch near 4.1 V (both electrodes on a plateau),
    a sharp step down to about 3.6 V, then a long slope as the hard carbon leaves its plateau.

    >>> round(float(nvpf_hard_carbon_cell(1.0)), 3)
    4.135
    """
    return nvpf_chayambuka2022(_soc_map(soc, *NA_NVPF_WINDOW)) - hard_carbon_chayambuka2022(
        _soc_map(soc, *NA_HARD_CARBON_WINDOW)
    )
