"""Medians of samples, and which side of a band a median falls on, as numpy's median gives them.

``median`` is ``float(np.median(values))`` for a 1-D float64 array, the same number: the
same middle element or mean of the two middle elements, NaN when a value is NaN. It spares
the general function's handling of axes and output arrays, which costs more than the
partition itself for the short runs a record is cut into, and partitions at one point
instead of numpy's two or three, which for thousands of values is several times faster.

``median_side`` answers what segmentation asks of a step's median current (above the
rest band, below it, or inside it) by counting the values beyond the band's edges,
without partitioning at all; only when the two middle values of an even count fall on
different sides does it take the median itself. Both are checked against numpy's median
in the tests.
"""

from __future__ import annotations

import math

import numpy as np

from pipeline.model import FloatArray


def median(values: FloatArray) -> float:
    """``float(np.median(values))`` of a 1-D float64 array, the very same number.

    >>> median(np.array([3.0, 1.0, 2.0])), median(np.array([4.0, 1.0, 2.0, 3.0]))
    (2.0, 2.5)
    """
    n = values.shape[0]
    if n == 0 or values.ndim != 1 or values.dtype != np.float64:
        return float(np.median(values))  # the general function's warnings and results
    half = n // 2
    # One partition point, not numpy's own two or three: a partition at a single point is
    # several times faster (numpy sorts about it with vector instructions), and the values
    # that matter follow from it. NaN sorts last, so a NaN anywhere is in the upper part,
    # whose largest value (max propagates NaN) then is NaN; the middle value below is the
    # largest of the lower part.
    part = np.partition(values, half)
    top = float(part[half:].max())
    if math.isnan(top):
        return top
    # numpy's mean of the middle value(s): a sum that starts from +0.0, divided by the count
    if n % 2:
        return 0.0 + float(part[half])
    return (0.0 + float(part[:half].max()) + float(part[half])) / 2


def median_side(values: FloatArray, threshold: float) -> int:
    """0 when ``abs(median(values)) <= threshold``, else 1 when the median is above 0, else -1.

    The median's value matters only against the band from ``-threshold`` to ``threshold``:
    with the counts of values above and below the band, the sorted middle values' sides
    are known. ``threshold`` is at least 0.

    >>> median_side(np.array([0.0, 5.0, 6.0]), 1.0), median_side(np.array([0.0, -5.0, 0.5]), 1.0)
    (1, 0)
    """
    n = values.shape[0]
    if n == 0 or not threshold >= 0.0 or values.ndim != 1 or values.dtype != np.float64:
        return _side(median(values), threshold)
    above = int(np.count_nonzero(values > threshold))
    below = int(np.count_nonzero(values < -threshold))
    if above + below < n and np.isnan(values).any():
        return _side(math.nan, threshold)  # numpy's median of values holding NaN is NaN
    # sorted, the ``below`` smallest values lie under the band and the ``above`` largest over it
    half = n // 2
    low = half if n % 2 else half - 1  # the middle value(s): sorted[low] and sorted[half]
    if low >= n - above:
        return 1  # both middle values above the band: so is their mean, rounded
    if half < below:
        return -1
    if below <= low and half < n - above:
        return 0  # both inside the band: so is their mean, rounded
    return _side(median(values), threshold)  # the two middle values on different sides


def _side(value: float, threshold: float) -> int:
    return 0 if abs(value) <= threshold else (1 if value > 0 else -1)
