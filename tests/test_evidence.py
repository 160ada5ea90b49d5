"""Evidence plots: the whole record with its steps, and the plot that shows a failed check."""

from __future__ import annotations

import datetime
import re
import xml.etree.ElementTree as ET

import numpy as np
import pytest

from pipeline.acceptance.rules import Window
from pipeline.demo import cycletext
from pipeline.demo import lots as demo
from pipeline.model import Curve, CycleMetrics, RecordView, RestView, StepKind, StepSpan
from pipeline.report import evidence
from pipeline.report.certificate import build_context
from pipeline.rulebook.book import load_rules_dir
from pipeline.runner import judge
from pipeline.shipped import RULES_DIR

SVG = "{http://www.w3.org/2000/svg}"
SIZE = {"width_mm": 86.0, "height_mm": 50.0}


def _path_points(path: ET.Element) -> list[tuple[float, float]]:
    numbers = [float(v) for v in re.findall(r"-?\d+\.\d+", path.get("d", ""))]
    return list(zip(numbers[::2], numbers[1::2], strict=False))


def _view() -> RecordView:
    t = np.linspace(0.0, 10.0, 501)
    steps = (
        StepSpan(0.0, 4.0, StepKind.CHARGE),
        StepSpan(4.0, 5.0, StepKind.REST),
        StepSpan(5.0, 9.0, StepKind.DISCHARGE),
        StepSpan(9.0, 10.0, StepKind.REST),
    )
    volts = 3.3 + 0.1 * np.sin(t)
    amps = np.where(t < 4, 5.0, np.where((t >= 5) & (t < 9), -5.0, 0.0))
    return RecordView(Curve(t, volts), Curve(t, amps), Curve(t, 25 + t), steps)


def test_the_record_plot_has_a_panel_per_measured_quantity_and_shades_the_steps() -> None:
    root = ET.fromstring(evidence.record_svg(_view(), width_mm=178.0, height_mm=66.0))
    assert len(root.findall(f".//{SVG}path[@class='curve']")) == 3
    # each panel shades the charge steps and the discharge steps (one path each)
    assert len(root.findall(f".//{SVG}path[@class='steps-charge']")) == 3
    assert len(root.findall(f".//{SVG}path[@class='steps-discharge']")) == 3
    no_temperature = RecordView(_view().voltage, _view().current, None, _view().steps)
    root = ET.fromstring(evidence.record_svg(no_temperature, width_mm=178.0, height_mm=66.0))
    assert len(root.findall(f".//{SVG}path[@class='curve']")) == 2


def test_the_drift_plot_draws_the_fit_and_a_limit_the_failed_fit_falls_below() -> None:
    hours = np.linspace(0.0, 3.0, 300)
    rest = RestView(Curve(hours, 3.2 - 0.0036 * hours), 0.17, 3.2 - 0.0036 * 0.17, -3.6)
    root = ET.fromstring(evidence.drift_svg(rest, -2.0, **SIZE))
    (fit,) = root.findall(f".//{SVG}path[@class='fit']")
    (limit,) = root.findall(f".//{SVG}path[@class='limit']")
    fit_start, fit_end = _path_points(fit)
    limit_start, limit_end = _path_points(limit)
    assert fit_start == limit_start
    assert fit_end[1] > limit_end[1]  # SVG y grows downwards: the fit ends lower, it falls faster
    labels = [t.text for t in root.iter(f"{SVG}text")]
    assert "limit \N{MINUS SIGN}2.00 mV/h" in labels and "fit \N{MINUS SIGN}3.60 mV/h" in labels
    root = ET.fromstring(evidence.drift_svg(rest, None, **SIZE))
    assert root.findall(f".//{SVG}path[@class='limit']") == []


def test_the_temperature_plot_draws_its_limit_at_the_limit() -> None:
    root = ET.fromstring(evidence.temperature_svg(_view(), 30.0, **SIZE))
    (limit,) = root.findall(f".//{SVG}path[@class='limit']")
    assert "limit 30.00 °C" in [t.text for t in root.iter(f"{SVG}text")]
    assert len(_path_points(limit)) == 1  # M x y then H: one horizontal line


def test_the_cycle_plot_has_two_bars_per_finished_cycle_and_the_window() -> None:
    cycles = (
        CycleMetrics(1, 22.0, 20.0, 0.909, 64.0, 3.2, 3.6, 2.5, 600.0, 26.0),
        CycleMetrics(2, 20.1, 20.0, 0.995, 64.0, 3.2, 3.6, 2.5, 600.0, 26.0),
        CycleMetrics(3, 3.0, None, None, None, None, 3.3, None, 0.0, 25.0),
    )
    root = ET.fromstring(evidence.cycles_svg(cycles, Window(20.4, 22.4), **SIZE))
    bars = [r for r in root.findall(f".//{SVG}rect") if r.get("class") is None and r.get("fill") != "none"]
    assert len(bars) == 5
    assert len(root.findall(f".//{SVG}rect[@class='window']")) == 1
    assert {"90.9 %", "99.5 %"} <= {t.text for t in root.iter(f"{SVG}text")}


