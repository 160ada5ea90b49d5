"""A real station keeps a cell's history: cycle files and an OCV tester file, decided as one cell.

The rule set here needs the aging stage and judges the K-value (the open-circuit-voltage
drop per day between the first and the last reading, common practice). Every part is real:
the inbox, the worker processes, the SQLite ledger, the .eml letters on disk.
"""

from __future__ import annotations

import datetime
import email
import email.policy
import json
import re
import time
from pathlib import Path

import pytest

from pipeline.ledger.ledger import Ledger
from pipeline.station.settings import Settings
from pipeline.station.status import status_text
from tests.station_kit import (
    RULES,
    check_invariants,
    cycle_file,
    drop,
    make_station,
    running,
    settled,
    wait_until,
)

pytestmark = pytest.mark.slow

AGING_RULES = RULES.replace(
    "[plausible]",
    """[stages]
needed = ["formation", "aging", "grading"]

[aging]
min_days = 3.0

[check.k_value]
metric = "k_value_mV_per_day"
high = 1.0             # test window
severity = "reject"
hazard = "internal_short"
message = "Open-circuit voltage falls too fast during aging."

[plausible]""",
)


def _readings(rows: list[tuple[str, str, float]]) -> bytes:
    """An OCV reading file of lot LOT-A: (cell, ISO time, OCV in V) per row."""
    lines = ["# kind: ocv readings", "# lot: LOT-A", "cell_id,time,ocv_V,cell_type"]
    lines += [f"{c},{t},{v:.4f},TEST-CELL" for c, t, v in rows]
    return ("\n".join(lines) + "\n").encode()


def _letters(s: Settings) -> list[email.message.EmailMessage]:
    out = []
    for p in sorted(s.mail.glob("*.eml")):
        m = email.message_from_bytes(p.read_bytes(), policy=email.policy.default)
        assert isinstance(m, email.message.EmailMessage)
        out.append(m)
    return out


def _decisions(s: Settings, cell: str) -> list[tuple[str, str, str]]:
    with Ledger(s.ledger) as ledger:
        return [(d.verdict, d.cause, d.reason) for d in ledger.decisions.of_cell("LOT-A", cell)]


def test_cycle_files_and_a_tester_file_make_one_decision_per_cell(tmp_path: Path) -> None:
    s = make_station(tmp_path / "st")
    (s.rules_dir / "test_cells.toml").write_text(AGING_RULES, encoding="utf-8")
    with running(s):
        drop(s.inboxes[0].folder, "c1.csv", cycle_file("C-1"))
        drop(s.inboxes[0].folder, "c2.csv", cycle_file("C-2", seed=2))
        wait_until(lambda: settled(s, 2), what="two cycle files")
        # K = -(3.6470 - 3.6512) V / 7 d = 0.6 mV/day: in window (the K-value's definition)
        # K = -(3.6300 - 3.6512) V / 7 d = 3.03 mV/day: a fast self-discharger, rejected
        drop(s.inboxes[0].folder, "aging.csv", _readings([
            ("C-1", "2026-11-02T08:00:00Z", 3.6512), ("C-1", "2026-11-09T08:00:00Z", 3.6470),
            ("C-2", "2026-11-02T08:00:00Z", 3.6512), ("C-2", "2026-11-09T08:00:00Z", 3.6300),
        ]))
        wait_until(lambda: settled(s, 3), what="the tester file")
        wait_until(lambda: any("FAIL cell C-2" in str(m["Subject"]) for m in _letters(s)),
                   what="the letter for the cell the readings failed")
    check_invariants(s, {"c1.csv", "c2.csv", "aging.csv"})
    # each cell waited for its aging stage, then was decided on all its stages
    assert _decisions(s, "C-1") == [
        ("hold", "record", "waiting for stage aging"),
        ("pass", "readings", ""),
    ]
    c2 = _decisions(s, "C-2")
    assert [d[:2] for d in c2] == [("hold", "record"), ("fail", "readings")]
    assert re.match(r"k_value_mV_per_day 3\.029 ± 0\.012 mV/day > 1\.000 mV/day \(reject\)", c2[1][2])
    letter = next(m for m in _letters(s) if "FAIL cell C-2" in str(m["Subject"]))
    body = " ".join(letter.get_body().get_content().split())  # type: ignore[union-attr]
    assert "the cell's aging readings came in" in body
    assert "Possible internal short circuit" in body or "internal short" in body.lower()
    assert "qualified personnel" in body and "aging: aging.csv (SHA-256 " in body
    # a cell held only while it waits for a stage gets no letter
    assert not any("HOLD cell C-1" in str(m["Subject"]) for m in _letters(s))
    with Ledger(s.ledger) as ledger:
        assert len(ledger.readings.of("LOT-A")) == 4
    # status shows each cell once, and what stands for the cell when its records say less
    report = status_text(s, datetime.datetime.now(datetime.UTC))
    assert report.count("  C-2  lot LOT-A  pass") == 1
    assert "      the cell: fail: k_value_mV_per_day 3.029 ± 0.012 mV/day > 1.000 mV/day (reject)" in report


