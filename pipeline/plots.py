"""Draws the certificate's two plots as inline SVG text: numbers in, markup out.

The grading discharge V(q) with its plateaus shaded, and the incremental-capacity
curve dQ/dV(V) with its peaks marked. No plotting library: the SVG is written by
hand so the output is small, vector, deterministic to the byte, and carries no
text from the data file (only numbers formatted here). Placing the SVG on the
page is the template's business.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from pipeline.model import Curve, Plateau

FloatArray = npt.NDArray[np.float64]

# Must name the family that templates/certificate.css declares with @font-face,
# so the plots use the same shipped font as the page.
FONT_FAMILY = "Certificate Sans"

INK = "#2b2b2b"
AXIS = "#6b6b6b"
GRID = "#e2e2e2"
CURVE = "#1f4e79"
BAND = "#e3ece4"
BAND_LINE = "#4f7a57"
PEAK = "#8c4a1c"

MAX_MARKED_PEAKS = 10
POINTS_PER_MM = 3  # samples kept per mm of plot width: finer than print resolution needs
_FONT_MM = 2.5  # about 7 pt
_MARGIN_L, _MARGIN_R, _MARGIN_T, _MARGIN_B = 13.0, 3.0, 3.0, 9.5


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


def nice_ticks(low: float, high: float, max_ticks: int = 6) -> tuple[float, ...]:
    """Round tick values covering [low, high]: the finest step of 1, 2 or 5 times a power
    of ten that needs no more than ``max_ticks`` ticks.

    >>> nice_ticks(0.0, 100.0)
    (0.0, 20.0, 40.0, 60.0, 80.0, 100.0)
    >>> nice_ticks(2.46, 3.53, max_ticks=7)
    (2.4, 2.6, 2.8, 3.0, 3.2, 3.4, 3.6)
    """
    if not (math.isfinite(low) and math.isfinite(high)) or high <= low:
        raise ValueError(f"cannot place ticks on [{low}, {high}]")
    if max_ticks < 3:  # a range around zero needs three: -step, 0, step
        raise ValueError(f"max_ticks must be at least 3, got {max_ticks}")
    exponent = math.floor(math.log10((high - low) / max_ticks))
    while True:
        for mantissa in (1, 2, 5):
            step = mantissa * 10.0**exponent
            first = math.floor(low / step + 1e-9)
            last = math.ceil(high / step - 1e-9)
            if last - first + 1 <= max_ticks:
                decimals = max(0, 1 - exponent)
                return tuple(round(k * step, decimals) + 0.0 for k in range(first, last + 1))
        exponent += 1


def tick_label(value: float, step: float) -> str:
    """Format a tick value with just the decimals its step needs, with a true minus sign."""
    decimals = max(0, -math.floor(math.log10(step) + 1e-9))
    text = f"{value:.{decimals}f}"
    if text.startswith("-"):
        text = "\N{MINUS SIGN}" + text[1:] if float(text) != 0 else text[1:]
    return text


@dataclass(frozen=True, slots=True)
class _Frame:
    """Maps data coordinates to mm inside the plot area (y grows downwards in SVG)."""

    left: float
    top: float
    width: float
    height: float
    x_ticks: tuple[float, ...]
    y_ticks: tuple[float, ...]

    def px(self, x: float) -> float:
        lo, hi = self.x_ticks[0], self.x_ticks[-1]
        return self.left + (x - lo) / (hi - lo) * self.width

    def py(self, y: float) -> float:
        lo, hi = self.y_ticks[0], self.y_ticks[-1]
        return self.top + self.height - (y - lo) / (hi - lo) * self.height


def _n(value: float) -> str:
    """A coordinate in mm, to 0.01 mm, never '-0.00'."""
    text = f"{value:.2f}"
    return "0.00" if text == "-0.00" else text


def _span(values: FloatArray, fallback: tuple[float, float], pad: float) -> tuple[float, float]:
    if values.size == 0:
        return fallback
    low, high = float(values.min()), float(values.max())
    if high - low < 1e-9:
        half = max(abs(low) * 0.05, 0.5)
        return low - half, high + half
    margin = (high - low) * pad
    return low - margin, high + margin


def _frame(
    width_mm: float, height_mm: float, x_range: tuple[float, float], y_range: tuple[float, float]
) -> _Frame:
    plot_w = width_mm - _MARGIN_L - _MARGIN_R
    plot_h = height_mm - _MARGIN_T - _MARGIN_B
    if plot_w <= 10 or plot_h <= 10:
        raise ValueError(f"a {width_mm} x {height_mm} mm plot leaves no room for the axes")
    return _Frame(
        _MARGIN_L,
        _MARGIN_T,
        plot_w,
        plot_h,
        nice_ticks(*x_range, max_ticks=max(3, int(plot_w // 9.5))),
        nice_ticks(*y_range, max_ticks=max(3, int(plot_h // 5))),
    )


def _text(x: float, y: float, body: str, anchor: str = "middle", extra: str = "") -> str:
    return f'<text x="{_n(x)}" y="{_n(y)}" text-anchor="{anchor}"{extra}>{body}</text>'


def _axes(frame: _Frame, x_label: str, y_label: str) -> list[str]:
    """Grid, frame, ticks with labels and the two axis titles.

    The grid lines are one path and the tick marks another (one subpath per line):
    the same strokes as a path per line, in a fraction of the renderer's work.
    """
    bottom = frame.top + frame.height
    right = frame.left + frame.width
    grid = [f"M{_n(frame.px(t))} {_n(frame.top)}V{_n(bottom)}" for t in frame.x_ticks[1:-1]]
    grid += [f"M{_n(frame.left)} {_n(frame.py(t))}H{_n(right)}" for t in frame.y_ticks[1:-1]]
    parts = [f'<path d="{"".join(grid)}" stroke="{GRID}" stroke-width="0.15"/>'] if grid else []
    parts.append(
        f'<rect x="{_n(frame.left)}" y="{_n(frame.top)}" width="{_n(frame.width)}" '
        f'height="{_n(frame.height)}" fill="none" stroke="{AXIS}" stroke-width="0.25"/>'
    )
    ticks = [f"M{_n(frame.px(t))} {_n(bottom)}v1" for t in frame.x_ticks]
    ticks += [f"M{_n(frame.left)} {_n(frame.py(t))}h-1" for t in frame.y_ticks]
    parts.append(f'<path d="{"".join(ticks)}" stroke="{AXIS}" stroke-width="0.25"/>')
    x_step = frame.x_ticks[1] - frame.x_ticks[0]
    y_step = frame.y_ticks[1] - frame.y_ticks[0]
    parts.append(f'<g fill="{INK}">')
    for t in frame.x_ticks:
        parts.append(_text(frame.px(t), bottom + 1.2 + _FONT_MM, tick_label(t, x_step)))
    for t in frame.y_ticks:
        y = frame.py(t) + _FONT_MM * 0.35
        parts.append(_text(frame.left - 1.6, y, tick_label(t, y_step), "end"))
    label_y = bottom + 2.6 + 2 * _FONT_MM
    parts.append(_text(frame.left + frame.width / 2, label_y, x_label))
    cx, cy = 2.0 + _FONT_MM * 0.5, frame.top + frame.height / 2
    parts.append(_text(cx, cy, y_label, extra=f' transform="rotate(-90 {_n(cx)} {_n(cy)})"'))
    parts.append("</g>")
    return parts


def _polyline(frame: _Frame, x: FloatArray, y: FloatArray) -> str:
    if x.size < 2:
        return ""
    points = " ".join(f"{_n(frame.px(a))} {_n(frame.py(b))}" for a, b in zip(x, y, strict=True))
    return (
        f'<path class="curve" d="M{points}" '
        f'fill="none" stroke="{CURVE}" stroke-width="0.35" stroke-linejoin="round"/>'
    )


def _open_svg(width_mm: float, height_mm: float, label: str) -> str:
    return (
        f'<svg xmlns="http://www.w3.org/2000/svg" width="{_n(width_mm)}mm" '
        f'height="{_n(height_mm)}mm" viewBox="0 0 {_n(width_mm)} {_n(height_mm)}" '
        f'font-family="{FONT_FAMILY}" font-size="{_FONT_MM}" role="img" aria-label="{label}">'
    )


def _finite(curve: Curve | None) -> tuple[FloatArray, FloatArray]:
    if curve is None:
        return np.empty(0), np.empty(0)
    keep = np.isfinite(curve.x) & np.isfinite(curve.y)
    return np.asarray(curve.x[keep], dtype=np.float64), np.asarray(curve.y[keep], dtype=np.float64)


def _no_data(frame: _Frame, text: str) -> str:
    return _text(
        frame.left + frame.width / 2, frame.top + frame.height / 2, text, extra=f' fill="{AXIS}"'
    )


def _peak_label(
    frame: _Frame, xp: float, peak_v: float, taken: list[tuple[float, float]]
) -> list[str]:
    """A peak's voltage written upwards beside its line, on whichever side is free.

    ``taken`` holds the x intervals already used by lines and labels; a label that
    fits on neither side is left out (the voltages are listed beside the plot).
    """
    width = _FONT_MM * 1.05
    for left_side in (True, False):
        x0 = xp - 0.5 - width if left_side else xp + 0.5
        span = (x0, x0 + width)
        inside = frame.left <= span[0] and span[1] <= frame.left + frame.width
        if inside and all(span[1] <= a or b <= span[0] for a, b in taken if (a, b) != span):
            taken.append(span)
            lx, ly = span[1] - 0.55, frame.top + 2.4
            rotate = f' transform="rotate(-90 {_n(lx)} {_n(ly)})"'
            body = f"{peak_v:.3f} V"
            return [
                # a white outline first keeps the label readable over the curve
                _text(
                    lx,
                    ly,
                    body,
                    "end",
                    extra=f' fill="#ffffff" stroke="#ffffff" stroke-width="0.6"{rotate}',
                ),
                _text(lx, ly, body, "end", extra=f' fill="{PEAK}"{rotate}'),
            ]
    return []


def discharge_svg(
    curve: Curve | None, plateaus: Sequence[Plateau], *, width_mm: float, height_mm: float
) -> str:
    """Voltage (V, y) against discharged capacity (% of the grading discharge, x).

    Each plateau is a shaded band over its q range with its voltage as a dashed
    line and a label P1, P2, ... in order. ``curve`` may be None (nothing measured).
    """
    x, y = _finite(curve)
    x_range = _span(x, (0.0, 100.0), 0.0)
    if x.size:
        x_range = (min(x_range[0], 0.0), max(x_range[1], 100.0))
    levels = np.asarray([p.voltage_v for p in plateaus if math.isfinite(p.voltage_v)])
    y_range = _span(np.concatenate((y, levels)), (2.0, 4.0), 0.04)
    frame = _frame(width_mm, height_mm, x_range, y_range)
    parts = [_open_svg(width_mm, height_mm, "discharge voltage against discharged capacity")]
    lo_x, hi_x = frame.x_ticks[0], frame.x_ticks[-1]
    for number, plateau in enumerate(plateaus, start=1):
        start = min(max(plateau.start_pct, lo_x), hi_x)
        end = min(max(plateau.end_pct, lo_x), hi_x)
        if not (math.isfinite(start) and math.isfinite(end)) or end <= start:
            continue
        x0, x1 = frame.px(start), frame.px(end)
        parts.append(
            f'<rect class="plateau" x="{_n(x0)}" y="{_n(frame.top)}" width="{_n(x1 - x0)}" '
            f'height="{_n(frame.height)}" fill="{BAND}"/>'
        )
        parts.append(
            _text(
                (x0 + x1) / 2,
                frame.top + _FONT_MM + 0.8,
                f"P{number}",
                extra=f' fill="{BAND_LINE}"',
            )
        )
        if math.isfinite(plateau.voltage_v):
            yv = frame.py(plateau.voltage_v)
            parts.append(
                f'<path class="plateau-level" d="M{_n(x0)} {_n(yv)}H{_n(x1)}" '
                f'stroke="{BAND_LINE}" stroke-width="0.3" stroke-dasharray="1.2 0.8"/>'
            )
    parts.extend(_axes(frame, "Discharged capacity (%)", "Voltage (V)"))
    if x.size >= 2:
        dx, dy = decimate(x, y, max(4, int(frame.width * POINTS_PER_MM)))
        parts.append(_polyline(frame, dx, dy))
    else:
        parts.append(_no_data(frame, "no grading discharge measured"))
    parts.append("</svg>")
    return "\n".join(parts)


def marked_peaks(curve: Curve | None, peaks_v: Sequence[float]) -> tuple[float, ...]:
    """The peaks the dQ/dV plot marks: the MAX_MARKED_PEAKS highest, in their given order.

    A featureless or noisy curve can yield dozens of peaks; marking them all
    would hide the curve. Height is the curve's dQ/dV at the peak voltage.
    """
    peaks = [p for p in peaks_v if math.isfinite(p)]
    if len(peaks) <= MAX_MARKED_PEAKS:
        return tuple(peaks)
    x, y = _finite(curve)
    if x.size:
        order = np.argsort(x, kind="stable")
        heights = np.interp(peaks, x[order], y[order])
    else:
        heights = np.zeros(len(peaks))
    ranked = sorted(range(len(peaks)), key=lambda i: (-float(heights[i]), i))
    keep = set(ranked[:MAX_MARKED_PEAKS])
    return tuple(p for i, p in enumerate(peaks) if i in keep)


def ica_svg(
    curve: Curve | None, peaks_v: Sequence[float], *, width_mm: float, height_mm: float
) -> str:
    """Incremental capacity dQ/dV (Ah/V, y) against voltage (V, x), its peaks marked.

    A peak is a dashed vertical line at its voltage with a small triangle on top
    and its voltage written beside it. Only the MAX_MARKED_PEAKS highest peaks are
    marked (see :func:`marked_peaks`). ``curve`` may be None (nothing measured).
    """
    x, y = _finite(curve)
    if y.size and float(y.max()) > 0:
        # Smoothing leaves small negative wiggles at the ends of the range; they
        # would only push the axis below zero, so they are drawn as zero.
        y = np.where((y < 0) & (y > -0.02 * float(y.max())), 0.0, y)
    peaks = marked_peaks(curve, peaks_v)
    x_range = _span(np.concatenate((x, np.asarray(peaks, dtype=np.float64))), (2.0, 4.0), 0.02)
    y_range = _span(y, (0.0, 1.0), 0.0)
    y_range = (y_range[0], y_range[1] + 0.12 * (y_range[1] - y_range[0]))  # room for labels
    frame = _frame(width_mm, height_mm, x_range, y_range)
    parts = [_open_svg(width_mm, height_mm, "incremental capacity dQ/dV against voltage")]
    parts.extend(_axes(frame, "Voltage (V)", "dQ/dV (Ah/V)"))
    if x.size >= 2:
        order = np.argsort(x, kind="stable")
        dx, dy = decimate(x[order], y[order], max(4, int(frame.width * POINTS_PER_MM)))
        parts.append(_polyline(frame, dx, dy))
    else:
        parts.append(_no_data(frame, "no dQ/dV curve measured"))
    bottom = frame.top + frame.height
    marks = sorted(frame.px(p) for p in peaks)
    taken: list[tuple[float, float]] = [(m - 0.3, m + 0.3) for m in marks]
    for peak in peaks:
        xp = frame.px(peak)
        parts.append(
            f'<path class="peak" d="M{_n(xp)} {_n(frame.top + 1.6)}V{_n(bottom)}" '
            f'stroke="{PEAK}" stroke-width="0.3" stroke-dasharray="0.8 0.8"/>'
        )
        parts.append(f'<path d="M{_n(xp - 1.0)} {_n(frame.top)}h2l-1 1.6z" fill="{PEAK}"/>')
        parts.extend(_peak_label(frame, xp, peak, taken))
    parts.append("</svg>")
    return "\n".join(parts)
