"""Tests of the lot report (PDF) and the lot export (CSV) on invented lots.

The lots are invented: cell type "NX-20 test cell", lots "L-TEST-...", station "bench-3".
Statistics shown on the page are checked against numpy computed here independently.
"""

from __future__ import annotations

import csv
import dataclasses
import datetime
import doctest
import io
import math
import re
import types
from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd
import pytest
from pypdf import PdfReader

from pipeline.acceptance.rules import Hazard
from pipeline.judge.lotstats import GradeClass, ScreenSpec, WindowSpec, grade_of
from pipeline.report import exportvalues, hazards, lothistogram, lotreport, lotwords
from pipeline.report.lothistogram import histogram_edges
from pipeline.report.lotreport import (
    LotCell,
    LotReportInput,
    RuleSetRef,
    lot_export_csv,
    lot_report_context,
    render_lot_report_html,
    render_lot_report_pdf,
)

UTC = datetime.UTC
T0 = datetime.datetime(2026, 3, 2, 8, 0, tzinfo=UTC)
CAP, DCIR, DRIFT = "grading_capacity_Ah", "dcir_mOhm", "rest_voltage_drift_mV_per_h"
UNITS = {CAP: "Ah", DCIR: "mOhm", DRIFT: "mV/h"}
CHECKS = (
    WindowSpec(CAP, 19.6, 20.6, name="capacity"),
    WindowSpec(DCIR, None, 2.0, name="resistance"),
    WindowSpec(DRIFT, -1.0, None, name="self_discharge"),
)
SCREENS = (ScreenSpec(CAP, k=4.0, min_cells=30), ScreenSpec(DRIFT, k=6.0, min_cells=30, sides="low"))
GRADES = (GradeClass("A", {CAP: (20.15, None)}), GradeClass("B", {CAP: (19.9, 20.15)}))
RULES = RuleSetRef("nx20-formation", "4", "ab" * 32, "lithium-ion")


def _records(cell_id: str) -> tuple[tuple[str, str, str], ...]:
    return (("formation", f"{cell_id}-form.csv", "1f" * 32), ("grading", f"{cell_id}-grade.csv", "2e" * 32))


def _cell(cell_id: str, verdict: str, values: dict[str, float | None], *, reason: str = "",
          hazard: tuple[str, ...] = (), grade: str | None = None, minute: int = 0) -> LotCell:
    return LotCell(cell_id, verdict, reason, grade, hazard, values, _records(cell_id),
                   T0 + datetime.timedelta(minutes=minute))


def invented_lot(n: int = 60, seed: int = 7, *, family: str | None = "lithium-ion",
                 failures: bool = True, closed: bool = True, lot: str = "L-TEST-0042") -> LotReportInput:
    """A seeded lot: noisy values, three fails with hazards, a hold, one outlier in the window."""
    rng = np.random.default_rng(seed)
    cap = rng.normal(20.1, 0.08, n)
    dcir = rng.normal(1.5, 0.08, n)
    drift = rng.normal(-0.2, 0.04, n)
    cells: list[LotCell] = []
    for i in range(n):
        cid = f"NX-{i:04d}"
        values: dict[str, float | None] = {CAP: float(cap[i]), DCIR: float(dcir[i]), DRIFT: float(drift[i])}
        cells.append(_cell(cid, "pass", values, grade=grade_of(values, GRADES), minute=i))
    if failures:
        cells[3] = _cell("NX-0003", "fail", {CAP: 19.2, DCIR: 1.5, DRIFT: -0.2},
                         reason="capacity 19.20 Ah is below 19.60 Ah", hazard=("abnormal_capacity",))
        cells[11] = _cell("NX-0011", "fail", {CAP: 20.0, DCIR: 1.55, DRIFT: -3.5},
                          reason="self_discharge -3.50 mV/h is below -1.00 mV/h", hazard=("internal_short",))
        cells[25] = _cell("NX-0025", "fail", {CAP: 20.1, DCIR: 2.6, DRIFT: -0.21},
                          reason="resistance 2.60 mOhm is above 2.00 mOhm")
        cells[40] = _cell("NX-0040", "hold", {CAP: 20.05, DCIR: None, DRIFT: -0.19},
                          reason="resistance not measured: no rest before the pulse")
    # inside the capacity window, yet far from the lot: the screen's outlier
    cells[50] = _cell("NX-0050", "pass", {CAP: 20.55, DCIR: 1.5, DRIFT: -0.2}, grade="A")
    return LotReportInput(
        lot=lot, cell_types=("NX-20 test cell",), rule_set=RuleSetRef(RULES.name, RULES.revision, RULES.sha256, family),
        station="bench-3", generated_at=T0 + datetime.timedelta(days=1),
        closed_at=T0 + datetime.timedelta(hours=20) if closed else None, cells=tuple(cells),
        checks=CHECKS, screens=SCREENS, grades=GRADES, units=UNITS,
    )


