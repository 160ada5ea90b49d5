"""The lot report's histograms: one per checked metric, its bins and its SVG with the window and lot limits.

Bins follow the Freedman-Diaconis rule within bounds; the bars, the window (solid lines)
and the robust screen's lot limits (dashed) are SVG written here by hand from numbers,
every text in it escaped before it is marked safe. The plot machinery (frames, axes, text)
is left to :mod:`pipeline.report.svgplot`, the rest of the page to
:mod:`pipeline.report.lotreport`.
"""

from __future__ import annotations

import html
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Final

import numpy as np
from markupsafe import Markup

from pipeline.judge.lotscreens import RobustLimits
from pipeline.judge.lotstats import WindowSpec
from pipeline.model import FloatArray
from pipeline.report.svgplot import (
    CURVE,
    FONT_MM,
    Frame,
    axes,
    frame_for,
    n,
    no_data,
    open_svg,
    span,
    text,
)

# Histogram bins: the Freedman-Diaconis rule, kept within these bounds so that a tiny lot
# still shows a shape and a huge one does not turn into a comb.
MIN_BINS: Final = 5
MAX_BINS: Final = 40
PLOT_WIDTH_MM: Final = 86.0
PLOT_HEIGHT_MM: Final = 55.0
BAR = "#9fb6cc"  # no outline: on a lot of 10,000 cells a bar can be narrower than one
WINDOW_LINE = "#8b2e2a"
LIMIT_LINE = CURVE


def _finite(value: float | None) -> bool:
    return value is not None and math.isfinite(value)


def histogram_edges(values: FloatArray) -> FloatArray:
    """Bin edges for the measured ``values``: Freedman-Diaconis, clipped to 5..40 bins.

    The Freedman-Diaconis rule (Freedman & Diaconis 1981, "On the histogram as a density
    estimator: L2 theory") sets the bin width to 2·IQR·n^(-1/3), robust to the few wild
    values a lot of cells always has. numpy implements it; a count outside
    [MIN_BINS, MAX_BINS] (one bin when the IQR is zero, thousands when a few outliers
    stretch the range) is replaced by the nearest bound, with equal-width bins.

    >>> len(histogram_edges(np.arange(100.0))) - 1
    5
    """
    x = values[np.isfinite(values)]
    if x.size == 0:
        return np.linspace(0.0, 1.0, MIN_BINS + 1)
    edges: FloatArray = np.histogram_bin_edges(x, bins="fd")
    bins = len(edges) - 1
    if MIN_BINS <= bins <= MAX_BINS:
        return edges
    clipped: FloatArray = np.histogram_bin_edges(x, bins=min(max(bins, MIN_BINS), MAX_BINS))
    return clipped


@dataclass(frozen=True, slots=True)
class Marks:
    """The vertical lines a histogram draws: the window (solid) and the lot limits (dashed)."""

    window: tuple[float | None, float | None]
    limits: tuple[float | None, float | None]


def _vline(frame: Frame, x: float, colour: str, dashed: bool) -> str:
    dash = ' stroke-dasharray="1.4 0.9"' if dashed else ""
    return (
        f'<path class="{"limit" if dashed else "window"}" d="M{n(frame.px(x))} {n(frame.top)}'
        f'V{n(frame.top + frame.height)}" stroke="{colour}" stroke-width="0.4"{dash}/>'
    )


def _line_label(frame: Frame, x: float, word: str, colour: str, right_side: bool) -> list[str]:
    """``word`` written upwards along the line at ``x``, from the top, on one side of it.

    A white outline under the text keeps it readable where it crosses a bar.
    """
    xp = frame.px(x)
    lx = xp + 0.5 + FONT_MM * 0.8 if right_side else xp - 0.6
    ly = frame.top + 0.8
    rotate = f' transform="rotate(-90 {n(lx)} {n(ly)})"'
    return [
        text(lx, ly, word, "end", extra=f' fill="#ffffff" stroke="#ffffff" stroke-width="0.6"{rotate}'),
        text(lx, ly, word, "end", extra=f' fill="{colour}"{rotate}'),
    ]


