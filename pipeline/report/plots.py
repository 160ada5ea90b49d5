"""The certificate's two grading plots as inline SVG text: numbers in, markup out.

The grading discharge V(q) with its plateaus shaded, and the incremental-capacity
curve dQ/dV(V) with its peaks marked. The drawing machinery (ticks, frames, axes) is
svgplot.py's; the evidence plots are evidence.py's. Placing the SVG on the page is the
template's business.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from pipeline.judge.thin import decimate
from pipeline.model import Curve, Plateau
from pipeline.report.svgplot import (
    BAND,
    BAND_LINE,
    FONT_MM,
    PEAK,
    POINTS_PER_MM,
    Frame,
    axes,
    finite,
    frame_for,
    n,
    no_data,
    open_svg,
    polyline,
    span,
    text,
)

__all__ = [
    "discharge_svg",
    "ica_svg",
    "marked_peaks",
    "peak_numbers",
]

MAX_MARKED_PEAKS = 10


def discharge_svg(
    curve: Curve | None, plateaus: Sequence[Plateau], *, width_mm: float, height_mm: float
) -> str:
    """Voltage (V, y) against discharged capacity (% of the grading discharge, x).

    Each plateau is a shaded band over its q range with its voltage as a dashed
    line and a label P1, P2, ... in order. ``curve`` may be None (nothing measured).
    """
    x, y = finite(curve)
    x_range = span(x, (0.0, 100.0), 0.0)
    if x.size:
        x_range = (min(x_range[0], 0.0), max(x_range[1], 100.0))
    levels = np.asarray([p.voltage_v for p in plateaus if math.isfinite(p.voltage_v)])
    y_range = span(np.concatenate((y, levels)), (2.0, 4.0), 0.04)
    frame = frame_for(width_mm, height_mm, x_range, y_range)
    parts = [open_svg(width_mm, height_mm, "discharge voltage against discharged capacity")]
    lo_x, hi_x = frame.x_ticks[0], frame.x_ticks[-1]
    for number, plateau in enumerate(plateaus, start=1):
        start = min(max(plateau.start_pct, lo_x), hi_x)
        end = min(max(plateau.end_pct, lo_x), hi_x)
        if not (math.isfinite(start) and math.isfinite(end)) or end <= start:
            continue
        x0, x1 = frame.px(start), frame.px(end)
        parts.append(
            f'<rect class="plateau" x="{n(x0)}" y="{n(frame.top)}" width="{n(x1 - x0)}" '
            f'height="{n(frame.height)}" fill="{BAND}"/>'
        )
        parts.append(
            text(
                (x0 + x1) / 2,
                frame.top + FONT_MM + 0.8,
                f"P{number}",
                extra=f' fill="{BAND_LINE}"',
            )
        )
        if math.isfinite(plateau.voltage_v):
            yv = frame.py(plateau.voltage_v)
            parts.append(
                f'<path class="plateau-level" d="M{n(x0)} {n(yv)}H{n(x1)}" '
                f'stroke="{BAND_LINE}" stroke-width="0.3" stroke-dasharray="1.2 0.8"/>'
            )
    parts.extend(axes(frame, "Discharged capacity (%)", "Voltage (V)"))
    if x.size >= 2:
        dx, dy = decimate(x, y, max(4, int(frame.width * POINTS_PER_MM)))
        parts.append(polyline(frame, dx, dy))
    else:
        parts.append(no_data(frame, "no grading discharge measured"))
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
    x, y = finite(curve)
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

    A peak is a dashed vertical line at its voltage with a small triangle on top and its
    number (:func:`peak_numbers`) under it; the certificate lists the voltages by number.
    Only the MAX_MARKED_PEAKS highest peaks are marked (see :func:`marked_peaks`).
    ``curve`` may be None (nothing measured).
    """
    x, y = finite(curve)
    if y.size and float(y.max()) > 0:
        # Smoothing leaves small negative wiggles at the ends of the range; they
        # would only push the axis below zero, so they are drawn as zero.
        y = np.where((y < 0) & (y > -0.02 * float(y.max())), 0.0, y)
    peaks = marked_peaks(curve, peaks_v)
    x_range = span(np.concatenate((x, np.asarray(peaks, dtype=np.float64))), (2.0, 4.0), 0.02)
    y_range = span(y, (0.0, 1.0), 0.0)
    y_range = (y_range[0], y_range[1] + 0.12 * (y_range[1] - y_range[0]))  # room for labels
    frame = frame_for(width_mm, height_mm, x_range, y_range)
    parts = [open_svg(width_mm, height_mm, "incremental capacity dQ/dV against voltage")]
    parts.extend(axes(frame, "Voltage (V)", "dQ/dV (Ah/V)"))
    if x.size >= 2:
        order = np.argsort(x, kind="stable")
        dx, dy = decimate(x[order], y[order], max(4, int(frame.width * POINTS_PER_MM)))
        parts.append(polyline(frame, dx, dy))
    else:
        parts.append(no_data(frame, "no dQ/dV curve measured"))
    bottom = frame.top + frame.height
    numbers = peak_numbers(peaks_v)
    for peak in peaks:
        xp = frame.px(peak)
        parts.append(
            f'<path class="peak" d="M{n(xp)} {n(frame.top + 1.6)}V{n(bottom)}" '
            f'stroke="{PEAK}" stroke-width="0.3" stroke-dasharray="0.8 0.8"/>'
        )
        parts.append(f'<path d="M{n(xp - 1.0)} {n(frame.top)}h2l-1 1.6z" fill="{PEAK}"/>')
    parts.extend(_numbered(frame, [(frame.px(p), numbers[p]) for p in peaks]))
    parts.append("</svg>")
    return "\n".join(parts)


def peak_numbers(peaks_v: Sequence[float]) -> dict[float, int]:
    """Each measured peak's number: its place (from 1) among the peaks found, in their order,
    as the certificate lists them under "dQ/dV peaks"."""
    numbers: dict[float, int] = {}
    for number, peak in enumerate((p for p in peaks_v if math.isfinite(p)), start=1):
        numbers.setdefault(peak, number)
    return numbers


def _numbered(frame: Frame, marks: list[tuple[float, int]]) -> list[str]:
    """Each peak's number under its triangle; a number that would touch the one before it in a
    row goes a row lower, so every marked peak is numbered and no two numbers overlap (the
    voltages are listed, numbered, beside the plot)."""
    row_ends: list[float] = []
    parts = []
    for xp, number in sorted(marks):
        body = str(number)
        width = FONT_MM * 0.62 * len(body) + 0.6
        x0 = xp - width / 2
        row = next((i for i, end in enumerate(row_ends) if x0 >= end), len(row_ends))
        if row == len(row_ends):
            row_ends.append(x0)
        row_ends[row] = x0 + width
        y = frame.top + 1.8 + FONT_MM * (row + 1)
        parts += [
            # a white outline first keeps the number readable over the curve
            text(xp, y, body,
                 extra=' class="peak-number" fill="#ffffff" stroke="#ffffff" stroke-width="0.6"'),
            text(xp, y, body, extra=f' class="peak-number" fill="{PEAK}"'),
        ]
    return parts