def _context(data: LotReportInput) -> dict[str, Any]:
    """The report's context, typed loosely for reading in tests."""
    return lot_report_context(data)


def pdf_text(pdf: bytes) -> str:
    """The PDF's text, pages joined, whitespace collapsed (table cells may wrap)."""
    reader = PdfReader(io.BytesIO(pdf))
    return re.sub(r"\s+", " ", " ".join(page.extract_text() or "" for page in reader.pages))


@pytest.fixture(scope="module")
def lot() -> LotReportInput:
    return invented_lot()


@pytest.fixture(scope="module")
def lot_pdf(lot: LotReportInput) -> bytes:
    return render_lot_report_pdf(lot)


@pytest.fixture(scope="module")
def lot_pdf_text(lot_pdf: bytes) -> str:
    return pdf_text(lot_pdf)


def test_the_pdf_names_the_lot_its_yield_and_every_failed_cell(lot: LotReportInput, lot_pdf_text: str) -> None:
    text = lot_pdf_text
    assert "Lot report" in text and "L-TEST-0042" in text
    assert "nx20-formation, revision 4" in text and "ab" * 32 in text
    # the yield is passed / total (definition of first-pass yield: common practice)
    passed = sum(c.verdict == "pass" for c in lot.cells)
    assert f"{100 * passed / len(lot.cells):.1f} %" in text
    assert f"Yield: {passed} of {len(lot.cells)} cells passed." in text
    for cell in lot.cells:
        if cell.verdict in ("fail", "hold"):
            assert cell.cell_id in text
            assert cell.reason in text
    assert "qualified personnel" in text
    assert hazards.CAUTIONS[Hazard.INTERNAL_SHORT].title in text
    assert hazards.CAUTIONS[Hazard.ABNORMAL_CAPACITY].title in text
    assert "3 cells of this lot failed" in text
    assert "a data check, not a safety assessment" in text


def test_the_pdf_shows_capability_screens_histogram_labels_and_grades(
    lot: LotReportInput, lot_pdf_text: str
) -> None:
    text = lot_pdf_text
    context = _context(lot)
    for row in context["capabilities"]:
        assert f"{row['n']} {row['mean']} {row['sd']} {row['cpk']}" in text
    assert "lot limits" in text and "window" in text
    assert "NX-0050" in text  # the outlier inside the window
    assert "Grade A" in text and "Grade B" in text and "Ungraded" in text
    grades = context["grades"]
    for name, count in grades["rows"]:
        assert f"Grade {name} {count}" in text
    assert "closed at 2026-03-03T04:00:00Z" in text
    assert "figures may change" not in text


def test_cpk_shown_equals_the_textbook_formula(lot: LotReportInput) -> None:
    # Cpk = min(USL - mean, mean - LSL) / (3 s), s the sample standard deviation; for a
    # window with only an upper limit, (USL - mean) / (3 s) -- Montgomery, Introduction to
    # Statistical Quality Control (from memory: the definition is the same in every edition)
    x = np.array([c.values[DCIR] for c in lot.cells if c.values.get(DCIR) is not None], dtype=float)
    expected = (2.0 - x.mean()) / (3 * x.std(ddof=1))
    row = next(r for r in _context(lot)["capabilities"] if r["check"] == "resistance")
    assert row["cpk"] == f"{expected:.2f}"
    assert row["n"] == str(x.size)
    cap = np.array([c.values[CAP] for c in lot.cells], dtype=float)
    both = min(20.6 - cap.mean(), cap.mean() - 19.6) / (3 * cap.std(ddof=1))
    row = next(r for r in _context(lot)["capabilities"] if r["check"] == "capacity")
    assert row["cpk"] == f"{both:.2f}"
    assert (row["note"] == "below 1.33") == (both < 1.33)


def test_a_low_cpk_is_said_in_words() -> None:
    lot = invented_lot()
    wide = tuple(WindowSpec(c.metric, c.low, c.high, name=c.name) if c.name != "capacity"
                 else WindowSpec(CAP, 19.95, 20.3, name="capacity") for c in CHECKS)
    data = LotReportInput(**{**{f: getattr(lot, f) for f in lot.__dataclass_fields__}, "checks": wide})
    row = next(r for r in _context(data)["capabilities"] if r["check"] == "capacity")
    assert float(row["cpk"]) < 1.33 and row["note"] == "below 1.33"
    assert "below 1.33" in pdf_text(render_lot_report_pdf(data))


