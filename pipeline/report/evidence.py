"""The certificate's evidence plots: the whole record, and the plot that shows a failed check.

Pure: measured views and windows in, SVG text out (numbers only; see svgplot.py).
- :func:`record_svg`: voltage, current and temperature against time, the program's
  steps shaded (charge and discharge; rest left white);
- :func:`drift_svg`: the final rest with its drift fit and the limit the fit crossed;
- :func:`temperature_svg`: the temperature trace with its limit;
- :func:`cycles_svg`: each cycle's charge and discharge capacity, with the window of the
  capacity or efficiency check that failed.
Choosing which of them a certificate shows is certificate.py's job.
"""

from __future__ import annotations

import numpy as np

from pipeline.acceptance.rules import Window
from pipeline.judge.thin import FloatArray, decimate
from pipeline.model import Curve, CycleMetrics, PulseView, RecordView, RestView, StepKind
from pipeline.report.svgplot import (
    AXIS,
    CURVE,
    FONT_MM,
    INK,
    MARGIN_L,
    MARGIN_R,
    PEAK,
    POINTS_PER_MM,
    Frame,
    axes,
    finite,
    frame_for,
    n,
    nice_ticks,
    no_data,
    open_svg,
    polyline,
    span,
    text,
)

CHARGE_SHADE = "#eef3ea"  # steps in which the cell charged
DISCHARGE_SHADE = "#eaf0f6"  # steps in which it discharged
LIMIT = PEAK  # the window's bound a failed check crossed
FIT = CURVE
MEASURED = "#9bb7d4"
_SHADES = {StepKind.CHARGE: CHARGE_SHADE, StepKind.DISCHARGE: DISCHARGE_SHADE}


def _step_shading(frame: Frame, view: RecordView) -> list[str]:
    """One path per step kind: the spans of its steps as rectangles over the panel."""
    parts = []
    lo, hi = frame.x_ticks[0], frame.x_ticks[-1]
    for kind, colour in _SHADES.items():
        rects = []
        for step in view.steps:
            if step.kind is not kind:
                continue
            a, b = max(step.start_h, lo), min(step.end_h, hi)
            if b > a:
                x0, x1 = frame.px(a), frame.px(b)
                rects.append(f"M{n(x0)} {n(frame.top)}H{n(x1)}V{n(frame.top + frame.height)}H{n(x0)}z")
        if rects:
            parts.append(f'<path class="steps-{kind.value}" d="{"".join(rects)}" fill="{colour}"/>')
    return parts


def _panel(frame: Frame, view: RecordView, curve: Curve, y_label: str, *, bottom: bool) -> list[str]:
    parts = _step_shading(frame, view)
    parts += axes(frame, "Time since the record began (h)", y_label, x_labels=bottom)
    x, y = finite(curve)
    dx, dy = decimate(x, y, max(4, int(frame.width * POINTS_PER_MM)))
    parts.append(polyline(frame, dx, dy))
    return parts


def _nothing_to_draw(
    parts: list[str], width_mm: float, height_mm: float, x_label: str, y_label: str, message: str
) -> str:
    """An evidence plot with nothing measured to draw: its axes and the message, closed."""
    frame = frame_for(width_mm, height_mm, (0.0, 1.0), (0.0, 1.0))
    return "\n".join([*parts, *axes(frame, x_label, y_label), no_data(frame, message), "</svg>"])


