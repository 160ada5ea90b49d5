"""The machinery of the certificate's hand-written SVG plots: ticks, frames, axes, paths.

Pure: numbers in, markup out. No plotting library: the SVG is written by hand so the
output is small, vector, deterministic to the byte, and carries no text from the data
file (only numbers formatted here). The plots themselves are plots.py (grading
discharge, dQ/dV) and evidence.py (the whole record, and the plot behind a failed check).
"""

from __future__ import annotations

import functools
import html
import math
from dataclasses import dataclass

import numpy as np

from pipeline.judge.thin import FloatArray
from pipeline.model import Curve
from pipeline.shipped import TEMPLATES_DIR

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

POINTS_PER_MM = 3  # samples kept per mm of plot width: finer than print resolution needs
FONT_MM = 2.5  # about 7 pt
MARGIN_L, MARGIN_R, MARGIN_T, MARGIN_B = 13.0, 3.0, 3.0, 9.5


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
    label = f"{value:.{decimals}f}"
    if label.startswith("-"):
        label = "\N{MINUS SIGN}" + label[1:] if float(label) != 0 else label[1:]
    return label


@dataclass(frozen=True, slots=True)
class Frame:
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


def n(value: float) -> str:
    """A coordinate in mm, to 0.01 mm, never '-0.00'."""
    out = f"{value:.2f}"
    return "0.00" if out == "-0.00" else out


def span(values: FloatArray, fallback: tuple[float, float], pad: float) -> tuple[float, float]:
    if values.size == 0:
        return fallback
    low, high = float(values.min()), float(values.max())
    if high - low < 1e-9:
        half = max(abs(low) * 0.05, 0.5)
        return low - half, high + half
    margin = (high - low) * pad
    return low - margin, high + margin