def test_histogram_bins_follow_freedman_diaconis_within_the_cap(lot: LotReportInput) -> None:
    # bin width 2 IQR n^(-1/3) -- Freedman & Diaconis 1981, as numpy implements it
    context = _context(lot)
    html = render_lot_report_html(lot)
    svgs = re.findall(r"<svg .*?</svg>", html, flags=re.S)
    assert len(svgs) == len(context["histograms"]) == 3
    for plot, svg in zip(context["histograms"], svgs, strict=True):
        x = np.array([c.values.get(plot["metric"]) for c in lot.cells], dtype=float)
        x = x[np.isfinite(x)]
        fd = len(np.histogram_bin_edges(x, bins="fd")) - 1
        assert plot["bins"] == min(max(fd, 5), 40)
        assert svg.count('class="bar"') == plot["bins"]
        assert "window" in svg
    assert "lot limits" in svgs[0]  # the capacity screen is applied


@pytest.mark.parametrize("n, spread", [(3, 1.0), (500, 1.0), (2000, 0.0)])
def test_histogram_edges_are_clipped_to_the_cap(n: int, spread: float) -> None:
    rng = np.random.default_rng(n)
    x = rng.normal(0, 1, n) * spread
    if n == 500:
        x[:3] = [1e4, -1e4, 5e3]  # a few wild values: Freedman-Diaconis would want thousands
    fd = len(np.histogram_bin_edges(x, bins="fd")) - 1
    assert len(histogram_edges(x)) - 1 == min(max(fd, 5), 40)


def test_yield_in_context_is_passed_over_total(lot: LotReportInput) -> None:
    context = _context(lot)
    passed = sum(c.verdict == "pass" for c in lot.cells)
    assert context["yield"] == f"{100 * passed / len(lot.cells):.1f} %"
    assert math.isclose(float(str(context["yield"]).split()[0]), round(100 * passed / 60, 1))


def test_failed_table_lists_fails_first() -> None:
    rows = _context(invented_lot())["failed"]
    assert [r["cell_id"] for r in rows] == ["NX-0003", "NX-0011", "NX-0025", "NX-0040"]
    assert [r["verdict"] for r in rows] == ["FAIL", "FAIL", "FAIL", "HOLD"]


def test_a_lot_without_failures_has_no_caution_box() -> None:
    data = invented_lot(failures=False)
    html = render_lot_report_html(data)
    assert 'class="caution"' not in html
    assert "qualified personnel" not in pdf_text(render_lot_report_pdf(data)).replace(
        hazards.DATA_CHECK_NOTICE.split("by ")[-1], "")
    assert "Every cell of the lot passed." in html


def test_a_sodium_ion_lot_with_a_failed_cell_gets_the_sodium_ion_caution() -> None:
    data = invented_lot(family="sodium-ion")
    text = pdf_text(render_lot_report_pdf(data))
    assert "UN 3551" in text and "qualified personnel" in text
    assert "do not simply carry over" in text


def test_an_open_lot_says_its_figures_may_change() -> None:
    data = invented_lot(closed=False)
    text = pdf_text(render_lot_report_pdf(data))
    assert "lot open: figures may change" in text.lower()


def test_identifiers_are_escaped() -> None:
    lot = invented_lot(lot="<b>L&1</b>")
    html = render_lot_report_html(lot)
    assert "<b>L&1</b>" not in html and "&lt;b&gt;L&amp;1&lt;/b&gt;" in html


def test_same_input_same_pdf(lot: LotReportInput, lot_pdf: bytes) -> None:
    assert render_lot_report_pdf(lot) == lot_pdf


# -- the export ---------------------------------------------------------------------------------


def _rows(data: LotReportInput) -> list[dict[str, str]]:
    return list(csv.DictReader(io.StringIO(lot_export_csv(data).decode("utf-8"), newline="")))


def test_export_has_one_row_per_cell_with_exact_values(lot: LotReportInput) -> None:
    rows = _rows(lot)
    assert [r["cell_id"] for r in rows] == sorted(c.cell_id for c in lot.cells)
    assert list(rows[0])[:16] == ["lot", "cell_id", "cell_type", "stage", "channel", "station", "verdict",
                                  "grade", "reason", "hazards", CAP, f"{CAP}_U", DCIR, f"{DCIR}_U",
                                  DRIFT, f"{DRIFT}_U"]
    assert list(rows[0])[-2:] == ["records", "decided_at"]
    by_id = {c.cell_id: c for c in lot.cells}
    for row in rows:
        cell = by_id[row["cell_id"]]
        assert row["verdict"] == cell.verdict and row["grade"] == (cell.grade or "")
        for metric in (CAP, DCIR, DRIFT):
            value = cell.values.get(metric)
            assert row[metric] == ("" if value is None else row[metric])
            if value is not None:  # rounded to the metric's resolution, then repr round-trips it
                assert float(row[metric]) == round(value, exportvalues.export_decimals(metric))
        assert datetime.datetime.fromisoformat(row["decided_at"]) == cell.decided_at
        assert row["records"].split(";")[0] == f"formation:{cell.cell_id}-form.csv:{'1f' * 32}"
    held = next(r for r in rows if r["cell_id"] == "NX-0040")
    assert held[DCIR] == "" and held["verdict"] == "hold"
    assert next(r for r in rows if r["cell_id"] == "NX-0011")["hazards"] == "internal_short"


