"""The cell certificate and the cell JSON: pure renders of a cell's standing decision.

A CellSummary is built here by hand (invented cells), rendered to JSON, HTML and a real
PDF (WeasyPrint with the shipped font), and read back with pypdf: the standing verdict
and why on page 1, the stage records with their SHA-256, the readings and K-value, the
lot screens and reviews, the cautions of a failed or held cell, nothing off the page.
"""

from __future__ import annotations

import dataclasses
import datetime
import functools
import io
import json
import re

import jsonschema
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from pypdf import PdfReader

from pipeline.acceptance.results import RuleSetRef
from pipeline.report import cellcertificate, cellresult, pdf
from pipeline.report.cellsummary import (
    AgingEntry,
    CellSummary,
    CheckEntry,
    DecisionEntry,
    ReadingEntry,
    ReviewEntry,
    ScreenEntry,
    StageEntry,
    standing_why,
)
from tests.conftest import REPO

T0 = datetime.datetime(2026, 3, 2, 8, 0, tzinfo=datetime.UTC)
SHA_F, SHA_G, SHA_R = "f1" * 32, "a7" * 32, "0c" * 32
CODE = "1a2b3c4d5e6f7a8b"


def _at(hours: float) -> datetime.datetime:
    return T0 + datetime.timedelta(hours=hours)


def _decision(n: int, verdict: str, reason: str = "", **kw: object) -> DecisionEntry:
    fields: dict[str, object] = {"hazards": (), "grade": None, "cause": "record", "review_id": None}
    fields.update(kw)
    return DecisionEntry(n, verdict, reason, decided_at=_at(n), **fields)  # type: ignore[arg-type]


def summary(
    decision: DecisionEntry | None = None,
    *,
    cell_id: str = "INV-0042",
    reviews: tuple[ReviewEntry, ...] = (),
    records: tuple[StageEntry, ...] | None = None,
) -> CellSummary:
    """An invented cell in three stages: formation and grading files, two aging readings."""
    standing = decision or _decision(
        3, "hold", "outlier in lot: k_value_mV_per_day 1.8 mV/day > lot limit 0.597 mV/day",
        cause="lot closed",
    )
    history = (
        _decision(1, "hold", "waiting for stage aging; waiting for stage grading"),
        _decision(2, "pass", cause="readings"),
        standing,
    )
    stage_records = records if records is not None else (
        StageEntry(("formation",), ("formation",), "INV-0042_formation.csv", SHA_F, "pass", "", (),
                   _at(0), "invented-rules 7", (("first_cycle_efficiency", 0.8931),
                                                ("irreversible_capacity_Ah", 0.55),
                                                ("max_temperature_C", 25.7)),
                   "INV-0042~formation.json", "INV-0042~formation.pdf"),
        StageEntry(("grading",), ("grading",), "INV-0042_grading.csv", SHA_G, "pass", "", (),
                   _at(200), "invented-rules 7", (("grading_capacity_Ah", 5.0629),
                                                  ("grading_energy_Wh", 18.46),
                                                  ("dcir_mOhm", 23.09),
                                                  ("rest_voltage_drift_mV_per_h", -0.0168),
                                                  ("max_temperature_C", None)),
                   "INV-0042~grading.json", "INV-0042~grading.pdf"),
    )
    return CellSummary(
        cell_id=cell_id,
        lot="INV-LOT-9",
        cell_type="INV-5AH",
        nominal_capacity_ah=5.0,
        rule_set=RuleSetRef("invented-rules", "7", "9e" * 32, "invented.toml", "lithium-ion"),
        station="line-9",
        software_version="0.1.0",
        needed=("formation", "aging", "grading"),
        missing=(),
        decision=standing,
        history=history,
        records=stage_records,
        aging=AgingEntry(
            "pass", "", 1.8, 7.0, "",
            (ReadingEntry(_at(24), 3.6225, 19.3, 26.6, "INV-LOT-9_aging.csv", SHA_R),
             ReadingEntry(_at(192), 3.6099, 20.9, 23.4, "INV-LOT-9_aging.csv", SHA_R)),
            (CheckEntry("k_value", "k_value_mV_per_day", 1.8, None, 2.0, "reject", "in_window"),),
        ),
        screens=(ScreenEntry("self_discharge", "k_value_mV_per_day", 6.0, "high", 1.8, "outlier",
                             "k_value_mV_per_day 1.8 mV/day > lot limit 0.597 mV/day"),),
        reviews=reviews,
        json_name=f"{cell_id}~cell.json",
        certificate_name=f"{cell_id}~cell.pdf",
    )