def record_svg(view: RecordView | None, *, width_mm: float, height_mm: float) -> str:
    """Voltage, current and (when measured) temperature against time, stacked, steps shaded."""
    parts = [open_svg(width_mm, height_mm, "the whole record: voltage, current and temperature")]
    if view is None or view.voltage.x.size < 2:
        return _nothing_to_draw(parts, width_mm, height_mm, "Time since the record began (h)",
                                "", "no record to draw")
    panels = [(view.voltage, "V (V)"), (view.current, "I (A)")]
    if view.temperature is not None and view.temperature.x.size >= 2:
        panels.append((view.temperature, "T (°C)"))
    top, gap, bottom_room = 2.0, 3.0, 9.5
    height = (height_mm - top - bottom_room - gap * (len(panels) - 1)) / len(panels)
    width = width_mm - MARGIN_L - MARGIN_R
    x_range = span(np.asarray(view.voltage.x), (0.0, 1.0), 0.0)
    x_ticks = nice_ticks(*x_range, max_ticks=max(3, int(width // 12)))
    for k, (curve, label) in enumerate(panels):
        _, y = finite(curve)
        y_ticks = nice_ticks(*span(y, (0.0, 1.0), 0.06), max_ticks=max(3, int(height // 5)))
        frame = Frame(MARGIN_L, top + k * (height + gap), width, height, x_ticks, y_ticks)
        parts += _panel(frame, view, curve, label, bottom=k == len(panels) - 1)
    parts.append("</svg>")
    return "\n".join(parts)


def _limit_label(
    frame: Frame, x: float, y: float, body: str, colour: str = LIMIT, anchor: str = "end"
) -> list[str]:
    """A label over a line: a white outline first keeps it readable over the curve."""
    halo = ' fill="#ffffff" stroke="#ffffff" stroke-width="0.7"'
    return [
        text(x, y - 0.8, body, anchor, extra=halo),
        text(x, y - 0.8, body, anchor, extra=f' fill="{colour}"'),
    ]


def _measured(frame: Frame, x: FloatArray, y: FloatArray) -> str:
    """A noisy measured trace drawn light, so the fit and the limit over it stay visible."""
    dx, dy = decimate(x, y, max(4, int(frame.width * POINTS_PER_MM)))
    return polyline(frame, dx, dy).replace(
        f'stroke="{CURVE}" stroke-width="0.35"', f'stroke="{MEASURED}" stroke-width="0.3"'
    )


def drift_svg(
    rest: RestView | None, limit_mv_per_h: float | None, *, width_mm: float, height_mm: float
) -> str:
    """The final rest's voltage against time, its drift fit, and a line falling at the limit.

    The relaxation left out of the fit is shaded grey; the fit is drawn over the part it
    was fitted to, and the limit as a dashed line from the fit's start at the limit's
    slope, so a failed cell's fit falls below it.
    """
    parts = [open_svg(width_mm, height_mm, "the final rest, its drift fit and the limit")]
    x, y = finite(rest.voltage if rest is not None else None)
    if rest is None or x.size < 2:
        return _nothing_to_draw(parts, width_mm, height_mm, "Time into the final rest (h)",
                                "Voltage (V)", "no final rest measured")
    end_h = float(x[-1])
    fit_end_v = rest.fit_v + rest.slope_mv_per_h / 1000.0 * (end_h - rest.fit_from_h)
    lines = [fit_end_v, rest.fit_v]
    if limit_mv_per_h is not None:
        lines.append(rest.fit_v + limit_mv_per_h / 1000.0 * (end_h - rest.fit_from_h))
    # the range follows the part after the relaxation, where the fit and the limit are
    after = x >= rest.fit_from_h
    y_range = span(np.concatenate((y[after], np.asarray(lines))), (0.0, 1.0), 0.08)
    frame = frame_for(width_mm, height_mm, span(x, (0.0, 1.0), 0.0), y_range)
    relax_x = frame.px(min(rest.fit_from_h, frame.x_ticks[-1]))
    parts.append(
        f'<rect class="relaxation" x="{n(frame.left)}" y="{n(frame.top)}" '
        f'width="{n(relax_x - frame.left)}" height="{n(frame.height)}" fill="#f2f2f2"/>'
    )
    parts += axes(frame, "Time into the final rest (h)", "Voltage (V)")
    keep = (y >= frame.y_ticks[0]) & (y <= frame.y_ticks[-1])  # the relaxation may leave the range
    parts.append(_measured(frame, x[keep], y[keep]))
    x0, x1 = frame.px(rest.fit_from_h), frame.px(end_h)
    parts.append(
        f'<path class="fit" d="M{n(x0)} {n(frame.py(rest.fit_v))}L{n(x1)} {n(frame.py(fit_end_v))}" '
        f'stroke="{FIT}" stroke-width="0.6"/>'
    )
    key = [(f"fit {_signed(rest.slope_mv_per_h)} mV/h", FIT, "")]
    if limit_mv_per_h is not None:
        y1 = frame.py(lines[-1])
        dash = ' stroke-dasharray="1.2 0.8"'
        parts.append(
            f'<path class="limit" d="M{n(x0)} {n(frame.py(rest.fit_v))}L{n(x1)} {n(y1)}" '
            f'stroke="{LIMIT}" stroke-width="0.35"{dash}/>'
        )
        key.append((f"limit {_signed(limit_mv_per_h)} mV/h", LIMIT, dash))
    # the labels go in a key in the corner the rest's voltage leaves free (a falling voltage
    # ends low: the top right), not at the lines' ends, where the noisy trace runs
    parts.extend(_key(frame, key, top=rest.slope_mv_per_h <= 0.0))
    parts.append("</svg>")
    return "\n".join(parts)


def pulse_svg(
    pulse: PulseView | None, limit_mohm: float | None, *, width_mm: float, height_mm: float
) -> str:
    """The DCIR pulse: V against seconds from the switch, the voltage before it and the fitted
    voltage at the pulse time, and the voltage a cell at the limit would have dropped to.

    The drop from ``before_v`` to ``at_v``, over the pulse's current, is the DCIR; a dashed
    line at ``before_v - limit x current`` shows how far a cell at the limit would drop, so a
    failed cell's fitted voltage lies below it.
    """
    parts = [open_svg(width_mm, height_mm, "the DCIR pulse, its voltage step and the limit")]
    x, y = finite(pulse.voltage if pulse is not None else None)
    if pulse is None or x.size < 2:
        return _nothing_to_draw(parts, width_mm, height_mm, "Time from the switch (s)",
                                "Voltage (V)", "no DCIR pulse measured")
    levels = [pulse.before_v, pulse.at_v]
    limit_v = None
    if limit_mohm is not None:
        limit_v = pulse.before_v - limit_mohm / 1000.0 * pulse.current_a
        levels.append(limit_v)
    # the range follows the levels and the pulse itself, not a spike at the switch
    settled = (x <= 0.0) | (x >= 0.5 * pulse.pulse_s)
    y_range = span(np.concatenate((y[settled], np.asarray(levels))), (0.0, 1.0), 0.1)
    frame = frame_for(width_mm, height_mm, span(x, (0.0, 1.0), 0.0), y_range)
    switch = frame.px(0.0)
    parts.append(
        f'<rect class="discharge" x="{n(switch)}" y="{n(frame.top)}" '
        f'width="{n(frame.left + frame.width - switch)}" height="{n(frame.height)}" '
        f'fill="{DISCHARGE_SHADE}"/>'
    )
    parts += axes(frame, "Time from the switch (s)", "Voltage (V)")
    keep = (y >= frame.y_ticks[0]) & (y <= frame.y_ticks[-1])
    parts.append(_measured(frame, x[keep], y[keep]))
    y0, y1 = frame.py(pulse.before_v), frame.py(pulse.at_v)
    xp = frame.px(pulse.pulse_s)
    parts.append(
        f'<path class="before" d="M{n(frame.px(-pulse.rest_s))} {n(y0)}H{n(xp)}" '
        f'stroke="{FIT}" stroke-width="0.6"/>'
    )
    parts.append(
        f'<path class="fit" d="M{n(frame.px(pulse.fit_from_s))} {n(y1)}H{n(frame.px(pulse.fit_to_s))}" '
        f'stroke="{FIT}" stroke-width="0.6"/>'
    )
    parts.append(
        f'<path class="step" d="M{n(xp)} {n(y0)}V{n(y1)}" stroke="{FIT}" stroke-width="0.35"/>'
    )
    dcir = (pulse.before_v - pulse.at_v) / pulse.current_a * 1000.0
    key = [(f"step {_signed(dcir)} mOhm at {pulse.pulse_s:g} s", FIT, "")]
    if limit_v is not None and limit_mohm is not None:
        dash = ' stroke-dasharray="1.2 0.8"'
        parts.append(
            f'<path class="limit" d="M{n(switch)} {n(frame.py(limit_v))}H{n(xp)}" '
            f'stroke="{LIMIT}" stroke-width="0.35"{dash}/>'
        )
        key.append((f"limit {_signed(limit_mohm)} mOhm", LIMIT, dash))
    # the rest holds the top left and the falling discharge the right: the bottom left is free
    parts.extend(_key(frame, key, top=False, left=True))
    parts.append("</svg>")
    return "\n".join(parts)


def _key(
    frame: Frame, entries: list[tuple[str, str, str]], *, top: bool, left: bool = False
) -> list[str]:
    """Each (text, colour, dash) as a short line and its words, in a corner: right-aligned
    in a right one, the line first in a left one."""
    right = frame.left + frame.width - 1.0
    step = FONT_MM + 1.0
    first = frame.top + FONT_MM + 1.0 if top else frame.top + frame.height - 1.2 - (len(entries) - 1) * step
    parts = []
    for i, (body, colour, dash) in enumerate(entries):
        y = first + i * step
        line_x = frame.left + 1.0 if left else right - 5.0
        parts.append(f'<path class="key" d="M{n(line_x)} {n(y - FONT_MM * 0.35)}h5" stroke="{colour}" '
                     f'stroke-width="0.5"{dash}/>')
        if left:
            parts.extend(_limit_label(frame, frame.left + 7.0, y + 0.8, body, colour, "start"))
        else:
            parts.extend(_limit_label(frame, right - 6.0, y + 0.8, body, colour))
    return parts


def temperature_svg(
    view: RecordView | None, limit_c: float | None, *, width_mm: float, height_mm: float
) -> str:
    """The cell's temperature against time, steps shaded, with the check's upper limit."""
    parts = [open_svg(width_mm, height_mm, "the temperature and its limit")]
    curve = view.temperature if view is not None else None
    x, y = finite(curve)
    if view is None or x.size < 2:
        return _nothing_to_draw(parts, width_mm, height_mm, "Time since the record began (h)",
                                "Temperature (°C)", "no temperature measured")
    levels = np.asarray([] if limit_c is None else [limit_c])
    frame = frame_for(
        width_mm, height_mm, span(x, (0.0, 1.0), 0.0), span(np.concatenate((y, levels)), (0.0, 1.0), 0.08)
    )
    parts += _step_shading(frame, view)
    parts += axes(frame, "Time since the record began (h)", "Temperature (°C)")
    dx, dy = decimate(x, y, max(4, int(frame.width * POINTS_PER_MM)))
    parts.append(polyline(frame, dx, dy))
    if limit_c is not None:
        yl = frame.py(limit_c)
        right = frame.left + frame.width
        parts.append(
            f'<path class="limit" d="M{n(frame.left)} {n(yl)}H{n(right)}" '
            f'stroke="{LIMIT}" stroke-width="0.35" stroke-dasharray="1.2 0.8"/>'
        )
        parts.extend(_limit_label(frame, right - 1.0, yl, f"limit {_signed(limit_c)} °C"))
    parts.append("</svg>")
    return "\n".join(parts)


def cycles_svg(
    cycles: tuple[CycleMetrics, ...],
    capacity_window: Window | None,
    *,
    width_mm: float,
    height_mm: float,
) -> str:
    """Each cycle's charge and discharge capacity as two bars, its efficiency above them.

    ``capacity_window`` (absolute, Ah), when given, is drawn as a band: the window of the
    discharge capacity check that failed.
    """
    parts = [open_svg(width_mm, height_mm, "charge and discharge capacity of each cycle")]
    values = [c.charge_capacity_ah for c in cycles] + [
        c.discharge_capacity_ah for c in cycles if c.discharge_capacity_ah is not None
    ]
    bounds = (
        []
        if capacity_window is None
        else [b for b in (capacity_window.low, capacity_window.high) if b is not None]
    )
    top = max([*values, *bounds, 1e-9]) * 1.18  # room for the efficiency labels
    frame = frame_for(width_mm, height_mm, (0.5, max(1, len(cycles)) + 0.5), (0.0, top))
    frame = Frame(
        frame.left,
        frame.top,
        frame.width,
        frame.height,
        (0.5, max(1, len(cycles)) + 0.5),
        nice_ticks(0.0, top, max_ticks=max(3, int(frame.height // 5))),
    )
    if capacity_window is not None and bounds:
        low = capacity_window.low if capacity_window.low is not None else frame.y_ticks[0]
        high = capacity_window.high if capacity_window.high is not None else frame.y_ticks[-1]
        y0, y1 = frame.py(min(high, frame.y_ticks[-1])), frame.py(max(low, frame.y_ticks[0]))
        parts.append(
            f'<rect class="window" x="{n(frame.left)}" y="{n(y0)}" width="{n(frame.width)}" '
            f'height="{n(y1 - y0)}" fill="#fbeeec"/>'
        )
    parts += _bar_axes(frame, len(cycles))
    if not cycles:
        parts += [no_data(frame, "no cycle measured"), "</svg>"]
        return "\n".join(parts)
    bar = min(6.0, frame.width / len(cycles) / 3.0)
    for c in cycles:
        centre = frame.px(c.index)
        for offset, value, colour in (
            (-bar, c.charge_capacity_ah, "#9bb7d4"),
            (0.0, c.discharge_capacity_ah, CURVE),
        ):
            if value is None:
                continue
            y = frame.py(value)
            parts.append(
                f'<rect x="{n(centre + offset)}" y="{n(y)}" width="{n(bar)}" '
                f'height="{n(frame.top + frame.height - y)}" fill="{colour}"/>'
            )
        if c.coulombic_efficiency is not None:
            label = f"{c.coulombic_efficiency * 100:.1f} %"
            parts.append(
                text(
                    centre,
                    frame.py(max(c.charge_capacity_ah, c.discharge_capacity_ah or 0.0)) - 1.0,
                    label,
                    extra=f' fill="{INK}"',
                )
            )
    if capacity_window is not None and bounds:
        right = frame.left + frame.width - 1.0
        parts.extend(_limit_label(frame, right, frame.py(bounds[0]), "grading capacity window"))
    parts.append("</svg>")
    return "\n".join(parts)


def _bar_axes(frame: Frame, count: int) -> list[str]:
    """Axes with one category per cycle: the y grid of svgplot.axes, cycle numbers below."""
    plain = Frame(frame.left, frame.top, frame.width, frame.height, (0.5, count + 0.5), frame.y_ticks)
    parts = [p for p in axes(plain, "", "Capacity (Ah)", x_labels=False)]
    bottom = frame.top + frame.height
    parts.append(f'<g fill="{INK}">')
    for k in range(1, count + 1):
        parts.append(text(frame.px(k), bottom + 1.2 + FONT_MM, f"cycle {k}"))
    parts.append(
        text(
            frame.left + frame.width / 2,
            bottom + 2.6 + 2 * FONT_MM,
            "light: charge, dark: discharge; efficiency above",
            extra=f' fill="{AXIS}"',
        )
    )
    parts.append("</g>")
    return parts


def _signed(value: float) -> str:
    """A number to two decimals with a true minus sign."""
    body = f"{value:.2f}"
    return "\N{MINUS SIGN}" + body[1:] if body.startswith("-") and float(body) != 0 else body.lstrip("-")
