"""Thin a long curve for drawing: keep each column's lowest and highest point, in order.

Pure: numbers in, numbers out. Used by the plots, and by the measurement step to keep a
drawable view of a whole record without carrying every sample into the result.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

FloatArray = npt.NDArray[np.float64]


def decimate(x: object, y: object, max_points: int) -> tuple[FloatArray, FloatArray]:
    """Thin a curve to at most ``max_points`` points, keeping the shape the page can show.

    The x range is cut into equal columns; in each column the points with the
    lowest and the highest y are kept (in their original order), so spikes and
    steps survive. The first and last finite points are always kept. Non-finite
    points are dropped. Where x is not sorted, columns are runs of equal length
    in sample order instead. Deterministic: same input, same output.

    >>> xs, ys = decimate(range(1000), [0.0] * 999 + [5.0], 10)
    >>> len(xs) <= 10, float(ys.max())
    (True, 5.0)
    """
    if max_points < 4:
        raise ValueError(f"max_points must be at least 4, got {max_points}")
    xa = np.asarray(x, dtype=np.float64).ravel()
    ya = np.asarray(y, dtype=np.float64).ravel()
    if xa.shape != ya.shape:
        raise ValueError(f"x and y differ in length ({xa.size} and {ya.size})")
    finite = np.isfinite(xa) & np.isfinite(ya)
    xa, ya = xa[finite], ya[finite]
    n = xa.size
    if n <= max_points:
        return xa.copy(), ya.copy()
    columns = (max_points - 2) // 2
    if bool(np.all(np.diff(xa) >= 0)) and xa[-1] > xa[0]:
        span = xa[-1] - xa[0]
        column = np.minimum(((xa - xa[0]) / span * columns).astype(np.int64), columns - 1)
    else:
        column = (np.arange(n, dtype=np.int64) * columns) // n
    # column is non-decreasing along the samples, so each column is one slice.
    edges = np.flatnonzero(np.diff(column)) + 1
    starts = np.concatenate(([0], edges))
    stops = np.concatenate((edges, [n]))
    keep = [0, n - 1]
    for start, stop in zip(starts.tolist(), stops.tolist(), strict=True):
        part = ya[start:stop]
        keep.append(start + int(np.argmin(part)))
        keep.append(start + int(np.argmax(part)))
    index = np.unique(np.asarray(keep, dtype=np.int64))
    return xa[index], ya[index]


def thin_series(x: FloatArray, y: FloatArray, max_points: int) -> tuple[FloatArray, FloatArray]:
    """A long series thinned to about ``max_points`` points by columns of equal sample counts.

    Each column keeps its lowest and highest point in sample order, like :func:`decimate`,
    but in a few array operations: fast enough to keep a drawable view of a whole record
    (tens of thousands of rows) at measuring time. Columns count samples, not x, which for
    a record logged at a steady interval is the same thing. Non-finite points are dropped.

    >>> xs, ys = thin_series(np.arange(1000.0), np.r_[np.zeros(999), 5.0], 10)
    >>> len(xs) <= 12, float(ys.max()), float(xs[0]), float(xs[-1])
    (True, 5.0, 0.0, 999.0)
    """
    return thin_series_over(x, [y], max_points)[0]


def _thinned_finite(xa: FloatArray, ya: FloatArray, max_points: int) -> tuple[FloatArray, FloatArray]:
    """thin_series where a point may not be finite (or the series is short): those points
    dropped, then what is left thinned."""
    finite = np.isfinite(xa) & np.isfinite(ya)
    if not finite.all():
        xa, ya = xa[finite], ya[finite]
    if len(xa) <= max_points:
        return xa.copy(), ya.copy()
    return _thinned(xa, ya, max_points)


def _thinned(xa: FloatArray, ya: FloatArray, max_points: int) -> tuple[FloatArray, FloatArray]:
    """thin_series of a series longer than ``max_points``, as it stands.

    Where any y is NaN or infinite, so is a y kept: argmin and argmax pick NaN first, -inf
    is a lowest point and +inf a highest. So keeping only finite points is known from the
    points kept, and a series of finite numbers needs no mask of them (thin_series).
    """
    n = len(xa)
    columns = max(1, max_points // 2)
    per = -(-n // columns)  # ceiling division
    whole = (n // per) * per
    blocks = ya[:whole].reshape(-1, per)
    base = np.arange(0, whole, per)
    lo = base + np.argmin(blocks, axis=1)
    hi = base + np.argmax(blocks, axis=1)
    # each block's two points in sample order, blocks in order: sorted without a sort
    pairs = np.empty(2 * len(lo), dtype=np.int64)
    pairs[0::2] = np.minimum(lo, hi)
    pairs[1::2] = np.maximum(lo, hi)
    tail = ya[whole:]
    ends: list[int] = []
    if len(tail):
        ends = sorted((whole + int(np.argmin(tail)), whole + int(np.argmax(tail))))
    index = np.concatenate(([0], pairs, ends, [n - 1])).astype(np.int64)
    return xa[index], ya[index]


def thin_series_over(
    x: FloatArray, ys: list[FloatArray], max_points: int
) -> list[tuple[FloatArray, FloatArray]]:
    """Each of ``ys`` against one ``x``, thinned as :func:`thin_series` thins it.

    x is looked at once for points that are not finite, not once per series: the record's
    view draws its voltage, current and temperature against one time axis of tens of
    thousands of rows. A series of finite numbers against a finite x needs no mask of them:
    whether any y kept is not finite tells it (:func:`_thinned`).
    """
    xa = np.asarray(x, dtype=np.float64)
    yas = [np.asarray(y, dtype=np.float64) for y in ys]
    if not (len(xa) > max_points and np.isfinite(xa).all()):
        return [_thinned_finite(xa, ya, max_points) for ya in yas]
    out = []
    for ya in yas:
        thinned = _thinned(xa, ya, max_points)
        out.append(thinned if np.isfinite(thinned[1]).all() else _thinned_finite(xa, ya, max_points))
    return out