@functools.cache
def _pdf(s: CellSummary) -> bytes:
    return pdf.render_pdf(cellcertificate.render_html(s, code=CODE))


def _pages(data: bytes) -> list[str]:
    return [" ".join(p.extract_text().split()) for p in PdfReader(io.BytesIO(data)).pages]


SCHEMA = json.loads((REPO / "docs" / "cell.schema.json").read_text(encoding="utf-8"))


def test_the_published_schema_is_the_codes_and_every_document_matches_it() -> None:
    assert (REPO / "docs" / "cell.schema.json").read_text(encoding="utf-8") == (
        cellresult.schema_text()
    ), "run: python -m pipeline.report.cellresult > docs/cell.schema.json"
    validator = jsonschema.Draft202012Validator(SCHEMA)
    fail = _decision(3, "fail", "grading_capacity_Ah 4.491 Ah < 5 Ah (reject)",
                     hazards=("abnormal_capacity",))
    for s in (summary(), summary(fail), dataclasses.replace(summary(), aging=None, screens=(),
                                                            certificate_name=None)):
        document = json.loads(cellresult.to_json(s))
        validator.validate(document)
        assert document["standing"]["verdict"] == s.decision.verdict
        assert document["history"][-1]["decision_id"] == s.decision.id
    assert cellresult.to_json(summary()) == cellresult.to_json(summary())  # no clock inside


def test_page_one_says_the_standing_verdict_why_and_what_the_certificate_covers() -> None:
    page1 = _pages(_pdf(summary()))[0]
    assert "Cell certificate" in page1 and "HOLD" in page1
    assert "This certificate covers cell INV-0042 as a whole" in page1
    assert page1.index("covers cell INV-0042") < page1.index("HOLD")
    assert "lot screen: k_value_mV_per_day 1.8 mV/day > lot limit 0.597 mV/day" in page1
    # a held cell carries the caution: it must not be released; the site's procedures decide
    assert "Caution: this cell is held and must not be released until reviewed" in page1
    assert "local codes" in page1 and "qualified personnel" in page1


def test_the_certificate_lists_each_stage_record_the_readings_screens_and_history() -> None:
    text = " ".join(_pages(_pdf(summary())))
    squeezed = text.replace(" ", "")
    for name, sha in (("INV-0042_formation.csv", SHA_F), ("INV-0042_grading.csv", SHA_G)):
        assert name in text and sha in squeezed  # each record's file and whole SHA-256
    assert "INV-0042~grading.pdf" in text and "counts for grading" in text
    assert "grading capacity 5.063 Ah" in text and "first-cycle efficiency 89.31 %" in text
    assert "K-value 1.80 mV/day over 7.0 days" in text
    assert "3.6225 V" in text and "3.6099 V" in text and "INV-LOT-9_aging.csv" in text
    assert "self_discharge" in text and "OUTLIER" in text
    assert "No person has reviewed this cell." in text
    assert "HOLD (standing)" in text and "its lot was closed" in text
    assert "INV-0042~cell.json" in text and CODE in squeezed


