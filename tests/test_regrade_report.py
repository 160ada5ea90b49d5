"""The regrade change report: its page 1 names the run and its rule sets, its CSV every change."""

from __future__ import annotations

import csv
import datetime
import io

from pypdf import PdfReader

from pipeline.report.regradereport import (
    ChangedCell,
    CheckLine,
    RegradeReportInput,
    regrade_csv,
    render_regrade_pdf,
)

SHA = "ab" * 32
T0 = datetime.datetime(2026, 11, 30, 9, 0, tzinfo=datetime.UTC)


def _data(applied: bool = False) -> RegradeReportInput:
    tightened = CheckLine("DEMO-LOT-01_L01-007.csv", "capacity", "grading_capacity_Ah", 18.95, 18.95,
                          (18.9, 21.0), (19.0, 21.0), "in_window", "out_of_window")
    return RegradeReportInput(
        station="Hall B formation", run_by="q.engineer", reason="customer tightened capacity",
        selection="lots DEMO-LOT-01", started_at=T0, applied=applied, regrade_id=3 if applied else None,
        rule_sets=(("lfp_graphite", "8", SHA),), rules_digest="cd" * 32, inputs=20, cells=20,
        changed=(
            ChangedCell("DEMO-LOT-01", "L01-007", "pass", "fail", "",
                        "grading_capacity_Ah 18.95 Ah < 19.00 Ah", (), None, None, False, (tightened,)),
            ChangedCell("DEMO-LOT-01", "L01-011", "pass", "fail", "", "grading_capacity_Ah 18.97 Ah",
                        (), None, None, True, ()),
        ),
        family="lithium-ion",
    )


def test_page_one_names_the_run_its_rule_sets_and_the_counts_with_a_caution_for_new_fails() -> None:
    reader = PdfReader(io.BytesIO(render_regrade_pdf(_data())))
    first = reader.pages[0].extract_text()
    for words in ("Regrade report", "q.engineer", "customer tightened capacity", "lfp_graphite",
                  SHA, "no: a dry run; nothing was recorded", "pass → fail", "left for a new review",
                  "Caution: 2 cells would fail under the new rules and may be hazardous"):
        assert words in " ".join(first.split()) or words in first, words


def test_the_csv_has_one_row_per_changed_check_and_says_what_was_applied() -> None:
    rows = list(csv.DictReader(io.StringIO(regrade_csv(_data(applied=True)).decode())))
    assert [(r["cell_id"], r["applied"], r["check"]) for r in rows] == [
        ("L01-007", "yes", "capacity"), ("L01-011", "left for a new review", "")
    ]
    assert (rows[0]["old_low"], rows[0]["new_low"], rows[0]["new_outcome"]) == (
        "18.9", "19.0", "out_of_window"
    )
