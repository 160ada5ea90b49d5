"""Plots: decimation keeps the shape, ticks are round, the SVG puts numbers where they belong."""

from __future__ import annotations

import math
import re
import xml.etree.ElementTree as ET
from collections import Counter

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.judge.thin import decimate
from pipeline.model import Curve, Plateau
from pipeline.report import plots, svgplot
from tests.golden import cases

SVG = "{http://www.w3.org/2000/svg}"

finite = st.floats(-1e6, 1e6, allow_nan=False, allow_infinity=False)


def parse(svg: str) -> ET.Element:
    return ET.fromstring(svg)


def label_middle(t: ET.Element) -> float:
    """Where a label's middle is: labels are written from where they start (svgplot.text)."""
    width = svgplot.label_width(t.text)
    return float(t.get("x")) + (0.0 if width is None else width / 2)


def label_end(t: ET.Element) -> float:
    width = svgplot.label_width(t.text)
    return float(t.get("x")) + (0.0 if width is None else width)


def y_tick_labels(root: ET.Element) -> list[ET.Element]:
    """The y axis's tick labels, lowest first: the numbers that end together, left of the frame."""
    texts = [t for t in root.iter(f"{SVG}text") if "rotate" not in t.get("transform", "")]
    numeric = [t for t in texts if re.fullmatch(r"[\N{MINUS SIGN}\d.]+", t.text)]
    edges = Counter(round(label_end(t), 3) for t in numeric)
    edge = min(e for e, count in edges.items() if count >= 2)
    return [t for t in numeric if round(label_end(t), 3) == edge]


def axis_map(root: ET.Element, axis: str) -> tuple[float, float]:
    """Read the tick labels back and return (slope, offset) mapping mm to data units."""
    texts = [t for t in root.iter(f"{SVG}text") if "rotate" not in t.get("transform", "")]
    if axis == "x":
        numeric = [t for t in texts if re.fullmatch(r"[\N{MINUS SIGN}\d.]+", t.text)]
        bottom = max(float(t.get("y")) for t in numeric)
        pairs = [(label_middle(t), t.text) for t in numeric if float(t.get("y")) == bottom]
    else:
        pairs = [(float(t.get("y")), t.text) for t in y_tick_labels(root)]
    mm = np.array([p for p, _ in pairs])
    values = np.array([float(text.replace("\N{MINUS SIGN}", "-")) for _, text in pairs])
    if axis == "y":
        mm = mm - svgplot.FONT_MM * 0.35  # labels sit a little below their tick
    slope, offset = np.polyfit(mm, values, 1)
    return float(slope), float(offset)


def curve_points(root: ET.Element) -> np.ndarray:
    path = next(p for p in root.iter(f"{SVG}path") if p.get("class") == "curve")
    numbers = [float(v) for v in path.get("d").lstrip("M").split()]
    return np.array(numbers).reshape(-1, 2)


# --- decimate -------------------------------------------------------------------------------


@settings(max_examples=200, deadline=None)
@given(
    st.lists(st.tuples(finite, finite), min_size=1, max_size=400),
    st.integers(4, 60),
    st.booleans(),
)
def test_decimate_keeps_extremes_and_ends_within_the_budget(
    points: list[tuple[float, float]], max_points: int, sort_x: bool
) -> None:
    if sort_x:
        points = sorted(points)
    x = np.array([p[0] for p in points])
    y = np.array([p[1] for p in points])
    dx, dy = decimate(x, y, max_points)
    assert len(dx) == len(dy) <= max_points
    kept = set(zip(dx.tolist(), dy.tolist(), strict=True))
    assert kept <= set(zip(x.tolist(), y.tolist(), strict=True))
    assert (dx[0], dy[0]) == (x[0], y[0])
    assert (dx[-1], dy[-1]) == (x[-1], y[-1])
    assert dy.max() == y.max()
    assert dy.min() == y.min()
    again = decimate(x, y, max_points)
    assert np.array_equal(again[0], dx) and np.array_equal(again[1], dy)


