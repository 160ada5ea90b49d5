"""The lot over time and by channel, drawn: control charts, capacity against DCIR, failures by
channel and by hour, and the by-channel table.

Pure: the lot's records (one per cycle file, :class:`pipeline.judge.channels.ChannelRecord`)
and cells in, SVG text and table rows out. The statistics are left to
:mod:`pipeline.judge.controlchart` and :mod:`pipeline.judge.channels`, the plot machinery
(frames, axes, text) to :mod:`pipeline.report.svgplot`, the page to
:mod:`pipeline.report.lotreport`. Every text from data is escaped here before the SVG is
marked safe; shapes as well as colours tell verdicts and lines apart.
"""

from __future__ import annotations

import html
import math
from collections import Counter
from collections.abc import Mapping, Sequence
from typing import Final

import numpy as np

from pipeline.judge.channels import (
    KEY_METRICS,
    OUT,
    ChannelRecord,
    ChannelScreen,
    MetricBias,
    channel_summaries,
    screen_channels,
)
from pipeline.judge.controlchart import BY_KEY, ControlChart, control_chart
from pipeline.judge.quantities import DASH
from pipeline.report.svgplot import (
    AXIS,
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

WIDE_MM: Final = 178.0
TALL_MM: Final = 52.0
HALF_MM: Final = 86.0
LABELS_MM: Final = 10.0  # below a bar chart's frame: its labels, turned, and its title under them
SIGNAL = "#b3261e"
LIMIT = "#8b2e2a"
VERDICT_STYLE: Final = {  # colour and shape: pass a dot, hold a square, fail a cross
    "pass": ("#1f4e79", "dot"),
    "hold": ("#b8860b", "square"),
    "fail": ("#b3261e", "cross"),
}
CAPACITY, DCIR = "grading_capacity_Ah", "dcir_mOhm"


def _marker(x: float, y: float, shape: str, colour: str, size: float = 0.7) -> str:
    if shape == "square":
        return (f'<rect x="{n(x - size)}" y="{n(y - size)}" width="{n(2 * size)}" height="{n(2 * size)}" '
                f'fill="{colour}"/>')
    if shape == "cross":
        return (f'<path d="M{n(x - size)} {n(y - size)}L{n(x + size)} {n(y + size)}M{n(x - size)} '
                f'{n(y + size)}L{n(x + size)} {n(y - size)}" stroke="{colour}" stroke-width="0.4"/>')
    return f'<circle cx="{n(x)}" cy="{n(y)}" r="{n(size * 0.75)}" fill="{colour}"/>'


def _hline(frame: Frame, y: float, colour: str, dashed: bool) -> str:
    dash = ' stroke-dasharray="1.4 0.9"' if dashed else ""
    return (f'<path d="M{n(frame.left)} {n(frame.py(y))}H{n(frame.left + frame.width)}" stroke="{colour}" '
            f'stroke-width="0.35"{dash}/>')


def control_chart_svg(chart: ControlChart, unit: str) -> str:
    """The chart: each value in test order (a gap for none), the centre line (solid), the
    3-sigma limits (dashed, labelled), a signalled point circled in red with its rules."""
    x = chart.values
    order = np.arange(1, x.size + 1, dtype=np.float64)
    measured = np.isfinite(x)
    label = f"{chart.metric} ({unit})" if unit else chart.metric
    lines = [v for v in (chart.centre, chart.lower, chart.upper) if v is not None]
    y_range = span(np.concatenate((x[measured], np.asarray(lines, dtype=np.float64))), (0.0, 1.0), 0.08)
    frame = frame_for(WIDE_MM, TALL_MM, (0.0, max(2.0, float(x.size))), y_range)
    parts = [open_svg(WIDE_MM, TALL_MM, html.escape(f"control chart of {label}", quote=True))]
    parts.extend(axes(frame, "cells in test order", html.escape(label)))
    if not measured.any():
        parts.append(no_data(frame, "no cell has a value"))
    runs: list[str] = []
    current: list[str] = []
    for i, v in zip(order.tolist(), x.tolist(), strict=True):
        if math.isfinite(v):
            current.append(f"{n(frame.px(i))} {n(frame.py(v))}")
        elif current:
            runs.append("M" + " L".join(current))
            current = []
    if current:
        runs.append("M" + " L".join(current))
    if runs:
        parts.append(f'<path d="{"".join(runs)}" fill="none" stroke="{AXIS}" stroke-width="0.2"/>')
    parts.extend(_marker(frame.px(i), frame.py(v), "dot", CURVE, 0.55)
                 for i, v in zip(order.tolist(), x.tolist(), strict=True) if math.isfinite(v))
    if chart.centre is not None:
        parts.append(_hline(frame, chart.centre, CURVE, False))
        parts.append(text(frame.left + frame.width - 0.8, frame.py(chart.centre) - 0.8, "centre", "end",
                          extra=f' fill="{CURVE}"'))
    for bound, word in ((chart.upper, "upper limit"), (chart.lower, "lower limit")):
        if bound is not None:
            parts.append(_hline(frame, bound, LIMIT, True))
            dy = -0.8 if word.startswith("upper") else FONT_MM
            parts.append(text(frame.left + frame.width - 0.8, frame.py(bound) + dy, word, "end",
                              extra=f' fill="{LIMIT}"'))
    by_point: dict[int, list[str]] = {}
    for s in chart.signals:
        by_point.setdefault(s.index, []).append(s.rule)
    for index, rules in sorted(by_point.items()):
        px, py = frame.px(index + 1.0), frame.py(float(x[index]))
        parts.append(f'<circle cx="{n(px)}" cy="{n(py)}" r="1.3" fill="none" stroke="{SIGNAL}" '
                     'stroke-width="0.35"/>')
        if len(by_point) <= 40:  # a few signals are named; many are left to the caption
            parts.append(text(px, py - 1.8, " ".join(rules), extra=f' fill="{SIGNAL}" font-size="1.8"'))
    parts.append("</svg>")
    return "\n".join(parts)


def scatter_svg(cells: Sequence[tuple[str, float | None, float | None]]) -> str:
    """Capacity against DCIR, one mark per cell (verdict, capacity, DCIR), by verdict."""
    shown = [(v, c, d) for v, c, d in cells if c is not None and d is not None
             and math.isfinite(c) and math.isfinite(d)]
    caps = np.array([c for _, c, _ in shown], dtype=np.float64)
    dcirs = np.array([d for _, _, d in shown], dtype=np.float64)
    frame = frame_for(HALF_MM, 64.0, span(dcirs, (0.0, 1.0), 0.06), span(caps, (0.0, 1.0), 0.1))
    parts = [open_svg(HALF_MM, 64.0, "grading capacity against DC resistance, by verdict")]
    parts.extend(axes(frame, f"{DCIR} (mOhm)", f"{CAPACITY} (Ah)"))
    if not shown:
        parts.append(no_data(frame, "no cell has both values"))
    for verdict, c, d in shown:
        colour, shape = VERDICT_STYLE.get(verdict, (AXIS, "dot"))
        parts.append(_marker(frame.px(d), frame.py(c), shape, colour))
    x0 = frame.left + 1.5
    for i, (verdict, (colour, shape)) in enumerate(VERDICT_STYLE.items()):
        y = frame.top + 2.2 + i * (FONT_MM + 0.6)
        parts.append(_marker(x0, y - FONT_MM * 0.3, shape, colour))
        parts.append(text(x0 + 1.8, y, verdict, "start", extra=f' fill="{colour}"'))
    parts.append("</svg>")
    return "\n".join(parts)


def bars_svg(labels: Sequence[str], counts: Sequence[int], x_label: str, aria: str) -> str:
    """Counts as bars, one per label (labels from data, escaped), every label shown if they fit."""
    k = len(labels)
    top = max(4.0, float(max(counts, default=0)) * 1.25)
    frame = frame_for(HALF_MM, 52.0, (0.0, float(max(k, 1))), (0.0, top))
    height = 52.0 + LABELS_MM
    parts = [open_svg(HALF_MM, height, html.escape(aria, quote=True))]
    parts.extend(axes(frame, html.escape(x_label), "Cells failed or held", x_labels=False))
    if not k:
        parts.append(no_data(frame, "no cell failed or was held"))
    width = frame.width / max(k, 1)
    every = max(1, math.ceil(k * 2.2 / frame.width * FONT_MM))  # skip labels that would touch
    for i, (label, count) in enumerate(zip(labels, counts, strict=True)):
        x0, y = frame.left + i * width + width * 0.15, frame.py(float(count))
        parts.append(f'<rect x="{n(x0)}" y="{n(y)}" width="{n(width * 0.7)}" '
                     f'height="{n(frame.py(0.0) - y)}" fill="#9fb6cc"/>')
        if i % every == 0:
            cx, cy = frame.left + (i + 0.5) * width, frame.top + frame.height + 1.2
            parts.append(text(cx, cy, html.escape(label), "end",
                              extra=f' transform="rotate(-60 {n(cx)} {n(cy)})" fill="#2b2b2b"'))
    parts.append(text(frame.left + frame.width / 2, height - 1.0, html.escape(x_label)))
    parts.append("</svg>")
    return "\n".join(parts)


def _in_order(records: Sequence[ChannelRecord]) -> list[ChannelRecord]:
    return sorted(records, key=lambda r: (r.order, r.cell_id))


def lot_control_charts(records: Sequence[ChannelRecord], units: Mapping[str, str],
                       metrics: Sequence[str] = KEY_METRICS) -> list[dict[str, object]]:
    """One chart per key metric with at least 2 values: its SVG, file name and caption."""
    ordered = _in_order(records)
    charts = []
    for metric in metrics:
        values = [r.values.get(metric) for r in ordered if metric in r.values]
        if sum(v is not None and math.isfinite(v) for v in values) < 2:
            continue
        chart = control_chart(metric, values)
        signals = Counter(s.rule for s in chart.signals)
        said = "; ".join(f"{BY_KEY[rule].words} ({BY_KEY[rule].source}): {count} point"
                         f"{'s' if count != 1 else ''}" for rule, count in signals.items())
        caption = (f"{metric}: {sum(np.isfinite(chart.values))} cells in test order; centre "
                   "(median) and limits (\N{PLUS-MINUS SIGN}3 sigma from the median moving range); "
                   + (f"circled, the points a run rule flags: {said}." if said else
                      "no run rule flags a point."))
        charts.append({"name": f"_chart-{metric}", "metric": metric,
                       "svg": control_chart_svg(chart, units.get(metric, "")), "caption": caption,
                       "signals": len(chart.flagged())})
    return charts


def failures_by_channel_svg(records: Sequence[ChannelRecord]) -> str:
    counts = Counter(r.channel or DASH for r in records if r.verdict in OUT)
    channels = sorted({r.channel or DASH for r in records})
    return bars_svg(channels, [counts[c] for c in channels], "channel", "cells failed or held by channel")


def failures_by_hour_svg(records: Sequence[ChannelRecord]) -> str:
    def hour(r: ChannelRecord) -> str:  # "03-02 08h" of "2026-03-02T08:14:00+00:00"
        return r.order[5:13].replace("T", " ") + "h" if len(r.order) >= 13 else DASH

    hours = sorted({hour(r) for r in records})
    counts = Counter(hour(r) for r in records if r.verdict in OUT)
    return bars_svg(hours, [counts[h] for h in hours], "hour the program started (UTC)",
                    "cells failed or held by the hour they started")


def _z(bias: MetricBias | None) -> str:
    return DASH if bias is None else f"{bias.z:+.1f}".replace("-", "\N{MINUS SIGN}")


def by_channel_rows(records: Sequence[ChannelRecord], screen: ChannelScreen) -> list[dict[str, str]]:
    """The by-channel table: one row per channel, suspect ones first, then by channel."""
    suspects = {s.key: s for s in screen_channels(records, screen)}
    rows = []
    for summary in channel_summaries(records, screen.metrics, screen.recent):
        biases = {b.metric: b for b in summary.biases}
        top = ", ".join(f"{check} {count}" for check, count in
                        sorted(summary.out_by_check.items(), key=lambda kv: (-kv[1], kv[0]))[:3])
        suspect = suspects.get(summary.key)
        rows.append({
            "channel": summary.key[1], "station": summary.key[0], "records": str(summary.records),
            "passed": str(summary.passed), "failed": str(summary.failed), "held": str(summary.held),
            "checks": top or DASH,
            "cap_z": _z(biases.get(CAPACITY)),
            "dcir_z": _z(biases.get(DCIR)),
            "recent": "".join({"pass": "\N{MIDDLE DOT}", "fail": "F", "hold": "H"}.get(v, "E")
                              for v in summary.recent),
            "suspect": "; ".join(e.text for e in suspect.evidence) if suspect else "",
            "advice": suspect.advice if suspect else "",
        })
    rows.sort(key=lambda r: (not r["suspect"], r["station"], r["channel"]))
    return rows


__all__ = [
    "bars_svg",
    "by_channel_rows",
    "control_chart_svg",
    "failures_by_channel_svg",
    "failures_by_hour_svg",
    "lot_control_charts",
    "scatter_svg",
]
