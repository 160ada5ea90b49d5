"""How one metric is spread over a lot, and how much room its window leaves: distribution, Cpk.

Pure functions of values and window bounds. The robust screens built on the same median
and MAD are left to :mod:`pipeline.judge.lotscreens`; grades, the verdict tally and the one
pass over a whole lot to :mod:`pipeline.judge.lotstats`.

A value that is None, NaN or infinite is a check not made: it is dropped, never counted as
a value (:func:`measured`).

>>> d = distribution([1.0, 2.0, None, 3.0, float("nan")])
>>> (d.n, d.mean, d.median, d.sd)
(3, 2.0, 2.0, 1.0)
>>> capability([9.0, 10.0, 11.0], 7.0, 16.0).cpk
1.0
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from statistics import NormalDist
from typing import Final

import numpy as np

from pipeline.model import FloatArray

# 1 / Φ⁻¹(3/4) ≈ 1.4826: the factor that makes the median absolute deviation of normal data
# an estimate of its standard deviation.
NORMAL_MAD_SCALE: Final = 1.0 / NormalDist().inv_cdf(0.75)
PERCENTILES: Final = (1, 5, 25, 75, 95, 99)

Values = Iterable[float | None] | FloatArray


def measured(values: Values) -> FloatArray:
    """The values that were measured, as a float array: None, NaN and ±inf dropped."""
    if isinstance(values, np.ndarray):
        x = np.asarray(values, dtype=np.float64)
    else:
        x = np.array(list(values), dtype=np.float64)  # numpy turns None into NaN
    kept: FloatArray = x[np.isfinite(x)]
    return kept


@dataclass(frozen=True, slots=True)
class Distribution:
    """How one metric is spread over the cells that have a value for it.

    ``sd`` is the sample standard deviation (ddof = 1), None for a single value. ``mad``
    is the raw median absolute deviation; ``robust_sd`` = 1.4826·MAD estimates the
    standard deviation of normal data, yet a few wild values barely move it.
    ``percentile_values`` hold the percentiles named in :data:`PERCENTILES`, linearly
    interpolated (numpy's default); :attr:`percentiles` gives them as a mapping.
    """

    n: int
    mean: float
    median: float
    sd: float | None
    mad: float
    robust_sd: float
    minimum: float
    maximum: float
    percentile_values: tuple[float, ...]

    @property
    def percentiles(self) -> Mapping[int, float]:
        """Percentile (1, 5, 25, 75, 95, 99) -> value."""
        return dict(zip(PERCENTILES, self.percentile_values, strict=True))


def distribution_of_measured(x: FloatArray) -> Distribution | None:
    """:func:`distribution` of values already cleaned by :func:`measured`."""
    n = int(x.size)
    if n == 0:
        return None
    median = float(np.median(x))
    mad = float(np.median(np.abs(x - median)))
    return Distribution(
        n=n,
        mean=float(np.mean(x)),
        median=median,
        sd=float(np.std(x, ddof=1)) if n >= 2 else None,
        mad=mad,
        robust_sd=NORMAL_MAD_SCALE * mad,
        minimum=float(np.min(x)),
        maximum=float(np.max(x)),
        percentile_values=tuple(float(p) for p in np.percentile(x, PERCENTILES)),
    )


def distribution(values: Values) -> Distribution | None:
    """Describe the measured values; None when no value was measured.

    >>> distribution([None, float("nan")]) is None
    True
    >>> distribution([4.0]).sd is None
    True
    """
    return distribution_of_measured(measured(values))


@dataclass(frozen=True, slots=True)
class Capability:
    """How well one metric's spread fits its window: Cp, Cpl, Cpu and Cpk.

    Cp = (high - low)/(6 s), Cpu = (high - mean)/(3 s), Cpl = (mean - low)/(3 s), Cpk = the
    smaller of the sides present. s is the sample standard deviation of the whole lot (not a
    within-subgroup estimate), so on a lot these are what SPC texts call Pp and Ppk. A
    missing side leaves its index None (and Cp, which needs both). When nothing can be
    computed, ``cpk`` is None and ``why`` says why; else ``why`` is empty.
    """

    n: int
    mean: float | None
    sd: float | None
    low: float | None
    high: float | None
    cp: float | None = None
    cpl: float | None = None
    cpu: float | None = None
    cpk: float | None = None
    why: str = ""


def capability_of_measured(x: FloatArray, low: float | None, high: float | None) -> Capability:
    """:func:`capability` of values already cleaned by :func:`measured`."""
    n = int(x.size)
    mean = float(np.mean(x)) if n else None
    sd = float(np.std(x, ddof=1)) if n >= 2 else None
    base = Capability(n=n, mean=mean, sd=sd, low=low, high=high)
    if low is None and high is None:
        return _replace_why(base, "no limits")
    if n < 2 or mean is None or sd is None:
        return _replace_why(base, "fewer than 2 values")
    # all values equal: the rounding of the mean could leave a tiny sd and a huge Cpk
    if float(np.max(x)) == float(np.min(x)) or not sd > 0.0:
        return _replace_why(base, "no spread")
    cpl = (mean - low) / (3.0 * sd) if low is not None else None
    cpu = (high - mean) / (3.0 * sd) if high is not None else None
    cp = (high - low) / (6.0 * sd) if low is not None and high is not None else None
    cpk = min(v for v in (cpl, cpu) if v is not None)
    return Capability(n=n, mean=mean, sd=sd, low=low, high=high, cp=cp, cpl=cpl, cpu=cpu, cpk=cpk)


def _replace_why(capability: Capability, why: str) -> Capability:
    return Capability(
        n=capability.n, mean=capability.mean, sd=capability.sd,
        low=capability.low, high=capability.high, why=why,
    )


def capability(values: Values, low: float | None, high: float | None) -> Capability:
    """Capability of the measured values against the window [low, high] (either side may be open).

    >>> c = capability([9.0, 10.0, 11.0], 7.0, None)
    >>> (c.cp, c.cpl, c.cpu, c.cpk)
    (None, 1.0, None, 1.0)
    >>> capability([5.0, 5.0, 5.0], 0.0, 10.0).why
    'no spread'
    """
    return capability_of_measured(measured(values), low, high)


__all__ = [
    "NORMAL_MAD_SCALE",
    "PERCENTILES",
    "Capability",
    "Distribution",
    "Values",
    "capability",
    "capability_of_measured",
    "distribution",
    "distribution_of_measured",
    "measured",
]