def test_decimate_keeps_sample_order_and_a_single_spike() -> None:
    x = np.linspace(0.0, 100.0, 100_000)
    y = np.zeros_like(x)
    y[54_321] = 7.0
    dx, dy = decimate(x, y, 300)
    assert len(dx) <= 300
    assert np.all(np.diff(dx) > 0)
    assert dy.max() == 7.0 and dx[np.argmax(dy)] == x[54_321]


def test_decimate_drops_non_finite_points() -> None:
    dx, dy = decimate([0, 1, 2, 3], [1.0, math.nan, math.inf, 2.0], 10)
    assert dx.tolist() == [0.0, 3.0] and dy.tolist() == [1.0, 2.0]


def test_decimate_returns_short_input_whole() -> None:
    dx, dy = decimate([0.0, 1.0, 2.0], [3.0, 1.0, 2.0], 10)
    assert dx.tolist() == [0.0, 1.0, 2.0] and dy.tolist() == [3.0, 1.0, 2.0]


def test_decimate_refuses_a_tiny_budget_and_unequal_lengths() -> None:
    with pytest.raises(ValueError, match="at least 4"):
        decimate([0.0, 1.0], [0.0, 1.0], 3)
    with pytest.raises(ValueError, match="differ in length"):
        decimate([0.0, 1.0], [0.0], 10)


# --- ticks ----------------------------------------------------------------------------------


@settings(max_examples=300, deadline=None)
@given(finite, st.floats(1e-6, 1e6), st.integers(3, 12))
def test_ticks_cover_the_range_with_round_even_steps(
    low: float, width: float, max_ticks: int
) -> None:
    high = low + width * max(1.0, abs(low))
    ticks = svgplot.nice_ticks(low, high, max_ticks)
    assert 2 <= len(ticks) <= max_ticks
    steps = np.diff(ticks)
    assert ticks[0] <= low + 1e-8 * steps[0]
    assert ticks[-1] >= high - 1e-8 * steps[0]
    assert np.allclose(steps, steps[0], rtol=1e-6)
    mantissa = steps[0] / 10 ** math.floor(math.log10(steps[0]))
    assert any(math.isclose(mantissa, m, rel_tol=1e-6) for m in (1.0, 2.0, 5.0, 10.0))


def test_ticks_need_room_for_three() -> None:
    with pytest.raises(ValueError, match="at least 3"):
        svgplot.nice_ticks(-1.0, 1.0, 2)
    with pytest.raises(ValueError, match="cannot place ticks"):
        svgplot.nice_ticks(1.0, 1.0)


def test_tick_labels_use_the_decimals_of_their_step_and_a_true_minus() -> None:
    assert svgplot.tick_label(3.2, 0.2) == "3.2"
    assert svgplot.tick_label(40.0, 20.0) == "40"
    assert svgplot.tick_label(-50.0, 50.0) == "\N{MINUS SIGN}50"
    assert svgplot.tick_label(-0.0, 0.5) == "0.0"
    assert svgplot.tick_label(0.05, 0.05) == "0.05"


# --- discharge plot -------------------------------------------------------------------------


def test_discharge_plot_reads_back_the_published_curve_at_half_capacity() -> None:
    curve = cases.grading_curve()
    root = parse(plots.discharge_svg(curve, cases.PLATEAUS, width_mm=86, height_mm=54))
    x_slope, x_off = axis_map(root, "x")
    y_slope, y_off = axis_map(root, "y")
    pts = curve_points(root)
    q_pct = pts[:, 0] * x_slope + x_off
    v = pts[:, 1] * y_slope + y_off
    assert q_pct.min() == pytest.approx(0.0, abs=0.05)
    assert q_pct.max() == pytest.approx(100.0, abs=0.05)
    # The fixture is the synthetic LFP/graphite full cell of our illustrative map (Safari &
    # Delacourt 2011 LFP fit, Chen et al. 2020 graphite fit): 3.2985 V at 50 % state of
    # charge (derived from the two fits), less the fixture's invented 20 mV IR drop.
    # The curve runs from SOC 1 down to the cut-off, so SOC 0.5 lies at this q:
    q_half_soc = 50.0 / (1.0 - cases.soc_at_cutoff())
    read_v = float(np.interp(q_half_soc, q_pct, v))
    assert read_v == pytest.approx(3.2985 - cases.IR_DROP_V, abs=0.003)


