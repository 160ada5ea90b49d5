"""The lot report's pages as laid out: nothing past the margins, no page left mostly empty,
no histogram of a metric no cell has a value of.

Invented lot as in test_lot_report, with the checks a line with plateau and aging checks has:
some of them on metrics no cell of the lot carries (the demo's LFP aging lot is such a lot).
"""

from __future__ import annotations

import dataclasses
import re
from typing import Any

import pytest

from pipeline.judge.lotstats import WindowSpec
from pipeline.report import pdf
from pipeline.report.lotreport import (
    LotReportInput,
    lot_report_context,
    render_lot_report_html,
    render_lot_report_pdf,
)
from tests.test_lot_report import CHECKS, invented_lot, pdf_text

MANY_CHECKS = (
    *CHECKS,
    WindowSpec("first_cycle_efficiency", 0.8, 0.96, name="first_efficiency"),
    WindowSpec("grading_coulombic_efficiency", 0.98, 1.01, name="grading_efficiency"),
    WindowSpec("max_temperature_C", None, 45.0, name="temperature"),
    WindowSpec("main_plateau_voltage_V", 3.0, 4.2, name="plateau_voltage", severity="review"),
    WindowSpec("main_plateau_length_pct", None, 5.0, name="plateau_length", severity="review"),
    WindowSpec("k_value_mV_per_day", None, 2.0, name="k_value"),
)


@pytest.fixture(scope="module")
def many_checks_lot() -> LotReportInput:
    base = invented_lot(n=60)
    cells = tuple(
        dataclasses.replace(c, values={**c.values, "first_cycle_efficiency": 0.9 + i * 1e-4,
                                       "grading_coulombic_efficiency": 0.995, "max_temperature_C": 25.0 + i % 3,
                                       "k_value_mV_per_day": 0.4 + 0.01 * (i % 7)})
        for i, c in enumerate(base.cells)
    )
    return dataclasses.replace(base, cells=cells, checks=MANY_CHECKS)


def _pages(data: LotReportInput) -> Any:
    return pdf.lay_out(render_lot_report_html(data)).pages


def test_nothing_on_a_lot_report_page_reaches_past_its_margins(many_checks_lot: LotReportInput) -> None:
    """Every box of the body lies within the page's content area (A4 less margins): the
    capability table with its notes ("fewer than 2 values") used to reach 204 mm."""
    for number, page in enumerate(_pages(many_checks_lot), start=1):
        page_box = page._page_box
        left = page_box.content_box_x()
        right = left + page_box.width
        body = page_box.children[0]
        for box in body.descendants():
            if box.width is None or not box.element_tag:
                continue
            far = box.position_x + box.margin_width()
            assert left - 0.01 <= box.position_x and far <= right + 0.01, (
                f"page {number}: <{box.element_tag} class={box.element.get('class')}> "
                f"runs {far - right:.1f} px past the right margin"
            )


@pytest.mark.parametrize("failures", [True, False], ids=["with failed cells", "every cell passed"])
def test_no_page_but_the_last_is_left_mostly_empty(many_checks_lot: LotReportInput, failures: bool) -> None:
    """A page before the last is filled to at least half its height (the histograms no longer
    start on a page of their own behind a short capability table)."""
    data = many_checks_lot if failures else dataclasses.replace(
        many_checks_lot, cells=tuple(c for c in many_checks_lot.cells if c.verdict == "pass"))
    pages = _pages(data)
    assert len(pages) >= 2
    for number, page in enumerate(pages[:-1], start=1):
        page_box = page._page_box
        top = page_box.content_box_y()
        body = page_box.children[0]
        bottom = max(
            (b.position_y + b.margin_height() for b in body.descendants()
             if b.height is not None and b.element_tag and b.element_tag not in ("html", "body", "footer")),
            default=top,
        )
        assert bottom - top >= 0.5 * page_box.height, f"page {number} is filled to {(bottom - top) / page_box.height:.0%}"


def test_a_metric_no_cell_has_a_value_of_gets_a_sentence_not_an_empty_histogram(
    many_checks_lot: LotReportInput,
) -> None:
    context = lot_report_context(many_checks_lot)
    shown = [h["metric"] for h in context["histograms"]]  # type: ignore[attr-defined]
    assert "main_plateau_voltage_V" not in shown and "main_plateau_length_pct" not in shown
    assert context["no_values"] == "main_plateau_voltage_V, main_plateau_length_pct"
    text = pdf_text(render_lot_report_pdf(many_checks_lot))
    assert "No cell of the lot has a value of main_plateau_voltage_V, main_plateau_length_pct: no histogram." in text
    assert not re.search(r"\b0 cells with a value", text) and "no cell has a value" not in text
