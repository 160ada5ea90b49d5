"""A person's review closes a hold or a fail, at a real station: the command, the ledger, the letters.

Every part is real: the station judges invented cycle files in its worker processes, the
reviews go through `formgate review` into the SQLite ledger beside a stopped or a running
station, the letters end as .eml files written by the station's mail thread.
"""

from __future__ import annotations

import csv
import datetime
import email
import email.policy
import getpass
import io
import re
import sqlite3
import threading
import time
from pathlib import Path

import pytest
from pypdf import PdfReader

from pipeline.cli.main import main
from pipeline.ledger.ledger import Ledger
from pipeline.station.digests import lot_rows
from pipeline.station.settings import Settings, smtp_settings
from pipeline.station.station import Station
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

# The test rules, and a review check on capacity: a cell near the low limit is held.
REVIEW_RULES = RULES.replace(
    "[check.efficiency]",
    """[check.capacity_margin]
metric = "grading_capacity_Ah"
low = 0.95             # test window: a cell near the low limit is held for a person
relative_to = "nominal_capacity"
severity = "review"
message = "Capacity close to the low limit."

[check.efficiency]""",
)
QE = "quality engineer A"


def _decisions(s: Settings, cell: str, lot: str = "LOT-A") -> list[tuple[str, str, str]]:
    with Ledger(s.ledger) as ledger:
        return [(d.verdict, d.cause, d.reason) for d in ledger.decisions.of_cell(lot, cell)]


def _latest(s: Settings, cell: str) -> tuple[str, str, str]:
    return _decisions(s, cell)[-1]


def _review(*words: str) -> int:
    return main(["review", *words])


def _pending(s: Settings) -> list[str]:
    with Ledger(s.ledger) as ledger:
        return [m.subject for m in ledger.outbox.in_state("pending")]


def _eml(s: Settings, word: str) -> list[email.message.EmailMessage]:
    out = []
    for p in sorted(s.mail.glob("*.eml")):
        m = email.message_from_bytes(p.read_bytes(), policy=email.policy.default)
        assert isinstance(m, email.message.EmailMessage)
        if word in str(m["Subject"]):
            out.append(m)
    return out


def _body(m: email.message.EmailMessage) -> str:
    part = m.get_body()
    assert part is not None
    return " ".join(str(part.get_content()).split())  # type: ignore[attr-defined]


def _judged(s: Settings, files: dict[str, bytes]) -> None:
    """Run the station until every file is judged and every cell decided, then stop it."""
    with running(s):
        for name, data in files.items():
            drop(s.inboxes[0].folder, name, data)
        wait_until(lambda: settled(s, len(files)), what="the files")