def test_discharge_plot_shades_each_plateau_over_its_range() -> None:
    root = parse(plots.discharge_svg(
        cases.grading_curve(), cases.PLATEAUS, width_mm=86, height_mm=54
    ))
    x_slope, x_off = axis_map(root, "x")
    y_slope, y_off = axis_map(root, "y")
    bands = [r for r in root.iter(f"{SVG}rect") if r.get("class") == "plateau"]
    levels = [p for p in root.iter(f"{SVG}path") if p.get("class") == "plateau-level"]
    assert len(bands) == len(levels) == len(cases.PLATEAUS)
    for band, level, plateau in zip(bands, levels, cases.PLATEAUS, strict=True):
        start = float(band.get("x")) * x_slope + x_off
        end = (float(band.get("x")) + float(band.get("width"))) * x_slope + x_off
        assert start == pytest.approx(plateau.start_pct, abs=0.05)
        assert end == pytest.approx(plateau.end_pct, abs=0.05)
        y_mm = float(re.match(r"M[\d.]+ ([\d.]+)H", level.get("d")).group(1))
        assert y_mm * y_slope + y_off == pytest.approx(plateau.voltage_v, abs=0.001)
    labels = [t.text for t in root.iter(f"{SVG}text") if t.text and t.text.startswith("P")]
    assert labels == ["P1", "P2", "P3"]


def test_discharge_plot_has_size_labels_and_units() -> None:
    svg = plots.discharge_svg(cases.grading_curve(), (), width_mm=86, height_mm=54)
    root = parse(svg)
    assert root.get("width") == "86.00mm" and root.get("height") == "54.00mm"
    assert root.get("viewBox") == "0 0 86.00 54.00"
    assert root.get("font-family") == svgplot.FONT_FAMILY
    texts = [t.text for t in root.iter(f"{SVG}text")]
    assert "Discharged capacity (%)" in texts and "Voltage (V)" in texts


def test_discharge_plot_without_a_curve_says_so() -> None:
    root = parse(plots.discharge_svg(None, (), width_mm=86, height_mm=54))
    assert "no grading discharge measured" in [t.text for t in root.iter(f"{SVG}text")]
    assert not [p for p in root.iter(f"{SVG}path") if p.get("class") == "curve"]


def test_discharge_plot_survives_odd_curves() -> None:
    flat = Curve(np.linspace(0, 100, 50), np.full(50, 3.3))
    holes = Curve([0.0, 50.0, math.nan, 100.0], [3.4, 3.3, 3.2, math.inf])
    odd = (Plateau(math.nan, 20.0, 3.3, 1.0), Plateau(90.0, 80.0, 3.3, 1.0),
           Plateau(-20.0, 250.0, math.nan, 1.0))
    for curve in (flat, holes):
        svg = plots.discharge_svg(curve, odd, width_mm=86, height_mm=54)
        assert "nan" not in svg.lower() and "inf" not in svg.lower()
        parse(svg)


def test_plot_too_small_for_its_axes_is_refused() -> None:
    with pytest.raises(ValueError, match="no room"):
        plots.discharge_svg(None, (), width_mm=20, height_mm=15)


def test_plots_are_deterministic_and_carry_only_numbers() -> None:
    curve = cases.grading_curve()
    one = plots.discharge_svg(curve, cases.PLATEAUS, width_mm=86, height_mm=54)
    two = plots.discharge_svg(curve, cases.PLATEAUS, width_mm=86, height_mm=54)
    assert one == two
    assert "<script" not in one and "href" not in one


# --- dQ/dV plot -----------------------------------------------------------------------------


def test_ica_plot_marks_each_peak_at_its_voltage() -> None:
    ica = cases.ica_curve(cases.grading_curve())
    root = parse(plots.ica_svg(ica, cases.ICA_PEAKS_V, width_mm=86, height_mm=54))
    x_slope, x_off = axis_map(root, "x")
    marks = [p for p in root.iter(f"{SVG}path") if p.get("class") == "peak"]
    assert len(marks) == len(cases.ICA_PEAKS_V)
    for mark, peak in zip(marks, cases.ICA_PEAKS_V, strict=True):
        x_mm = float(re.match(r"M([\d.]+) ", mark.get("d")).group(1))
        assert x_mm * x_slope + x_off == pytest.approx(peak, abs=0.001)
    texts = [t.text for t in root.iter(f"{SVG}text")]
    assert "dQ/dV (Ah/V)" in texts and "Voltage (V)" in texts