def histogram_svg(
    values: FloatArray, edges: FloatArray, marks: Marks, *, x_label: str,
    width_mm: float = PLOT_WIDTH_MM, height_mm: float = PLOT_HEIGHT_MM,
) -> str:
    """Bars of the cells per bin, the window as solid lines, the lot limits as dashed ones.

    Each line is labelled "window" or "lot limits" along its top, on the side facing the
    middle of the window, so the meaning never rests on colour or dash alone. ``x_label``
    is escaped here.
    """
    x = values[np.isfinite(values)]
    counts = np.histogram(x, bins=edges)[0] if x.size else np.zeros(len(edges) - 1, dtype=np.int64)
    lines = [v for v in (*marks.window, *marks.limits) if _finite(v)]
    x_range = span(np.concatenate((edges, np.asarray(lines, dtype=np.float64))), (0.0, 1.0), 0.03)
    top = max(8.0, float(counts.max(initial=0)) * 1.5)  # headroom for the line labels
    frame = frame_for(width_mm, height_mm, x_range, (0.0, top))
    parts = [open_svg(width_mm, height_mm, html.escape(f"histogram of {x_label}", quote=True))]
    parts.extend(axes(frame, html.escape(x_label), "Cells"))
    base = frame.py(0.0)
    bars = []
    for count, left, right in zip(counts.tolist(), edges[:-1].tolist(), edges[1:].tolist(), strict=True):
        x0, x1, y = frame.px(left), frame.px(right), frame.py(float(count))
        bars.append(
            f'<rect class="bar" x="{n(x0)}" y="{n(y)}" width="{n(x1 - x0)}" height="{n(base - y)}" '
            f'fill="{BAR}"/>'
        )
    parts.extend(bars)
    if not x.size:
        parts.append(no_data(frame, "no cell has a value"))
    for pair, colour, dashed, word in (
        (marks.window, WINDOW_LINE, False, "window"),
        (marks.limits, LIMIT_LINE, True, "lot limits"),
    ):
        low, high = pair
        for bound, right_side in ((low, True), (high, False)):
            if bound is not None and math.isfinite(bound):
                parts.append(_vline(frame, bound, colour, dashed))
                parts.extend(_line_label(frame, bound, word, colour, right_side))
    parts.append("</svg>")
    return "\n".join(parts)


def _axis_label(metric: str, unit: str) -> str:
    return f"{metric} ({unit})" if unit else metric


def metric_histograms(
    checks: Sequence[WindowSpec],
    values: Sequence[Mapping[str, float | None]],
    limits_of_screens: Sequence[RobustLimits],
    units: Mapping[str, str],
) -> list[dict[str, object]]:
    """One histogram per checked metric, in the checks' order, over every cell with a value.

    ``values`` holds each cell's metric values; ``limits_of_screens`` are the lot's screens,
    whose applied limits are drawn as the lot limits.
    """
    screens = {limits.metric: limits for limits in limits_of_screens}
    shown = []
    for metric in dict.fromkeys(c.metric for c in checks):
        x = np.array([v.get(metric) for v in values], dtype=np.float64)
        x = x[np.isfinite(x)]
        edges = histogram_edges(x)
        on = [c for c in checks if c.metric == metric]
        lows = [c.low for c in on if c.low is not None]
        highs = [c.high for c in on if c.high is not None]
        window = (max(lows) if lows else None, min(highs) if highs else None)
        limits = screens.get(metric)
        lot_limits: tuple[float | None, float | None] = (None, None)
        if limits is not None and limits.applied:
            # a side the screen left to the window draws no second line on the window's own
            lot_limits = (limits.low if limits.low != window[0] else None,
                          limits.high if limits.high != window[1] else None)
        unit = units.get(metric, "")
        svg = histogram_svg(x, edges, Marks(window, lot_limits), x_label=_axis_label(metric, unit))
        words = [f"{x.size} cell{'s' if x.size != 1 else ''} with a value", f"{len(edges) - 1} bins"]
        lines = "solid lines: the window" if any(_finite(v) for v in window) else "no window"
        if any(_finite(v) for v in lot_limits):
            lines += "; dashed lines: the lot limits (robust screen)"
        shown.append({
            "metric": metric,
            "n": int(x.size),
            "bins": len(edges) - 1,
            "svg": Markup(svg),  # numbers and escaped text only: see histogram_svg
            "caption": f"{metric}: {', '.join(words)}; {lines}.",
        })
    return shown


__all__ = ["Marks", "histogram_edges", "histogram_svg", "metric_histograms"]