def test_export_reads_back_with_pandas(lot: LotReportInput) -> None:
    frame = pd.read_csv(io.BytesIO(lot_export_csv(lot)), dtype={"grade": "string"})
    assert len(frame) == len(lot.cells)
    assert frame[DCIR].isna().sum() == 1
    expected = np.array([round(c.values[CAP], 5) for c in sorted(lot.cells, key=lambda c: c.cell_id)])
    np.testing.assert_array_equal(frame[CAP].to_numpy(), expected)


def test_export_guards_formula_like_text_and_keeps_extra_metrics_sorted() -> None:
    base = invented_lot()
    odd = (
        _cell("=1+1", "fail", {CAP: 19.0, "zeta_metric": 1.5, "alpha_metric": None},
              reason="-capacity low", hazard=("internal_short",), grade=None),
        _cell("@SUM(A1)", "pass", {CAP: 20.0, "alpha_metric": -0.25}, grade="+B"),
    )
    data = LotReportInput(**{**{f: getattr(base, f) for f in base.__dataclass_fields__},
                             "cells": base.cells + odd})
    rows = _rows(data)
    header = list(rows[0])
    assert header[10:20:2] == [CAP, DCIR, DRIFT, "alpha_metric", "zeta_metric"]
    assert header[11:21:2] == [f"{m}_U" for m in header[10:20:2]]  # each value's U beside it
    by_id = {r["cell_id"]: r for r in rows}
    assert "'=1+1" in by_id and "'@SUM(A1)" in by_id
    assert by_id["'=1+1"]["reason"] == "'-capacity low"
    assert by_id["'@SUM(A1)"]["grade"] == "'+B"
    assert by_id["'@SUM(A1)"]["alpha_metric"] == "-0.25"  # a number is never guarded
    assert by_id["'=1+1"]["alpha_metric"] == ""


@pytest.mark.parametrize("module", [lotreport, lotwords, lothistogram, exportvalues], ids=lambda m: m.__name__)
def test_the_doctests_hold(module: types.ModuleType) -> None:
    failures, tried = doctest.testmod(module)
    assert tried > 0 and failures == 0


# -- a large lot ---------------------------------------------------------------------------------


def _big(n: int, failed_every: int) -> Sequence[LotCell]:
    rng = np.random.default_rng(11)
    cap, dcir, drift = rng.normal(20.1, 0.08, n), rng.normal(1.5, 0.08, n), rng.normal(-0.2, 0.04, n)
    cells = []
    for i in range(n):
        fail = i % failed_every == 0
        cells.append(LotCell(
            f"BX-{i:05d}", "fail" if fail else "pass", "capacity below window" if fail else "", None,
            ("abnormal_capacity",) if fail else (),
            {CAP: float(cap[i]) - (1.0 if fail else 0.0), DCIR: float(dcir[i]), DRIFT: float(drift[i])},
            (), T0,
        ))
    return cells


def test_a_ten_thousand_cell_lot_renders_with_capped_tables() -> None:
    base = invented_lot()
    cells = tuple(_big(10_000, 25))
    screens = (ScreenSpec(CAP, k=1.5, min_cells=30),)  # a tight screen: hundreds of outliers
    data = LotReportInput(**{**{f: getattr(base, f) for f in base.__dataclass_fields__},
                             "cells": cells, "screens": screens})
    context = _context(data)
    assert len(context["failed"]) == lotreport.MAX_FAILED_ROWS
    assert context["failed_more"] == 400 - lotreport.MAX_FAILED_ROWS
    screen = context["screens"][0]
    assert len(screen["outliers"]) == lotreport.MAX_OUTLIER_ROWS and screen["more"] > 0
    pdf = render_lot_report_pdf(data)
    text = pdf_text(pdf)
    assert "and 200 more: see the export" in text
    assert len(PdfReader(io.BytesIO(pdf)).pages) < 15
    assert len(_rows(data)) == 10_000


def test_export_gives_each_value_its_uncertainty_rounded_up_at_the_metrics_resolution(
    lot: LotReportInput,
) -> None:
    cell = lot.cells[0]
    sure = dataclasses.replace(cell, uncertainty={CAP: 0.0081234})
    data = dataclasses.replace(lot, cells=(sure,))
    (row,) = _rows(data)
    assert row[f"{CAP}_U"] == "0.00813"  # never rounded down: a value is not surer than it is
    assert row[f"{DCIR}_U"] == ""  # none recorded