def test_a_mailed_failure_that_a_later_record_supersedes_gets_a_follow_up(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    s = make_station(tmp_path / "st")
    with running(s):
        drop(s.inboxes[0].folder, "first.csv", cycle_file("C-9", capacity_ah=1.5))
        wait_until(lambda: settled(s, 1), what="the failed record")
        drop(s.inboxes[0].folder, "retest.csv", cycle_file("C-9", seed=4))
        wait_until(lambda: settled(s, 2), what="the retest")
        wait_until(lambda: any("UPDATE cell C-9" in str(m["Subject"]) for m in _letters(s)),
                   what="the follow-up")
    assert [d[0] for d in _decisions(s, "C-9")] == ["fail", "pass"]
    check_invariants(s, {"first.csv", "retest.csv"})
    # the retest says which record it is and what it supersedes; the first record's files
    # are kept beside it under names of their own, and the ledger points at them
    doc = json.loads((s.results / "LOT-A" / "C-9.json").read_text(encoding="utf-8"))
    assert doc["record"]["number"] == 2 and doc["record"]["of"] == 2
    assert doc["record"]["supersedes"]["name"] == "first.csv"
    assert doc["record"]["supersedes"]["verdict"] == "fail"
    kept = json.loads((s.results / "LOT-A" / "C-9~record-1.json").read_text(encoding="utf-8"))
    assert (kept["input"]["name"], kept["verdict"]) == ("first.csv", "fail")
    from pypdf import PdfReader

    text = " ".join(
        " ".join(p.extract_text() for p in PdfReader(s.certificates / "LOT-A" / "C-9.pdf").pages)
        .split()
    )
    assert "2 of 2 for this cell and stage; supersedes first.csv (fail, judged" in text
    assert (s.certificates / "LOT-A" / "C-9~record-1.pdf").exists()
    report = status_text(s, datetime.datetime.now(datetime.UTC))
    assert report.count("  C-9  lot LOT-A") == 1 and "(record 2 of 2)" in report
    update = next(m for m in _letters(s) if "UPDATE cell C-9" in str(m["Subject"]))
    assert "now pass, was fail" in str(update["Subject"])
    body = " ".join(update.get_body().get_content().split())  # type: ignore[union-attr]
    assert "is superseded, because a new record of the cell was judged" in body
    assert "a later record does not by itself make it safe" in body
    assert "retest.csv" in body
    # formgate cell show marks the first record, under its own file name, as superseded
    from pipeline.cli.main import main

    assert main(["cell", "show", str(s.root), "C-9"]) == 0
    records = [x for x in capsys.readouterr().out.splitlines() if re.match(r"    \d of 2  ", x)]
    assert len(records) == 2, records
    assert re.fullmatch(r"    1 of 2  \S+  first\.csv  formation and grading  fail: .+  \(superseded\)",
                        records[0]), records
    assert re.fullmatch(r"    2 of 2  \S+  retest\.csv  formation and grading  pass", records[1]), records


LOT_RULES = AGING_RULES.replace(
    "[plausible]",
    """[screen.self_discharge]
metric = "k_value_mV_per_day"
k = 6.0                # test screen
min_cells = 5          # test screen: a small lot
sides = "high"

[grade.A]
grading_capacity_Ah = { low = 1.9 }

[plausible]""",
)


def test_closing_a_lot_holds_its_outlier_grades_the_rest_and_writes_its_report(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    from pypdf import PdfReader

    from pipeline.cli.main import main

    s = make_station(tmp_path / "st")
    (s.rules_dir / "test_cells.toml").write_text(LOT_RULES, encoding="utf-8")
    cells = [f"L-{n}" for n in range(1, 8)]
    # K-values 0.30..0.36 mV/day, and one cell at 0.80: inside the 1.0 window, far out of its lot
    drops = [0.0021 + 0.0001 * (n % 3) for n in range(len(cells))]
    drops[4] = 0.0056
    rows = []
    for cell, drop_v in zip(cells, drops, strict=True):
        rows += [(cell, "2026-11-02T08:00:00Z", 3.6512), (cell, "2026-11-09T08:00:00Z", 3.6512 - drop_v)]
    with running(s):
        for n, cell in enumerate(cells):
            drop(s.inboxes[0].folder, f"{cell}.csv", cycle_file(cell, seed=n))
        # the readings come last, as on a line (and the test counts on their decision being last)
        wait_until(lambda: settled(s, len(cells)), what="the lot's cycle files")
        drop(s.inboxes[0].folder, "aging.csv", _readings(rows))
        wait_until(lambda: settled(s, len(cells) + 1), what="the lot's files")
        wait_until(lambda: all(_decisions(s, c) and _decisions(s, c)[-1][0] == "pass"
                               for c in cells), what="every cell decided")
    assert main(["lot", "list", str(s.root)]) == 0
    assert "LOT-A: 7 cell(s): 7 pass, 0 fail, 0 hold" in capsys.readouterr().out
    assert main(["lot", "close", str(s.root), "LOT-A"]) == 0
    out = capsys.readouterr().out
    assert "L-5: pass -> hold: outlier in lot: k_value_mV_per_day 0.8000 mV/day > lot limit" in out
    # the pass stays recorded; the hold is recorded beside it, with its letter queued
    assert [d[:2] for d in _decisions(s, "L-5")][-2:] == [("pass", "readings"), ("hold", "lot closed")]
    with Ledger(s.ledger) as ledger:
        letters = [m for m in ledger.outbox.in_state("pending") if "HOLD cell L-5" in m.subject]
        assert len(letters) == 1 and "outlier in lot" in letters[0].subject
        graded = {c: ledger.decisions.latest("LOT-A", c) for c in cells}
        assert {c: d.grade for c, d in graded.items() if d} == {
            c: (None if c == "L-5" else "A") for c in cells
        }
        assert ledger.lots.get("LOT-A").closed_by == "command"
        # the lot's last digest: every cell as closed, graded, with the report attached
        (closing,) = [m for m in ledger.outbox.in_state("pending") if "lot LOT-A, closed" in m.subject]
        assert closing.attachment_path and closing.attachment_path.endswith("_lot-report.pdf")
        assert re.search(r"^L-1 +pass A ", closing.body_text, re.M), closing.body_text
        assert "outlier in lot" in closing.body_text
    report = s.certificates / "LOT-A" / "_lot-report.pdf"
    text = " ".join(" ".join(p.extract_text() for p in PdfReader(report).pages).split())
    assert "LOT-A" in text and "L-5" in text and "outlier in lot" in text
    export = (s.results / "LOT-A" / "_lot-cells.csv").read_text(encoding="utf-8").splitlines()
    assert len(export) == 1 + len(cells)
    # closing again changes nothing and says so
    assert main(["lot", "close", str(s.root), "LOT-A"]) == 0
    assert "was closed before" in capsys.readouterr().out
    assert main(["cell", "show", str(s.root), "L-5"]) == 0
    shown = capsys.readouterr().out
    assert "records (1)" in shown and "aging readings (2)" in shown
    assert "hold  (lot closed): outlier in lot" in shown
    assert main(["lot", "show", str(s.root), "NO-SUCH-LOT"]) == 2
    assert "the ledger has no lot 'NO-SUCH-LOT'" in capsys.readouterr().err


def test_a_lot_quiet_for_its_rule_sets_time_is_closed_by_the_station(tmp_path: Path) -> None:
    s = make_station(tmp_path / "st")
    rules = LOT_RULES + "\n[lot]\nquiet_h = 0.0005      # test: 1.8 s\n"
    (s.rules_dir / "test_cells.toml").write_text(rules, encoding="utf-8")

    def closed() -> bool:
        with Ledger(s.ledger) as ledger:
            return ledger.lots.get("LOT-A").closed_by == "station"

    with running(s):
        drop(s.inboxes[0].folder, "q1.csv", cycle_file("Q-1"))
        wait_until(lambda: settled(s, 1), what="the lot's one cell")
        wait_until(closed, what="the station closing the quiet lot")
    assert (s.certificates / "LOT-A" / "_lot-report.pdf").exists()
    # the lot still waits for its cell's aging stage: held, never released at the close
    assert _decisions(s, "Q-1")[-1][:2] == ("hold", "record")


def test_a_stage_later_than_its_rule_set_allows_raises_one_alert(tmp_path: Path) -> None:
    s = make_station(tmp_path / "st")
    rules = AGING_RULES.replace(
        'needed = ["formation", "aging", "grading"]\n',
        'needed = ["formation", "aging", "grading"]\noverdue_h = 0.0005   # test: 1.8 s\n',
    )
    (s.rules_dir / "test_cells.toml").write_text(rules, encoding="utf-8")

    def overdue() -> list[email.message.EmailMessage]:
        return [m for m in _letters(s) if "a stage is overdue" in str(m["Subject"])]

    with running(s):
        drop(s.inboxes[0].folder, "late.csv", cycle_file("W-1"))
        wait_until(lambda: settled(s, 1), what="the cell's cycle file")
        wait_until(lambda: bool(overdue()), what="the overdue alert")
        time.sleep(4.0)  # two more rounds of the lot thread: no second alert
    (alert,) = overdue()
    body = " ".join(alert.get_body().get_content().split())  # type: ignore[union-attr]
    assert "Cell W-1 of lot LOT-A has been waiting for stage aging since" in body
    assert "[stages] overdue_h" in body


def test_a_cells_last_certificate_lists_its_other_records_with_their_sha256(
    tmp_path: Path,
) -> None:
    import hashlib
    import shutil

    from pypdf import PdfReader

    from pipeline.demo.lots import DEMO_STAGED_CELLS, demo_aging_file, demo_stage_files
    from pipeline.shipped import RULES_DIR

    s = make_station(tmp_path / "st")
    shutil.copy(RULES_DIR / "nmc_graphite.toml", s.rules_dir / "nmc_graphite.toml")
    cell = DEMO_STAGED_CELLS[0]
    files = demo_stage_files(cell)
    aging = demo_aging_file(DEMO_STAGED_CELLS[:3])
    with running(s):
        drop(s.inboxes[0].folder, "formation.csv", files["formation"])
        wait_until(lambda: settled(s, 1), what="the formation file")
        drop(s.inboxes[0].folder, "aging.csv", aging)
        wait_until(lambda: settled(s, 2), what="the tester file")
        drop(s.inboxes[0].folder, "grading.csv", files["grading"])
        wait_until(lambda: settled(s, 3), what="the grading file")
    pdf = s.certificates / cell.lot / f"{cell.cell_id}~grading.pdf"
    text = " ".join(" ".join(p.extract_text() for p in PdfReader(pdf).pages).split())
    formation_sha = hashlib.sha256(files["formation"]).hexdigest()
    assert f"Record of formation formation.csv (pass), SHA-256 {formation_sha}" in text
    assert f"Record of aging aging.csv, SHA-256 {hashlib.sha256(aging).hexdigest()}" in text
    with Ledger(s.ledger) as ledger:
        decision = ledger.decisions.latest(cell.lot, cell.cell_id)
    assert decision is not None and (decision.verdict, decision.reason) == ("pass", "")


def test_a_cell_whose_decision_a_crash_cut_off_is_decided_at_the_next_start(
    tmp_path: Path,
) -> None:
    import sqlite3

    s = make_station(tmp_path / "st")
    (s.rules_dir / "test_cells.toml").write_text(AGING_RULES, encoding="utf-8")
    with running(s):
        drop(s.inboxes[0].folder, "c1.csv", cycle_file("R-1"))
        wait_until(lambda: settled(s, 1), what="the cycle file")
        drop(s.inboxes[0].folder, "aging.csv", _readings([
            ("R-1", "2026-11-02T08:00:00Z", 3.6512), ("R-1", "2026-11-09T08:00:00Z", 3.6470),
        ]))
        wait_until(lambda: settled(s, 2), what="the tester file")
        wait_until(lambda: len(_decisions(s, "R-1")) == 2, what="both decisions")
    # as if the station died after archiving the readings, before deciding the cell
    with sqlite3.connect(s.ledger) as conn:
        conn.execute("DELETE FROM decisions WHERE cause = 'readings'")
    assert _decisions(s, "R-1") == [("hold", "record", "waiting for stage aging")]
    with running(s):
        wait_until(lambda: len(_decisions(s, "R-1")) == 2, what="the decision made at start")
    assert _decisions(s, "R-1")[-1][:2] == ("pass", "record")