def test_ica_plot_axis_starts_at_zero_despite_smoothing_wiggles() -> None:
    v = np.linspace(3.0, 3.4, 81)
    dq_dv = 100 * np.exp(-(((v - 3.3) / 0.01) ** 2)) - 0.5  # small negative floor
    root = parse(plots.ica_svg(Curve(v, dq_dv), (3.3,), width_mm=86, height_mm=54))
    y_labels = [t.text for t in y_tick_labels(root)]
    assert y_labels[0] == "0"


def test_close_peaks_are_each_numbered_and_no_numbers_overlap() -> None:
    """Four peaks, three of them within 0.2 mm: every one gets its number (the voltages are
    listed by number on the certificate), and no two numbers overlap (one was left out)."""
    v = np.linspace(3.0, 3.4, 81)
    peaks = (3.30, 3.301, 3.302, 3.25)
    root = parse(plots.ica_svg(Curve(v, np.ones_like(v)), peaks, width_mm=86, height_mm=54))
    numbers = [t for t in root.iter(f"{SVG}text") if t.get("fill") == plots.PEAK]
    assert sorted(t.text for t in numbers) == ["1", "2", "3", "4"]
    boxes = [(label_middle(t) - 1.2, label_middle(t) + 1.2, float(t.get("y"))) for t in numbers]
    for i, (a0, a1, ay) in enumerate(boxes):
        for b0, b1, by in boxes[i + 1:]:
            assert ay != by or a1 <= b0 or b1 <= a0, "two numbers overlap"
    assert len(root.findall(f".//{SVG}path[@class='peak']")) == len(peaks)
    assert plots.peak_numbers((3.3, math.nan, 3.25)) == {3.3: 1, 3.25: 2}


def test_ica_plot_without_a_curve_says_so() -> None:
    root = parse(plots.ica_svg(None, (), width_mm=86, height_mm=54))
    assert "no dQ/dV curve measured" in [t.text for t in root.iter(f"{SVG}text")]


def test_many_peaks_mark_only_the_highest() -> None:
    v = np.linspace(2.5, 3.5, 201)
    dq_dv = 10 + 5 * np.sin(v * 200)
    peaks = tuple(float(p) for p in np.linspace(2.55, 3.45, 30))
    marked = plots.marked_peaks(Curve(v, dq_dv), peaks)
    assert len(marked) == plots.MAX_MARKED_PEAKS
    heights = np.interp(peaks, v, dq_dv)
    threshold = sorted(heights, reverse=True)[plots.MAX_MARKED_PEAKS - 1]
    assert all(np.interp(p, v, dq_dv) >= threshold for p in marked)
    assert list(marked) == [p for p in peaks if p in marked]  # given order kept
    root = parse(plots.ica_svg(Curve(v, dq_dv), peaks, width_mm=86, height_mm=54))
    assert len(root.findall(f".//{SVG}path[@class='peak']")) == plots.MAX_MARKED_PEAKS
    assert plots.marked_peaks(None, (*peaks[:3], math.nan)) == peaks[:3]


# --- curve points the page cannot show -------------------------------------------------------


def _distance_to_polyline(points: np.ndarray, line: np.ndarray) -> np.ndarray:
    """Each of ``points``' distance to the nearest segment of the polyline ``line`` (mm)."""
    a, b = line[:-1], line[1:]
    ab = b - a
    length2 = np.maximum((ab**2).sum(axis=1), 1e-18)
    offsets = points[:, None, :] - a[None, :, :]
    t = np.clip((offsets * ab[None]).sum(axis=2) / length2[None], 0.0, 1.0)
    nearest = a[None] + t[..., None] * ab[None]
    return np.sqrt(((points[:, None, :] - nearest) ** 2).sum(axis=2)).min(axis=1)