def test_a_review_shows_who_when_and_why_and_decides_the_cell() -> None:
    review = ReviewEntry(4, "release", None, ("capacity",), "A. Quality-Engineer",
                         "capacity 0.2 % under, accepted as a concession for a test build",
                         _at(300), 3)
    standing = _decision(5, "pass", "released on review 4", cause="review", review_id=4)
    s = summary(standing, reviews=(review,))
    why = standing_why(s)
    assert why[0].startswith("review 4: release, accepting capacity by A. Quality-Engineer")
    text = " ".join(_pages(_pdf(s)))
    assert "PASS" in _pages(_pdf(s))[0]
    assert "A. Quality-Engineer" in text and "accepted as a concession" in text
    assert "2026-03-14 20:00 UTC" in text and "decision 3" in text


def test_a_failed_cell_carries_its_hazard_cautions_and_a_waiting_cell_none() -> None:
    fail = _decision(3, "fail", "max_temperature_C 62.7 °C > 60 °C (reject)",
                     hazards=("over_temperature",))
    page1 = _pages(_pdf(summary(fail)))[0]
    assert "FAIL" in page1 and "Caution: this cell failed and may be hazardous" in page1
    assert "Over-temperature during formation" in page1 and "qualified personnel" in page1
    waiting = _decision(3, "hold", "waiting for stage grading")
    page1 = _pages(_pdf(summary(waiting)))[0]
    assert "waits for a stage" in page1 and "Caution" not in page1
    passed = _decision(3, "pass", grade="A", cause="lot closed")
    page1 = _pages(_pdf(summary(passed)))[0]
    assert "PASS" in page1 and "Grade A" in page1 and "Caution" not in page1


def test_identifiers_from_data_are_escaped_and_long_ones_stay_on_the_page() -> None:
    hostile = '<img src="file:///etc/passwd">' + "X" * 180
    long_name = "DEMO_" + "very-long-file-name-" * 12 + ".csv"
    records = tuple(
        dataclasses.replace(r, file=long_name) for r in summary().records
    )
    s = summary(cell_id=hostile, records=records)
    html = cellcertificate.render_html(s, code=CODE)
    assert "<img" not in html and "&lt;img" in html
    assert pdf.parse_xhtml(html, pdf.BASE_URL, pdf.TemplateFetcher()) is not None  # the fast path
    document = pdf.lay_out(html)
    for page in document.pages:
        width = page.width
        for box in page._page_box.descendants():
            right = box.position_x + box.margin_width()
            assert right <= width + 0.5, (type(box).__name__, right, width)


def test_the_same_summary_gives_the_same_pdf_bytes() -> None:
    s = dataclasses.replace(summary(), station="line-9b")
    first = pdf.render_pdf(cellcertificate.render_html(s, code=CODE))
    assert first == pdf.render_pdf(cellcertificate.render_html(s, code=CODE))
    meta = PdfReader(io.BytesIO(first)).metadata
    assert meta is not None and meta.title == "Cell certificate for cell INV-0042: HOLD"


VERDICTS = st.sampled_from(["pass", "fail", "hold"])
CAUSES = st.sampled_from(["record", "readings", "lot closed", "rules"])
REASONS = st.sampled_from(["", "waiting for stage aging", "dcir_mOhm 41 mOhm > 35 mOhm (review)",
                           "outlier in lot: grading_capacity_Ah 4.6 Ah < lot limit 4.8 Ah"])


@st.composite
def histories(draw: st.DrawFn) -> tuple[DecisionEntry, ...]:
    out = []
    for n in range(1, draw(st.integers(1, 6)) + 1):
        verdict = draw(VERDICTS)
        reason = "" if verdict == "pass" else draw(REASONS) or "held by a test"
        grade = draw(st.sampled_from([None, "A", "B"])) if verdict == "pass" else None
        out.append(_decision(n, verdict, reason, grade=grade, cause=draw(CAUSES)))
    return tuple(out)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(history=histories())
