"""Savitzky-Golay smoothing and derivatives, with the window's coefficients computed once.

Computes what ``scipy.signal.savgol_filter(x, window, order, deriv, delta, mode="interp")``
computes: inside, the convolution with the least-squares coefficients; in the first and
last half-windows, the polynomial fitted to the first and last ``window`` samples. SciPy
fits those two edge polynomials again on every call, which cost more than the rest of
the plateau finder; here each edge is one matrix of coefficients per (window, order,
derivative, spacing), cached, so a call is a convolution and two small matrix products.
The tests compare it with SciPy's own function.
"""

from __future__ import annotations

import functools

import numpy as np
import numpy.typing as npt
from scipy.signal import savgol_coeffs

from pipeline.model import FloatArray


@functools.lru_cache(maxsize=64)
def _plan(window: int, order: int, deriv: int, delta: float) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Convolution coefficients, and the edge matrices for the first and last half-window."""
    if window % 2 != 1 or window <= order:
        raise ValueError(f"window must be odd and longer than the polynomial order ({window}, {order})")
    half = window // 2
    inside = savgol_coeffs(window, order, deriv=deriv, delta=delta)

    def at(position: int) -> FloatArray:
        weights: FloatArray = savgol_coeffs(window, order, deriv=deriv, delta=delta, pos=position, use="dot")
        return weights

    left = np.stack([at(k) for k in range(half)]) if half else np.empty((0, window))
    right = np.stack([at(k) for k in range(half + 1, window)]) if half else np.empty((0, window))
    return inside, left, right


def savgol(x: npt.ArrayLike, window: int, order: int, *, deriv: int = 0, delta: float = 1.0) -> FloatArray:
    """Savitzky-Golay filter of ``x`` (edges by polynomial fit, as SciPy's mode="interp").

    ``window`` is odd and greater than ``order``, and at most ``len(x)``.
    """
    samples: FloatArray = np.asarray(x, dtype=np.float64)
    if window > samples.size:
        raise ValueError(f"window ({window}) is longer than the data ({samples.size} samples)")
    inside, left, right = _plan(window, order, deriv, float(delta))
    out: FloatArray = np.convolve(samples, inside, mode="same")
    half = window // 2
    if half:
        out[:half] = left @ samples[:window]
        out[-half:] = right @ samples[-window:]
    return out