def test_curve_leaves_out_only_points_the_page_cannot_show() -> None:
    """Every point of the thinned curve lies within INVISIBLE_MM of the line drawn, the ends are
    kept, and a long flat stretch is drawn with far fewer points."""
    curve = cases.grading_curve()
    frame = svgplot.frame_for(86, 54, (0.0, 100.0), (2.4, 3.6))
    x, y = decimate(curve.x, curve.y, int(frame.width * svgplot.POINTS_PER_MM))
    every = np.column_stack([[frame.px(a) for a in x], [frame.py(b) for b in y]])
    drawn = svgplot.simplify(every)
    assert 2 <= len(drawn) < len(every) / 2
    assert drawn[0].tolist() == every[0].tolist() and drawn[-1].tolist() == every[-1].tolist()
    assert _distance_to_polyline(every, drawn).max() <= svgplot.INVISIBLE_MM + 1e-12
    line = np.column_stack([np.linspace(0, 50, 200), np.full(200, 3.0)])
    assert svgplot.simplify(line).tolist() == [[0.0, 3.0], [50.0, 3.0]]


def _simplify_one_span_at_a_time(points: np.ndarray, tolerance: float) -> np.ndarray:
    """Ramer-Douglas-Peucker as it is usually written: one span at a time, from a stack."""
    keep = np.zeros(len(points), dtype=bool)
    keep[0] = keep[-1] = True
    spans = [(0, len(points) - 1)]
    while spans:
        first, last = spans.pop()
        if last - first < 2:
            continue
        chord = points[last] - points[first]
        offsets = points[first + 1 : last] - points[first]
        length = math.hypot(float(chord[0]), float(chord[1]))
        if length > 0:
            distance = np.abs(chord[0] * offsets[:, 1] - chord[1] * offsets[:, 0]) / length
        else:
            distance = np.hypot(offsets[:, 0], offsets[:, 1])
        worst = int(np.argmax(distance))
        if distance[worst] > tolerance:
            keep[first + 1 + worst] = True
            spans += [(first, first + 1 + worst), (first + 1 + worst, last)]
    return points[keep]


@settings(max_examples=300, deadline=None)
@given(
    st.lists(
        st.tuples(
            st.floats(-200, 200, allow_nan=False, width=32),
            st.floats(-200, 200, allow_nan=False, width=32),
        ),
        min_size=0,
        max_size=300,
    ),
    st.sampled_from([0.0, svgplot.INVISIBLE_MM, 0.5, 5.0]),
    st.booleans(),
)
def test_curve_simplified_all_spans_at_once_keeps_the_same_points(
    pairs: list[tuple[float, float]], tolerance: float, closed: bool
) -> None:
    """Looking at every span of a generation at once keeps exactly the points (to the bit) that
    looking at one span at a time keeps, ties and spans that come back to their start too."""
    points = np.array(pairs, dtype=np.float64).reshape(-1, 2)
    if closed and len(points) > 2:
        points[-1] = points[0]
    if len(points) < 3:
        assert svgplot.simplify(points, tolerance) is points
        return
    expected = _simplify_one_span_at_a_time(points, tolerance)
    assert svgplot.simplify(points, tolerance).tolist() == expected.tolist()


def test_curve_simplified_on_a_certificates_curves_as_one_span_at_a_time() -> None:
    """A noisy record's curves as a certificate draws them (most points kept, deep splits)."""
    rng = np.random.default_rng(7)
    x = np.linspace(13.0, 175.0, 485)
    for y in (20 + rng.normal(0, 0.4, 485), np.repeat(rng.uniform(5, 25, 5), 97), 3 + np.sin(x / 9)):
        points = np.column_stack([x, y])
        expected = _simplify_one_span_at_a_time(points, svgplot.INVISIBLE_MM)
        assert svgplot.simplify(points).tolist() == expected.tolist()


def test_curve_path_holds_its_points_in_order() -> None:
    """The path written holds the points kept, in the curve's order, no more than before."""
    root = parse(plots.discharge_svg(cases.grading_curve(), (), width_mm=86, height_mm=54))
    drawn = curve_points(root)
    assert np.all(np.diff(drawn[:, 0]) > 0)  # the discharge runs one way along its axis
    assert 2 <= len(drawn) <= 86 * svgplot.POINTS_PER_MM