@pytest.fixture(scope="module")
def judged() -> dict[str, object]:
    rulebook = load_rules_dir(RULES_DIR)
    when = datetime.datetime(2026, 3, 4, tzinfo=datetime.UTC)
    out = {}
    for cell in demo.DEMO_CELLS:
        if cell.defect in ("", "internal_short", "over_temperature", "low_capacity", "high_dcir") and cell.cell_id not in out:
            text = cycletext.to_cycle_file(demo.demo_record(cell), demo.demo_metadata(cell))
            out[cell.defect or "normal"] = judge(text.encode(), f"{cell.cell_id}.csv", rulebook, analysed_at=when)
    return out


@pytest.mark.parametrize(
    ("case", "label"),
    [
        ("internal_short", "the final rest, its drift fit and the limit"),
        ("over_temperature", "the temperature and its limit"),
        ("low_capacity", "charge and discharge capacity of each cycle"),
        ("high_dcir", "the DCIR pulse, its voltage step and the limit"),
    ],
)
def test_a_failed_cell_certificate_shows_the_plot_of_its_failure(judged, case: str, label: str) -> None:
    context = build_context(judged[case])
    labels = [ET.fromstring(str(plot["svg"])).get("aria-label") for plot in context["evidence"]]
    assert label in labels
    assert ET.fromstring(str(context["record_svg"])).get("aria-label") == (
        "the whole record: voltage, current and temperature"
    )


def test_a_passed_cell_draws_no_plot_but_a_failed_one_shows_its_whole_record(judged) -> None:
    context = build_context(judged["normal"])
    assert context["evidence"] == [] and context["record_svg"] == ""
    assert context["discharge_svg"] == context["ica_svg"] == ""
    assert build_context(judged["low_capacity"])["record_svg"] != ""
    view = judged["normal"].metrics.record
    assert view is not None and view.voltage.x.size <= 810
    rest = judged["normal"].metrics.rest
    assert rest is not None
    assert rest.slope_mv_per_h == judged["normal"].metrics.values["rest_voltage_drift_mV_per_h"]


def test_the_drift_plots_labels_stay_clear_of_a_noisy_trace() -> None:
    """A failed drift with noise: the fit's and the limit's labels sit where the trace is not
    (they sat at the lines' ends, on the trace)."""
    rng = np.random.default_rng(5)
    hours = np.linspace(0.0, 3.0, 600)
    volts = 3.2 - 0.0036 * hours + rng.normal(0.0, 0.0006, hours.size)
    rest = RestView(Curve(hours, volts), 0.17, 3.2 - 0.0036 * 0.17, -3.6)
    root = ET.fromstring(evidence.drift_svg(rest, -2.0, **SIZE))
    trace = [p for p in root.iter(f"{SVG}path") if p.get("class") == "curve"]
    points = [pt for path in trace for pt in _path_points(path)]
    assert points
    for label in root.iter(f"{SVG}text"):
        if not (label.text or "").startswith(("fit ", "limit ")):
            continue
        x_end, y_base = float(label.get("x", "0")), float(label.get("y", "0"))
        x_start = x_end - 0.55 * 2.5 * len(label.text or "")  # a generous width for the words
        under = [y for x, y in points if x_start <= x <= x_end + 6.0]
        assert under and min(under) > y_base + 0.5, f"{label.text!r} lies on the trace"


def test_the_plot_of_what_failed_follows_the_checks_on_the_first_pages() -> None:
    """On a failed cell's certificate the failure's plot comes right after the checks table,
    before the general plots (it was on page 3, behind them and the whole record)."""
    import io

    from pypdf import PdfReader

    from pipeline.report.certificate import render_html
    from pipeline.report.pdf import render_pdf
    from tests.golden import cases

    html = render_html(cases.fail_result())
    assert html.index("What the failed checks show") < html.index("Grading discharge")
    pages = [page.extract_text() or "" for page in PdfReader(io.BytesIO(render_pdf(html))).pages]
    first = next(i for i, text in enumerate(pages, start=1) if "What the failed checks show" in text)
    assert first <= 2


def test_the_pulse_plot_draws_the_step_the_dcir_is_and_the_limit_it_crossed(judged) -> None:
    result = judged["high_dcir"]
    pulse = result.metrics.pulse
    dcir = result.metrics.values["dcir_mOhm"]
    assert pulse is not None and dcir is not None
    # the drawn step is the measured DCIR: (V before - V at the pulse time) / |I|
    assert (pulse.before_v - pulse.at_v) / pulse.current_a * 1000.0 == pytest.approx(dcir)
    assert pulse.voltage.x[0] == pytest.approx(-pulse.rest_s, abs=10.0) and pulse.voltage.x[-1] > pulse.pulse_s
    root = ET.fromstring(evidence.pulse_svg(pulse, 8.0, **SIZE))
    limit = root.find(f".//{SVG}path[@class='limit']")
    step = root.find(f".//{SVG}path[@class='step']")
    fit = root.find(f".//{SVG}path[@class='fit']")
    assert limit is not None and step is not None and fit is not None
    limit_y = _path_points(limit)[0][1]
    # a failed cell's fitted voltage lies below (on the page: further down than) the limit's
    assert min(y for _, y in _path_points(fit)) > limit_y
    assert "no DCIR pulse measured" in evidence.pulse_svg(None, 8.0, **SIZE)