def test_reviews_close_holds_and_fails_and_each_refusal_says_what_to_do(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    s = make_station(tmp_path / "st")
    (s.rules_dir / "test_cells.toml").write_text(REVIEW_RULES, encoding="utf-8")
    _judged(s, {
        "h1.csv": cycle_file("H-1", capacity_ah=1.86),
        "f1.csv": cycle_file("F-1", capacity_ah=1.5, seed=1),
        "r1.csv": cycle_file("R-1", capacity_ah=1.5, seed=2),
        "t1.csv": cycle_file("T-1", capacity_ah=1.5, seed=3),
        "p1.csv": cycle_file("P-1", seed=4),
    })
    root = str(s.root)
    assert _review("list", root) == 0
    listed = capsys.readouterr().out
    assert listed.startswith("4 cell(s) wait for a person, oldest first")
    assert "  H-1  lot LOT-A  hold for " in listed
    assert re.search(r"grading_capacity_Ah 1\.860\d* ± [\d.]+ Ah < 1\.900\d* Ah", listed)
    assert "P-1" not in listed

    # a held cell: released by a person, who and why on its decision
    assert _review("release", root, "H-1", "--by", QE, "--reason", "1.86 Ah meets order 7") == 0
    out = capsys.readouterr().out
    assert "now  pass: released by quality engineer A: 1.86 Ah meets order 7" in out
    assert _latest(s, "H-1") == ("pass", "review", "released by quality engineer A: 1.86 Ah meets order 7")
    # the cell certificate shows the review at once
    (certificate,) = re.findall(r"^  certificate (.+)$", out, re.M)
    text = " ".join(" ".join(p.extract_text() for p in PdfReader(certificate).pages).split())
    assert "released by quality engineer A" in text and "1.86 Ah meets order 7" in text

    # a failed cell: only as a concession that names every failed check
    assert _review("release", root, "F-1", "--by", QE, "--reason", "customer accepts") == 2
    err = capsys.readouterr().err
    assert "is released only as a concession that names every failed check" in err
    assert "Its failed checks: capacity. Name each of them: --accept capacity" in err
    assert _review("release", root, "F-1", "--accept", "efficiency", "--by", QE,
                   "--reason", "x") == 2
    assert "--accept efficiency names a check that did not fail" in capsys.readouterr().err
    assert _latest(s, "F-1")[0] == "fail"  # nothing was recorded
    assert _review("release", root, "F-1", "--accept", "capacity", "--by", QE,
                   "--reason", "customer concession 14 accepts 1.5 Ah") == 0
    out = capsys.readouterr().out
    assert ("now  pass: released as a concession by quality engineer A accepting capacity: "
            "customer concession 14 accepts 1.5 Ah") in out
    assert "hazards kept on its record: abnormal_capacity" in out

    # reject keeps the hazards; a reject is final until a new record (a retest); without
    # --by the reviewer is the operating-system user
    user = getpass.getuser()
    assert _review("reject", root, "R-1", "--reason", "scrap") == 0
    capsys.readouterr()
    assert _latest(s, "R-1") == ("fail", "review", f"rejected by {user}: scrap")
    with Ledger(s.ledger) as ledger:
        assert ledger.decisions.latest("LOT-A", "R-1").hazards == ("abnormal_capacity",)  # type: ignore[union-attr]
        assert [r.reviewer for r in ledger.reviews.of_cell("LOT-A", "R-1")] == [user]
    assert _review("release", root, "R-1", "--accept", "capacity", "--by", QE, "--reason", "y") == 2
    assert f"was rejected by {user}" in capsys.readouterr().err

    # retest: only of a stage the cell's rule set has
    assert _review("retest", root, "T-1", "aging", "--by", QE, "--reason", "recheck") == 2
    assert "has no stage 'aging' for its cell type" in capsys.readouterr().err
    assert _review("retest", root, "T-1", "grading", "--by", QE,
                   "--reason", "channel 12 contact fault; rerun") == 0
    capsys.readouterr()
    assert _latest(s, "T-1") == (
        "hold", "review",
        "waiting for stage grading (retest asked by quality engineer A: channel 12 contact "
        "fault, rerun)",
    )

    # a passing cell, an unknown one, no reason
    assert _review("reject", root, "P-1", "--by", QE, "--reason", "z") == 2
    assert "cell P-1 is pass: only a held or failed cell is reviewed" in capsys.readouterr().err
    assert _review("reject", root, "NO-CELL", "--reason", "z") == 2
    assert "the ledger has no decided cell 'NO-CELL'" in capsys.readouterr().err
    assert _review("reject", root, "F-1", "--by", QE, "--reason", "  ") == 2
    assert "a review needs a reason" in capsys.readouterr().err

    # nobody is left waiting: the retest waits for its record, not for a person
    assert _review("list", root) == 0
    assert capsys.readouterr().out == "no cell waits for a person\n"

    # cell show lists the reviews: who, when, what, why, the accepted checks
    assert main(["cell", "show", root, "F-1"]) == 0
    shown = capsys.readouterr().out
    assert "  reviews (1)\n" in shown
    assert ("release by quality engineer A; accepts capacity: customer concession 14 accepts "
            "1.5 Ah") in shown
    assert "pass  (review): released as a concession by quality engineer A" in shown

    # one letter per review, each with its own subject, queued with the review
    subjects = _pending(s)
    assert any(x.startswith("formgate: RELEASED cell H-1, lot LOT-A \N{EM DASH} by quality "
                            "engineer A: 1.86 Ah meets order 7") for x in subjects), subjects
    assert any(x.startswith("formgate: RELEASED AS A CONCESSION cell F-1, lot LOT-A \N{EM DASH} "
                            "by quality engineer A, accepting capacity: customer") for x in subjects)
    assert any(x.startswith("formgate: REJECTED cell R-1") for x in subjects)
    assert any(x.startswith("formgate: RETEST (grading) cell T-1") for x in subjects)

    # the station starts again: the letters go out, the retest's record decides T-1 again
    with running(s):
        drop(s.inboxes[0].folder, "t1-retest.csv", cycle_file("T-1", seed=13))
        wait_until(lambda: settled(s, 6), what="the retest record")
        wait_until(lambda: _latest(s, "T-1")[:2] == ("pass", "record"), what="T-1 decided again")
        wait_until(lambda: not _pending(s), what="the letters sent")
    check_invariants(s, {"h1.csv", "f1.csv", "r1.csv", "t1.csv", "p1.csv", "t1-retest.csv"})
    (concession,) = _eml(s, "RELEASED AS A CONCESSION cell F-1")
    body = _body(concession)
    assert "Failed checks accepted by the concession - capacity" in body
    assert "qualified personnel" in body and "local codes" in body  # the general caution stays
    assert "CAUTION: Capacity far from its nominal value" in body
    assert "ISO 9001:2015 clause 8.7" in body
    assert concession["To"] == "quality@example.com"
    (rejected,) = _eml(s, "REJECTED cell R-1")
    assert "CAUTION: Capacity far from its nominal value" in _body(rejected)
    (released,) = _eml(s, "RELEASED cell H-1")
    assert "GENERAL CAUTION" not in _body(released)  # a held cell with no hazard


def test_a_concession_over_a_safety_hazard_needs_its_rule_set_to_allow_it(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    s = make_station(tmp_path / "st")
    shorting = REVIEW_RULES.replace('hazard = "abnormal_capacity"', 'hazard = "internal_short"')
    (s.rules_dir / "test_cells.toml").write_text(shorting, encoding="utf-8")
    _judged(s, {"s1.csv": cycle_file("S-1", capacity_ah=1.5)})
    root = str(s.root)
    assert _review("release", root, "S-1", "--accept", "capacity", "--by", QE, "--reason", "r") == 2
    err = capsys.readouterr().err
    assert "carries the safety hazard internal_short, which its rule set does not let a " \
           "concession release" in err
    assert "[review] release_hazards" in err
    assert _latest(s, "S-1")[0] == "fail"
    (s.rules_dir / "test_cells.toml").write_text(
        shorting + '\n[review]\nrelease_hazards = ["internal_short"]\n', encoding="utf-8"
    )
    assert _review("release", root, "S-1", "--accept", "capacity", "--by", QE,
                   "--reason", "teardown found no short; engineering sample") == 0
    capsys.readouterr()
    with Ledger(s.ledger) as ledger:
        latest = ledger.decisions.latest("LOT-A", "S-1")
        assert latest is not None and latest.verdict == "pass"
        assert latest.hazards == ("internal_short",)  # a release never clears a hazard's record
        (letter,) = [m for m in ledger.outbox.in_state("pending") if "CONCESSION" in m.subject]
    assert "CAUTION: Possible internal short circuit" in letter.body_text.replace("\n", " ")
    assert "GENERAL CAUTION" in letter.body_text
    # it links the cell certificate that shows the review, and waits for its publication
    assert letter.waits_for is not None and letter.waits_for.endswith("S-1~cell.pdf")
    assert "S-1~cell.pdf" in letter.body_text
    # its cell certificate passes it, but keeps the hazard's caution and says who released it
    page1 = " ".join(PdfReader(s.certificates / "LOT-A" / "S-1~cell.pdf").pages[0]
                     .extract_text().split())
    assert "PASS" in page1 and "no clean pass" in page1
    assert f"released as a concession by {QE} over the safety hazard internal_short" in page1
    assert "Possible internal short circuit" in page1 and "qualified personnel" in page1
    # the lot's digest lists it as passed, with the hazard it keeps and where its caution is
    with Ledger(s.ledger) as ledger:
        (row,) = [r for r in lot_rows(ledger, "LOT-A", s) if r.cell_id == "S-1"]
    assert (row.verdict, row.hazards) == ("pass", ("internal_short",))


def test_reviews_stand_when_the_cell_is_decided_again_until_something_new_arrives(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    s = make_station(tmp_path / "st")
    (s.rules_dir / "test_cells.toml").write_text(REVIEW_RULES, encoding="utf-8")
    _judged(s, {
        "h1.csv": cycle_file("H-1", capacity_ah=1.86),
        "f1.csv": cycle_file("F-1", capacity_ah=1.5, seed=1),
        "t1.csv": cycle_file("T-1", capacity_ah=1.5, seed=3),
    })
    root = str(s.root)
    assert _review("release", root, "H-1", "--by", QE, "--reason", "ok for order 7") == 0
    assert _review("release", root, "F-1", "--accept", "capacity", "--by", QE,
                   "--reason", "concession 14") == 0
    assert _review("retest", root, "T-1", "grading", "--by", QE, "--reason", "contact") == 0
    capsys.readouterr()
    before = {c: _decisions(s, c) for c in ("H-1", "F-1", "T-1")}
    # the station decides every cell again, for each cause: nothing new, so nothing changes
    station = Station(s, smtp_settings(s, {}))
    with Ledger(s.ledger) as ledger:
        station.wire(ledger, threading.Event())
        station.rules.load(first=True)
        for cause in ("record", "readings"):
            station.cells.decide_cells([("LOT-A", c) for c in before], cause)
    assert {c: _decisions(s, c) for c in before} == before
    # the lot closes: its screens and grades do not undo the reviews; released cells pass
    assert main(["lot", "close", root, "LOT-A"]) == 0
    capsys.readouterr()
    assert _latest(s, "H-1")[0] == "pass" and _latest(s, "F-1")[0] == "pass"
    assert _latest(s, "T-1")[:2] == ("hold", "review")
    export = {row["cell_id"]: row for row in csv.DictReader(
        io.StringIO((s.results / "LOT-A" / "_lot-cells.csv").read_text(encoding="utf-8")))}
    shown = {c: (r["lot"], r["verdict"], r["grade"], r["reason"], r["hazards"]) for c, r in export.items()}
    assert shown["H-1"] == ("LOT-A", "pass", "", "released by quality engineer A: ok for order 7", "")
    assert shown["F-1"] == ("LOT-A", "pass", "", "released as a concession by quality engineer A accepting "
                            "capacity: concession 14", "abnormal_capacity")
    assert shown["T-1"][:3] == ("LOT-A", "hold", "")
    assert shown["T-1"][3].startswith("waiting for stage grading (retest asked by")
    report = s.certificates / "LOT-A" / "_lot-report.pdf"
    text = " ".join(" ".join(p.extract_text() for p in PdfReader(report).pages).split())
    assert "H-1 RELEASED released by quality engineer A: ok for order 7" in text
    with Ledger(s.ledger) as ledger:
        (digest,) = [m for m in ledger.outbox.in_state("pending") if "lot LOT-A, closed" in m.subject]
    assert "released by quality engineer A: ok for order 7" in digest.body_text.replace("\n    ", " ")
    # something new about a released cell: a new record decides it again
    with running(s):
        drop(s.inboxes[0].folder, "f1-again.csv", cycle_file("F-1", capacity_ah=1.5, seed=21))
        wait_until(lambda: settled(s, 4), what="the new record")
        wait_until(lambda: _latest(s, "F-1")[1] == "record", what="F-1 decided again")
    assert _latest(s, "F-1")[0] == "fail"
    assert _latest(s, "H-1")[0] == "pass"


def test_a_review_beside_a_running_station_and_a_decision_that_is_behind(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    s = make_station(tmp_path / "st")
    rules = REVIEW_RULES + "\n[review]\nwait_h = 0.0005     # test: 1.8 s\n"
    (s.rules_dir / "test_cells.toml").write_text(rules, encoding="utf-8")
    root = str(s.root)

    def alerts() -> list[email.message.EmailMessage]:
        return _eml(s, "for a review")

    with running(s):
        drop(s.inboxes[0].folder, "f1.csv", cycle_file("F-1", capacity_ah=1.5))
        drop(s.inboxes[0].folder, "h1.csv", cycle_file("H-1", capacity_ah=1.86, seed=1))
        wait_until(lambda: settled(s, 2), what="the files")
        # both cells decided (a file is settled a moment before its cell's decision is recorded)
        wait_until(lambda: len(_decisions(s, "H-1")) == 1 and len(_decisions(s, "F-1")) == 1,
                   what="F-1 and H-1 decided")
        report = status_text(s, datetime.datetime.now(datetime.UTC))
        assert "waiting for a person: 2 cell(s), the oldest for " in report
        assert "formgate review list shows them" in report
        wait_until(lambda: len(alerts()) == 2, what="one alert per waiting cell")
        assert _review("release", root, "F-1", "--accept", "capacity", "--by", QE,
                       "--reason", "concession 14") == 0
        wait_until(lambda: bool(_eml(s, "RELEASED AS A CONCESSION cell F-1")),
                   what="the review's letter")
        time.sleep(4.0)  # more rounds of the lot thread: no second alert
        report = status_text(s, datetime.datetime.now(datetime.UTC))
        assert "waiting for a person: 1 cell(s)" in report and "(cell H-1 of lot LOT-A, hold)" in report
    capsys.readouterr()
    (alert,) = [a for a in alerts() if "cell F-1" in str(a["Subject"])]
    body = _body(alert)
    assert "[review] wait_h" in body and "formgate review list" in body
    assert len(alerts()) == 2

    # a record the station has not decided yet (as if it stopped before deciding it)
    with running(s):
        drop(s.inboxes[0].folder, "h1-again.csv", cycle_file("H-1", capacity_ah=1.87, seed=5))
        wait_until(lambda: settled(s, 3), what="the second record")
        wait_until(lambda: _latest(s, "H-1")[1] == "record" and len(_decisions(s, "H-1")) == 2,
                   what="H-1 decided on its second record")
    with sqlite3.connect(s.ledger) as conn:  # the last decision row: the chain stays whole
        conn.execute("DELETE FROM decisions WHERE id = (SELECT max(id) FROM decisions)")
    assert _review("release", root, "H-1", "--by", QE, "--reason", "ok") == 2
    err = capsys.readouterr().err
    assert "has a record or reading that its decision does not rest on yet" in err
    assert "Look again in a moment" in err


def test_a_review_in_a_closed_lot_rewrites_and_records_its_report_and_export(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """The lot's report and export show the review at once, as `formgate lot report` would
    write them, each recorded with its new hash (formgate verify accepts them)."""
    s = make_station(tmp_path / "st")
    (s.rules_dir / "test_cells.toml").write_text(REVIEW_RULES, encoding="utf-8")
    _judged(s, {"h1.csv": cycle_file("H-1", capacity_ah=1.86), "p1.csv": cycle_file("P-1", seed=4)})
    root = str(s.root)
    assert main(["lot", "close", root, "LOT-A"]) == 0
    out = capsys.readouterr().out
    report = Path(re.findall(r"^  report (.+)$", out, re.M)[0])
    export = Path(re.findall(r"^  export (.+)$", out, re.M)[0])
    rows = {r["cell_id"]: r for r in csv.DictReader(io.StringIO(export.read_text("utf-8")))}
    assert rows["H-1"]["verdict"] == "hold"
    assert _review("release", root, "H-1", "--by", QE, "--reason", "1.86 Ah meets order 7") == 0
    out = capsys.readouterr().out
    assert f"  lot report {report}" in out
    rows = {r["cell_id"]: r for r in csv.DictReader(io.StringIO(export.read_text("utf-8")))}
    assert rows["H-1"]["verdict"] == "pass"
    assert "released by quality engineer A: 1.86 Ah meets order 7" in rows["H-1"]["reason"]
    text = " ".join(" ".join(p.extract_text() for p in PdfReader(report).pages).split())
    assert "released by quality engineer A" in text
    for path in (report, export):
        assert main(["verify", root, str(path)]) == 0, capsys.readouterr().out
    capsys.readouterr()
    # the review's letter goes; the lot's closing digest is not sent again
    subjects = _pending(s)
    assert any(x.startswith("formgate: RELEASED cell H-1") for x in subjects), subjects
    assert sum("closed" in x for x in subjects) <= 1