def frame_for(
    width_mm: float, height_mm: float, x_range: tuple[float, float], y_range: tuple[float, float]
) -> Frame:
    plot_w = width_mm - MARGIN_L - MARGIN_R
    plot_h = height_mm - MARGIN_T - MARGIN_B
    if plot_w <= 10 or plot_h <= 10:
        raise ValueError(f"a {width_mm} x {height_mm} mm plot leaves no room for the axes")
    return Frame(
        MARGIN_L,
        MARGIN_T,
        plot_w,
        plot_h,
        nice_ticks(*x_range, max_ticks=max(3, int(plot_w // 9.5))),
        nice_ticks(*y_range, max_ticks=max(3, int(plot_h // 5))),
    )


def text(x: float, y: float, body: str, anchor: str = "middle", extra: str = "") -> str:
    """A label at (x, y), its middle, end or start there as ``anchor`` says.

    A label in the plots' own size whose every character the shipped font holds is written
    from where it starts (:func:`label_width`): the renderer draws a middle- or end-anchored
    label into a group of its own, measures it and then moves it, which cost a group and a
    PDF stream per label. The label lands where the renderer would have moved it, to a
    millionth of a mm.
    """
    if anchor != "start" and "font-size" not in extra:
        width = label_width(body)
        if width is not None:
            start = float(n(x)) - (width / 2 if anchor == "middle" else width)
            return f'<text x="{start:.6f}" y="{n(y)}"{extra}>{body}</text>'
    return f'<text x="{n(x)}" y="{n(y)}" text-anchor="{anchor}"{extra}>{body}</text>'


# The renderer lays a label out with HarfBuzz at the font size in Pango units (1/1024 of a
# user unit, here a mm), each letter's advance rounded half up to a whole unit; the shipped
# font has no kerning and no ligatures (templates/fonts/make_font.py), so a label's width is
# the sum of its letters' advances, to the unit.
PANGO_UNITS = 1024
FONT_FILE = TEMPLATES_DIR / "fonts" / "CertificateSans.ttf"


@functools.lru_cache(maxsize=1)
def _advances() -> dict[str, int]:
    """Each character of the shipped font -> its advance at FONT_MM, in Pango units."""
    from fontTools.ttLib import TTFont  # installed with WeasyPrint; only a plot label needs it

    with TTFont(FONT_FILE, lazy=True) as font:
        em = font["head"].unitsPerEm
        metrics = font["hmtx"]
        return {
            chr(code): math.floor(metrics[glyph][0] * FONT_MM * PANGO_UNITS / em + 0.5)
            for code, glyph in font.getBestCmap().items()
        }


def label_width(body: str) -> float | None:
    """How wide the renderer sets ``body`` (SVG text, entities allowed) at FONT_MM, in mm;
    None when the shipped font lacks one of its characters (another font would set it)."""
    if "<" in body:
        return None
    advances = _advances()
    try:
        return sum(advances[c] for c in html.unescape(body)) / PANGO_UNITS
    except KeyError:
        return None


def axes(frame: Frame, x_label: str, y_label: str, *, x_labels: bool = True) -> list[str]:
    """Grid, frame, ticks with labels and the two axis titles.

    ``x_labels`` False leaves out the x tick labels and title, for a panel stacked
    above another that shares its x axis.

    The grid lines are one path and the tick marks another (one subpath per line):
    the same strokes as a path per line, in a fraction of the renderer's work.
    """
    bottom = frame.top + frame.height
    right = frame.left + frame.width
    grid = [f"M{n(frame.px(t))} {n(frame.top)}V{n(bottom)}" for t in frame.x_ticks[1:-1]]
    grid += [f"M{n(frame.left)} {n(frame.py(t))}H{n(right)}" for t in frame.y_ticks[1:-1]]
    parts = [f'<path d="{"".join(grid)}" stroke="{GRID}" stroke-width="0.15"/>'] if grid else []
    parts.append(
        f'<rect x="{n(frame.left)}" y="{n(frame.top)}" width="{n(frame.width)}" '
        f'height="{n(frame.height)}" fill="none" stroke="{AXIS}" stroke-width="0.25"/>'
    )
    ticks = [f"M{n(frame.px(t))} {n(bottom)}v1" for t in frame.x_ticks]
    ticks += [f"M{n(frame.left)} {n(frame.py(t))}h-1" for t in frame.y_ticks]
    parts.append(f'<path d="{"".join(ticks)}" stroke="{AXIS}" stroke-width="0.25"/>')
    x_step = frame.x_ticks[1] - frame.x_ticks[0]
    y_step = frame.y_ticks[1] - frame.y_ticks[0]
    parts.append(f'<g fill="{INK}">')
    if x_labels:
        for t in frame.x_ticks:
            parts.append(text(frame.px(t), bottom + 1.2 + FONT_MM, tick_label(t, x_step)))
    for t in frame.y_ticks:
        y = frame.py(t) + FONT_MM * 0.35
        parts.append(text(frame.left - 1.6, y, tick_label(t, y_step), "end"))
    if x_labels:
        label_y = bottom + 2.6 + 2 * FONT_MM
        parts.append(text(frame.left + frame.width / 2, label_y, x_label))
    cx, cy = 2.0 + FONT_MM * 0.5, frame.top + frame.height / 2
    parts.append(text(cx, cy, y_label, extra=f' transform="rotate(-90 {n(cx)} {n(cy)})"'))
    parts.append("</g>")
    return parts


# A point of a curve that lies closer than this to the line its neighbours draw is left out:
# under a dot of a 600 dpi printer (0.042 mm) and a tenth of the thinnest stroke, so the
# printed curve is the same, while its renderer reads, maps and writes each point it is given.
INVISIBLE_MM = 0.02


def simplify(points: FloatArray, tolerance: float = INVISIBLE_MM) -> FloatArray:
    """The (n, 2) polyline ``points`` without the points that lie within ``tolerance`` of the
    chord between the points kept around them (Ramer-Douglas-Peucker); ends always kept.

    Which points a span keeps depends only on its two ends, never on the order spans are
    looked at, so every span of one generation is looked at in one pass of array arithmetic
    (a noisy curve of a thousand points splits into hundreds of spans, each a Python loop
    round with its own small arrays before). Each distance is the same arithmetic as one span
    at a time: the chord's length by ``math.hypot``, the cross product, then the division.

    >>> simplify(np.array([[0.0, 0.0], [1.0, 0.01], [2.0, 0.0], [3.0, 1.0]])).tolist()
    [[0.0, 0.0], [2.0, 0.0], [3.0, 1.0]]
    """
    count = len(points)
    if count < 3:
        return points
    keep = np.zeros(count, dtype=bool)
    keep[0] = keep[-1] = True
    firsts, lasts = np.array([0]), np.array([count - 1])
    while True:
        inner = lasts - firsts - 1  # points strictly inside each span
        split = inner > 0
        firsts, lasts, inner = firsts[split], lasts[split], inner[split]
        if firsts.size == 0:
            return points[keep]
        starts = np.cumsum(inner) - inner  # where each span's points begin in the pass
        span = np.repeat(np.arange(firsts.size), inner)  # the span of each point in the pass
        index = np.arange(span.size) - starts[span] + firsts[span] + 1
        chords = points[lasts] - points[firsts]
        offsets = points[index] - points[firsts][span]
        lengths = np.array([math.hypot(x, y) for x, y in chords.tolist()])
        cx, cy = chords[span, 0], chords[span, 1]
        with np.errstate(divide="ignore", invalid="ignore"):
            distance = np.abs(cx * offsets[:, 1] - cy * offsets[:, 0]) / lengths[span]
        closed = lengths[span] == 0  # a span that comes back to its start: distance from it
        distance[closed] = np.hypot(offsets[closed, 0], offsets[closed, 1])
        worst = np.maximum.reduceat(distance, starts)
        # the first point at its span's largest distance, as np.argmax picks it
        at_worst = np.where(distance == worst[span], np.arange(span.size), span.size)
        middle = index[np.minimum.reduceat(at_worst, starts)]
        far = worst > tolerance
        middle, firsts, lasts = middle[far], firsts[far], lasts[far]
        keep[middle] = True
        firsts, lasts = np.concatenate((firsts, middle)), np.concatenate((middle, lasts))


def polyline(frame: Frame, x: FloatArray, y: FloatArray) -> str:
    if x.size < 2:
        return ""
    lo_x, hi_x = frame.x_ticks[0], frame.x_ticks[-1]
    lo_y, hi_y = frame.y_ticks[0], frame.y_ticks[-1]
    mm = np.column_stack((
        frame.left + (x - lo_x) / (hi_x - lo_x) * frame.width,
        frame.top + frame.height - (y - lo_y) / (hi_y - lo_y) * frame.height,
    ))
    points = " ".join(f"{n(a)} {n(b)}" for a, b in simplify(mm).tolist())
    return (
        f'<path class="curve" d="M{points}" '
        f'fill="none" stroke="{CURVE}" stroke-width="0.35" stroke-linejoin="round"/>'
    )


def open_svg(width_mm: float, height_mm: float, label: str) -> str:
    return (
        f'<svg xmlns="http://www.w3.org/2000/svg" width="{n(width_mm)}mm" '
        f'height="{n(height_mm)}mm" viewBox="0 0 {n(width_mm)} {n(height_mm)}" '
        f'font-family="{FONT_FAMILY}" font-size="{FONT_MM}" role="img" aria-label="{label}">'
    )


def finite(curve: Curve | None) -> tuple[FloatArray, FloatArray]:
    if curve is None:
        return np.empty(0), np.empty(0)
    keep = np.isfinite(curve.x) & np.isfinite(curve.y)
    return np.asarray(curve.x[keep], dtype=np.float64), np.asarray(curve.y[keep], dtype=np.float64)


def no_data(frame: Frame, message: str) -> str:
    return text(
        frame.left + frame.width / 2, frame.top + frame.height / 2, message, extra=f' fill="{AXIS}"'
    )
