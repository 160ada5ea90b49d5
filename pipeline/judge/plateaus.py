"""Find the flat voltage plateaus of one discharge, and its incremental-capacity (dQ/dV) peaks.

Pure: discharged capacity and voltage samples plus PlateauSettings in, plateaus
and curves out. The definition is docs/metrics.md's ("Plateaus"): V resampled on a
uniform grid of q (discharged capacity as % of the discharge's total), smoothed
with a Savitzky-Golay filter and differentiated; a plateau is a maximal run with
|dV/dq| at or below the flatness threshold, at least ``min_length_pct`` long, with
runs closer than ``merge_gap_pct`` merged. Choosing which discharge to analyse is
metrics.py's job.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from pipeline.judge.medians import median
from pipeline.judge.peaks import find_peaks
from pipeline.judge.savgol import savgol
from pipeline.model import Curve, FloatArray, Plateau, PlateauSettings

# Savitzky-Golay polynomial order: 2-3 keeps peak shapes (common practice).
SG_ORDER = 3
# A dQ/dV peak's prominence is taken within this many mV on either side: two-phase peaks
# are a few tens of mV wide (common practice), a sloped curve's hump is hundreds.
ICA_PEAK_WINDOW_MV = 60.0


@dataclass(frozen=True, slots=True)
class PlateauAnalysis:
    """Plateaus of one discharge, the curves behind them and the dQ/dV peaks."""

    plateaus: tuple[Plateau, ...]
    curve: Curve  # V (y) against q in % (x), on the uniform grid, not smoothed
    ica: Curve  # dQ/dV in Ah/V (y) against V (x)
    ica_peaks_v: tuple[float, ...]


def resample_uniform(
    q_pct: FloatArray, voltage_v: FloatArray, points: int
) -> tuple[FloatArray, FloatArray]:
    """Mean voltage in each cell of a uniform q grid over 0..100 %; empty cells interpolated.

    Averaging the samples that fall in a cell (rather than picking the nearest one)
    is what makes the result insensitive to sampling rate and sensor noise.
    """
    grid = np.linspace(0.0, 100.0, points)
    step = grid[1] - grid[0]
    cell = np.clip(np.rint(q_pct / step).astype(np.int64), 0, points - 1)
    sums = np.bincount(cell, weights=voltage_v, minlength=points)
    counts = np.bincount(cell, minlength=points)
    filled = counts > 0
    v = np.empty(points)
    v[filled] = sums[filled] / counts[filled]
    if not filled.all():
        v[~filled] = np.interp(grid[~filled], grid[filled], v[filled])
    return grid, v


def odd_window(length_pct: float, step_pct: float, points: int) -> int:
    n = max(SG_ORDER + 2, int(round(length_pct / step_pct)))
    n = min(n, points if points % 2 == 1 else points - 1)
    return n if n % 2 == 1 else n + 1 if n + 1 <= points else n - 1


def flat_runs(flat: np.ndarray) -> list[tuple[int, int]]:
    """(first, last) grid indices of each run of True."""
    padded = np.concatenate(([False], flat, [False]))
    edges = np.flatnonzero(np.diff(padded.astype(np.int8)))
    return [(int(a), int(b) - 1) for a, b in zip(edges[::2], edges[1::2], strict=True)]


def merged_runs(flat: np.ndarray, grid: FloatArray, gap_pct: float) -> list[tuple[int, int]]:
    """(first, last) grid indices of each run of True, runs closer than ``gap_pct`` merged."""
    merged: list[list[int]] = []
    for a, b in flat_runs(flat):
        if merged and (grid[a] - grid[merged[-1][1]]) < gap_pct:
            merged[-1][1] = b
        else:
            merged.append([a, b])
    return [(a, b) for a, b in merged]


def find_plateaus(
    q_pct: FloatArray, voltage_v: FloatArray, total_ah: float, settings: PlateauSettings
) -> PlateauAnalysis:
    """Plateaus of a discharge given as q (% of its capacity, rising) and V samples.

    ``total_ah`` converts lengths in % to Ah. Example: a curve at 3.3 V from 10 %
    to 90 % and steep elsewhere gives one plateau of about 80 % at 3.3 V.
    """
    grid, v = resample_uniform(
        np.asarray(q_pct, float), np.asarray(voltage_v, float), settings.grid_points
    )
    step = float(grid[1] - grid[0])
    window = odd_window(settings.smoothing_pct, step, settings.grid_points)
    smooth = savgol(v, window, SG_ORDER)
    slope_mv_per_pct = savgol(v, window, SG_ORDER, deriv=1, delta=step) * 1000.0
    flat = np.abs(slope_mv_per_pct) <= settings.flatness_mv_per_pct
    merged = merged_runs(flat, grid, settings.merge_gap_pct)
    plateaus = []
    for a, b in merged:
        start, end = float(grid[a]), float(grid[b])
        if end - start < settings.min_length_pct:
            continue
        plateaus.append(
            Plateau(
                start_pct=start,
                end_pct=end,
                voltage_v=median(v[a : b + 1]),
                length_ah=(end - start) / 100.0 * total_ah,
            )
        )
    ica, peaks = incremental_capacity(smooth, total_ah, settings)
    return PlateauAnalysis(tuple(plateaus), Curve(grid, v), ica, peaks)


def _capacity_below(edges_v: FloatArray, v: FloatArray, dq_ah: float) -> FloatArray:
    """Capacity of the curve below each voltage in ``edges_v`` (Ah), spread exactly by voltage.

    Each grid cell of the curve carries ``dq_ah`` spread evenly over the voltages it
    spans (a cell whose two ends share a voltage puts it all there). Counting whole
    cells into voltage bins instead would give each bin four or five cells by turns on a
    sloped curve: a regular ripple of about 20 % that is not in the cell.
    """
    low = np.minimum(v[:-1], v[1:])
    high = np.maximum(v[:-1], v[1:])
    span = high - low
    ramp = span > 1e-12
    slope = dq_ah / span[ramp]
    # the capacity below e is sum over ramps of slope * (clip(e, low, high) - low): a
    # piecewise-linear function with slope +s from each low and -s from each high
    at = np.concatenate((low[ramp], high[ramp]))
    weight = np.concatenate((slope, -slope))
    order = np.argsort(at, kind="stable")
    at, weight = at[order], weight[order]
    cum_w = np.concatenate(([0.0], np.cumsum(weight)))
    cum_wp = np.concatenate(([0.0], np.cumsum(weight * at)))
    k = np.searchsorted(at, edges_v, side="right")
    below = edges_v * cum_w[k] - cum_wp[k]
    steps = np.sort(low[~ramp])
    below += dq_ah * np.searchsorted(steps, edges_v, side="right")
    return below


def incremental_capacity(
    smooth_v: FloatArray, total_ah: float, settings: PlateauSettings
) -> tuple[Curve, tuple[float, ...]]:
    """dQ/dV (Ah/V) by voltage bins of ``ica_bin_mv`` from a smoothed V on a uniform q grid.

    Binning capacity by voltage, never dividing raw differences, is what keeps a
    flat plateau a finite peak instead of a spike (common practice); each grid cell's
    capacity is spread over the voltages it spans, so a sloped curve gives a smooth
    dQ/dV, not a ripple. A peak must stand above its own surroundings, within
    ICA_PEAK_WINDOW_MV on either side, by at least 5 % of the highest bin, one total
    capacity per volt (about 1 % of the capacity in 10 mV, so noise on a sloped curve
    makes none) and the rule set's absolute minimum, whichever is largest: the highest
    point of a broad hump (a sloped curve, or the bend into the cut-off) is no peak.
    Peaks are reported high voltage first.
    """
    n = len(smooth_v)
    dq_ah = total_ah / (n - 1)
    bin_v = settings.ica_bin_mv / 1000.0
    lo = np.floor(smooth_v.min() / bin_v) * bin_v
    hi = np.ceil(smooth_v.max() / bin_v) * bin_v
    nbins = max(int(round((hi - lo) / bin_v)), 1)
    edges = lo + np.arange(nbins + 1) * bin_v
    dqdv = np.diff(_capacity_below(edges, smooth_v, dq_ah)) / bin_v
    centres = lo + (np.arange(nbins) + 0.5) * bin_v
    if nbins >= 5:
        dqdv = savgol(dqdv, 5, 2).clip(min=0.0)
    top = float(dqdv.max()) if nbins else 0.0
    prominence = max(settings.ica_min_prominence_ah_per_v, 0.05 * top, total_ah * 1.0)
    window = 2 * max(1, int(round(ICA_PEAK_WINDOW_MV / settings.ica_bin_mv))) + 1
    found = find_peaks(np.concatenate(([0.0], dqdv, [0.0])), prominence_at_least=prominence, wlen=window)
    peaks = tuple(sorted((round(float(centres[i - 1]), 4) for i in found), reverse=True))
    return Curve(centres, np.asarray(dqdv, dtype=np.float64)), peaks
