"""The lot report's by-channel page and the lot over time, on an invented lot whose channel
R1-C04 goes bad half-way (its DC resistance rises and its cells fail the resistance check)."""

from __future__ import annotations

import dataclasses
import xml.etree.ElementTree as ET

import numpy as np
import pytest

from pipeline.judge.channels import ChannelRecord
from pipeline.report import pdf
from pipeline.report.lotreport import (
    LotReportInput,
    lot_figures,
    lot_report_context,
    render_lot_report_html,
    render_lot_report_pdf,
)
from tests.test_lot_report import DCIR, invented_lot, pdf_text


def lot_with_a_bad_channel(n: int = 60, bad: bool = True) -> LotReportInput:
    base = invented_lot(n=n)
    records, cells = [], []
    for i, cell in enumerate(base.cells):
        channel = f"R1-C{i % 6 + 1:02d}"
        values, verdict, out = dict(cell.values), cell.verdict, ()
        if bad and channel == "R1-C04" and i >= n // 2:
            values[DCIR], verdict, out = 2.2 + 0.005 * i, "fail", ("resistance",)
        cells.append(dataclasses.replace(cell, values=values, verdict=verdict, places=((channel, "bench-3"),)))
        records.append(ChannelRecord("bench-3", channel, f"2026-03-02T{8 + i // 10:02d}:{(i % 10) * 6:02d}:00+00:00",
                                     cell.cell_id, base.lot, verdict, out, values))
    return dataclasses.replace(base, cells=tuple(cells), records=tuple(records))


@pytest.fixture(scope="module")
def bad_lot() -> LotReportInput:
    return lot_with_a_bad_channel()


def test_the_by_channel_page_puts_the_suspect_channel_first_with_its_evidence(bad_lot: LotReportInput) -> None:
    rows = lot_report_context(bad_lot)["channels"]
    first = rows[0]  # type: ignore[index]
    assert first["channel"] == "R1-C04" and first["failed"] == "6" and first["checks"] == "resistance 5"
    assert "its last 5 cells all failed check resistance" in first["suspect"]
    assert not any(r["suspect"] for r in rows[1:])  # type: ignore[index]
    text = pdf_text(render_lot_report_pdf(bad_lot))
    assert "By channel" in text and "Suspect channel:" in text and "The lot over time" in text
    assert "Western Electric 1956, rule 1" in text


def test_a_lot_without_a_bad_channel_flags_none() -> None:
    rows = lot_report_context(lot_with_a_bad_channel(bad=False))["channels"]
    assert rows and not any(r["suspect"] for r in rows)  # type: ignore[union-attr]


def test_the_control_chart_of_dcir_flags_the_bad_channels_points(bad_lot: LotReportInput) -> None:
    charts = {c["metric"]: c for c in lot_report_context(bad_lot)["charts"]}  # type: ignore[union-attr]
    assert {"grading_capacity_Ah", DCIR} <= set(charts)
    assert charts[DCIR]["signals"] >= 5
    assert "one point beyond 3 sigma (Western Electric 1956, rule 1; Nelson 1984, test 1)" in charts[DCIR]["caption"]


def test_every_figure_is_well_formed_svg_with_a_file_name(bad_lot: LotReportInput) -> None:
    figures = lot_figures(bad_lot)
    names = [name for name, _ in figures]
    assert "_chart-dcir_mOhm" in names and "_chart-capacity-dcir" in names and "_chart-by-channel" in names
    for _, svg in figures:
        assert ET.fromstring(svg).tag == "{http://www.w3.org/2000/svg}svg"


def test_a_channel_name_that_looks_like_markup_is_escaped() -> None:
    data = lot_with_a_bad_channel()
    records = tuple(dataclasses.replace(r, channel="<b>&x") if r.channel == "R1-C01" else r for r in data.records)
    html = render_lot_report_html(dataclasses.replace(data, records=records))
    assert "<b>&x" not in html and "&lt;b&gt;&amp;x" in html


def test_the_by_channel_page_and_charts_stay_inside_the_margins(bad_lot: LotReportInput) -> None:
    document = pdf.lay_out(render_lot_report_html(bad_lot))
    for number, page in enumerate(document.pages, start=1):
        box = page._page_box
        left, right = box.content_box_x(), box.content_box_x() + box.width
        for b in box.children[0].descendants():
            if b.width is None or not b.element_tag:
                continue
            assert left - 0.01 <= b.position_x and b.position_x + b.margin_width() <= right + 0.01, (
                f"page {number}: <{b.element_tag} class={b.element.get('class')}> past the margin")


def test_no_records_no_channel_page() -> None:
    context = lot_report_context(invented_lot())
    assert context["channels"] == [] and context["charts"] == [] and lot_figures(invented_lot()) == []


def test_each_chart_has_a_png_of_its_size_with_the_signals_in_red(bad_lot: LotReportInput) -> None:
    import io

    from PIL import Image

    from pipeline.report.svgraster import DPI, svg_to_png

    figures = dict(lot_figures(bad_lot))
    png = svg_to_png(figures["_chart-dcir_mOhm"])
    assert png.startswith(b"\x89PNG") and png == svg_to_png(figures["_chart-dcir_mOhm"])
    image = Image.open(io.BytesIO(png)).convert("RGB")
    root = ET.fromstring(figures["_chart-dcir_mOhm"])
    width_mm, height_mm = (float(v) for v in root.get("viewBox", "").split()[2:])
    assert image.size == (round(width_mm * DPI / 25.4), round(height_mm * DPI / 25.4))
    signal = tuple(int("b3261e"[i:i + 2], 16) for i in (0, 2, 4))  # the circled signals' red
    pixels = np.asarray(image).reshape(-1, 3)
    assert int(np.all(pixels == signal, axis=1).sum()) > 50