def test_the_certificate_and_json_always_show_the_latest_decision(
    history: tuple[DecisionEntry, ...],
) -> None:
    s = dataclasses.replace(summary(history[-1]), history=history)
    document = json.loads(cellresult.to_json(s))
    assert document["standing"]["verdict"] == history[-1].verdict
    assert document["standing"]["decision_id"] == history[-1].id
    assert document["standing"]["grade"] == history[-1].grade
    html = cellcertificate.render_html(s, code=CODE)
    (word,) = re.findall(r'<p class="verdict-word">(\w+)</p>', html)
    assert word == history[-1].verdict.upper()
    assert html.count("(standing)") == 1
    assert bool(standing_why(s)) or history[-1].verdict == "pass"


def test_a_cell_passed_on_one_record_alone_has_a_one_page_certificate() -> None:
    """The most common cell of a line: one file holding the whole program, passed, no readings,
    no lot screen, no review. Its certificate is one page, traceability included, and a rule
    set without lot screens says so in a line, not in an empty table."""
    whole = StageEntry(("formation", "grading"), ("formation", "grading"), "INV-0042.csv", SHA_F,
                       "pass", "", (), _at(0), "invented-rules 7",
                       (("grading_capacity_Ah", 5.0629), ("dcir_mOhm", 23.09)),
                       "INV-0042.json", "INV-0042.pdf")
    s = dataclasses.replace(
        summary(_decision(1, "pass", cause="record"), records=(whole,)),
        needed=("formation", "grading"), history=(_decision(1, "pass", cause="record"),),
        aging=None, screens=(),
    )
    pages = _pages(_pdf(s))
    assert len(pages) == 1, f"{len(pages)} pages"
    assert "Traceability" in pages[0] and "Verification code" in pages[0]
    assert "The rule set has no lot screen." in pages[0]
    assert "Screen / metric" not in pages[0]  # no table header over nothing


def test_a_cell_released_over_a_hazard_keeps_its_caution_and_says_who_released_it() -> None:
    """A concession its rule set allows over a safety hazard passes the cell, but the hazard
    stays: its caution, the handling words and the general caution stay on page 1, and the
    why names the concession, who made it and the hazard it was made over (the JSON too)."""
    hot = StageEntry(("formation", "grading"), ("formation", "grading"), "INV-0042.csv", SHA_F,
                     "fail", "max_temperature_C 62.7 °C > 60 °C (reject)", ("over_temperature",),
                     _at(0), "invented-rules 7", (("max_temperature_C", 62.7),),
                     "INV-0042.json", "INV-0042.pdf")
    review = ReviewEntry(4, "release", None, ("temperature_limit",), "A. Quality-Engineer",
                         "thermocouple misread, cell measured cold", _at(30), 3)
    standing = _decision(
        5, "pass", "released as a concession by A. Quality-Engineer accepting temperature_limit: "
        "thermocouple misread, cell measured cold",
        hazards=("over_temperature",), cause="review", review_id=4)
    s = dataclasses.replace(
        summary(standing, reviews=(review,), records=(hot,)),
        needed=("formation", "grading"), aging=None, screens=(),
        history=(_decision(3, "fail", hot.decision, hazards=("over_temperature",)), standing),
    )
    page1 = _pages(_pdf(s))[0]
    assert "PASS" in page1
    assert "every stage it needs has passed" not in page1  # it is no clean pass
    assert "Caution" in page1 and "released" in page1.split("Caution", 1)[1]
    assert "Over-temperature during formation" in page1
    assert "Treat the cell as possibly unstable" in page1  # the handling words
    assert "local codes" in page1 and "qualified personnel" in page1
    line = ("released as a concession by A. Quality-Engineer over the safety hazard "
            "over_temperature")
    assert any(w.startswith(line) for w in standing_why(s)), standing_why(s)
    assert line in page1
    document = json.loads(cellresult.to_json(s))
    assert any(w.startswith(line) for w in document["standing"]["why"])
    assert document["standing"]["hazards"] == ["over_temperature"]
