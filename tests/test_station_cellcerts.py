"""A real station publishes one certificate and one JSON per cell, showing its standing decision.

A cell that arrives in stages (a formation file, aging readings, a grading file) has a
stage certificate per file and one cell certificate, ``<cell>~cell.pdf``, that follows
its decision as each stage comes in; a station killed between a decision and its cell
certificate publishes it when it starts again. Every part is real: worker processes,
WeasyPrint, SQLite, `formgate watch` as a child process for the crash.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
from pathlib import Path

import jsonschema
import pytest
from pypdf import PdfReader

from pipeline.demo.lots import DEMO_STAGED_CELLS, demo_aging_file, demo_stage_files
from pipeline.ledger.ledger import Ledger
from pipeline.shipped import RULES_DIR
from pipeline.station.cellpublish import cell_paths
from pipeline.station.settings import Settings
from tests.conftest import REPO
from tests.station_kit import (
    check_invariants,
    cycle_file,
    drop,
    make_station,
    running,
    settled,
    start_watch,
    stop_watch,
    wait_until,
)

pytestmark = pytest.mark.slow

SCHEMA = json.loads((REPO / "docs" / "cell.schema.json").read_text(encoding="utf-8"))


def _text(pdf: Path) -> str:
    return " ".join(" ".join(p.extract_text() for p in PdfReader(pdf).pages).split())


def _page1(pdf: Path) -> str:
    return " ".join(PdfReader(pdf).pages[0].extract_text().split())


def _current(s: Settings, lot: str, cell: str) -> bool:
    """The cell's latest decision has its cell JSON and certificate published, both on disk."""
    json_path, pdf_path = cell_paths(s, lot, cell)
    with Ledger(s.ledger) as ledger:
        latest = ledger.decisions.latest(lot, cell)
        rows = [r for r in ledger.published.of_cell(lot, cell) if r.kind.startswith("cell ")]
    shown = {r.kind for r in rows if latest is not None and r.decision_id == latest.id}
    return shown == {"cell result", "cell certificate"} and json_path.exists() and pdf_path.exists()


def _standing(s: Settings, lot: str, cell: str) -> tuple[str, dict[str, object]]:
    json_path = cell_paths(s, lot, cell)[0]
    document = json.loads(json_path.read_text(encoding="utf-8"))
    jsonschema.Draft202012Validator(SCHEMA).validate(document)
    standing = document["standing"]
    assert isinstance(standing, dict)
    return str(standing["verdict"]), document


def test_a_cell_in_stages_gets_one_cell_certificate_that_follows_its_decision(
    tmp_path: Path,
) -> None:
    s = make_station(tmp_path / "st")
    shutil.copy(RULES_DIR / "nmc_graphite.toml", s.rules_dir / "nmc_graphite.toml")
    cell = DEMO_STAGED_CELLS[0]
    lot, cell_id = cell.lot, cell.cell_id
    files = demo_stage_files(cell)
    aging = demo_aging_file(DEMO_STAGED_CELLS[:3])
    json_path, pdf_path = cell_paths(s, lot, cell_id)
    with running(s):
        drop(s.inboxes[0].folder, "formation.csv", files["formation"])
        wait_until(lambda: settled(s, 1) and _current(s, lot, cell_id), what="the formation file")
        verdict, document = _standing(s, lot, cell_id)
        assert verdict == "hold" and document["missing_stages"] == ["aging", "grading"]
        page1 = _page1(pdf_path)
        assert "Cell certificate" in page1 and "HOLD" in page1
        assert "waits for a stage" in page1  # held only while a stage is to come: no caution
        assert "Caution" not in page1
        drop(s.inboxes[0].folder, "aging.csv", aging)
        wait_until(lambda: settled(s, 2), what="the tester file")
        drop(s.inboxes[0].folder, "grading.csv", files["grading"])
        wait_until(lambda: settled(s, 3), what="the grading file")
        wait_until(lambda: _current(s, lot, cell_id) and _standing(s, lot, cell_id)[0] == "pass",
                   what="the cell certificate of the pass")
    check_invariants(s, {"formation.csv", "aging.csv", "grading.csv"})
    verdict, document = _standing(s, lot, cell_id)
    with Ledger(s.ledger) as ledger:
        latest = ledger.decisions.latest(lot, cell_id)
        published = ledger.published.by_path(os.path.abspath(pdf_path))
    assert latest is not None and latest.verdict == "pass"
    assert document["standing"]["decision_id"] == latest.id  # type: ignore[index]
    assert published is not None and published.decision_id == latest.id
    assert published.sha256 == hashlib.sha256(pdf_path.read_bytes()).hexdigest()
    # one name per cell, beside the stage records' names
    names = sorted(p.name for p in pdf_path.parent.iterdir() if p.name.startswith(f"{cell_id}~"))
    assert names == [f"{cell_id}~cell.pdf", f"{cell_id}~formation.pdf", f"{cell_id}~grading.pdf"]
    # a cell known only by its readings has its cell certificate too: held, waiting for stages
    other = DEMO_STAGED_CELLS[1].cell_id
    assert "HOLD" in _page1(cell_paths(s, lot, other)[1])
    text = _text(pdf_path)
    assert "PASS" in _page1(pdf_path)
    for name, data in (("formation.csv", files["formation"]), ("grading.csv", files["grading"])):
        assert name in text and hashlib.sha256(data).hexdigest()[:24] in text.replace(" ", "")
    assert "aging.csv" in text and "K-value" in text
    # the verification code is the cell JSON's, as `formgate verify` looks it up
    code = hashlib.sha256(json_path.read_bytes()).hexdigest()[:16]
    assert code in text.replace(" ", "")
    # each stage certificate says first which stage of which cell it covers, and names the cell's
    grading = _page1(pdf_path.with_name(f"{cell_id}~grading.pdf"))
    scope = f"This certificate covers one stage of cell {cell_id}: its grading record"
    assert scope in grading and f"{cell_id}~cell.pdf" in grading
    assert grading.index(scope) < grading.upper().index("STAGE VERDICT")  # shown in capitals
    assert "Stage certificate: grading" in grading


def test_a_crash_between_a_decision_and_its_cell_certificate_is_published_at_restart(
    tmp_path: Path,
) -> None:
    s = make_station(tmp_path / "st")
    json_path, pdf_path = cell_paths(s, "LOT-A", "F-1")
    proc = start_watch(s.root, {"FORMGATE_FAULT": "before_cell_publish"})
    try:
        drop(s.inboxes[0].folder, "f1.csv", cycle_file("F-1", capacity_ah=1.5))  # fails capacity
        proc.wait(120)  # killed itself at the fault point: rendered, nothing written
    finally:
        stop_watch(proc)
    with Ledger(s.ledger) as ledger:
        latest = ledger.decisions.latest("LOT-A", "F-1")
        assert latest is not None and latest.verdict == "fail"
        assert not [r for r in ledger.published.of_cell("LOT-A", "F-1") if r.kind.startswith("cell ")]
    assert not json_path.exists() and not pdf_path.exists()
    with running(s):
        wait_until(lambda: _current(s, "LOT-A", "F-1"), what="the cell certificate at restart")
    verdict, _ = _standing(s, "LOT-A", "F-1")
    assert verdict == "fail"
    page1 = _page1(pdf_path)
    assert "FAIL" in page1 and "Caution: this cell failed and may be hazardous" in page1
    assert "qualified personnel" in page1 and "local codes" in page1
    check_invariants(s, {"f1.csv"})
    # the failure letter names the cell's own certificate beside the record's it attaches
    with Ledger(s.ledger) as ledger:
        mails = [*ledger.outbox.in_state("pending"), *ledger.outbox.in_state("sent")]
    (letter,) = [m for m in mails if "FAIL cell F-1" in m.subject]
    assert "F-1.pdf" in str(letter.attachment_path)
    assert "The cell's own certificate shows its standing decision" in " ".join(letter.body_text.split())
    assert os.path.abspath(pdf_path) in letter.body_text  # a link stays whole: never wrapped


def test_a_crash_after_the_cell_json_leaves_the_cell_pending_and_the_restart_finishes_it(
    tmp_path: Path,
) -> None:
    s = make_station(tmp_path / "st")
    json_path, pdf_path = cell_paths(s, "LOT-A", "G-1")
    proc = start_watch(s.root, {"FORMGATE_FAULT": "after_cell_json"})
    try:
        drop(s.inboxes[0].folder, "g1.csv", cycle_file("G-1"))
        proc.wait(120)
    finally:
        stop_watch(proc)
    assert json_path.exists() and not pdf_path.exists()
    with running(s):
        wait_until(lambda: _current(s, "LOT-A", "G-1"), what="the cell certificate at restart")
    assert _standing(s, "LOT-A", "G-1")[0] == "pass"
    with Ledger(s.ledger) as ledger:
        rows = [r for r in ledger.published.of_cell("LOT-A", "G-1") if r.kind.startswith("cell ")]
    assert sorted(r.kind for r in rows) == ["cell certificate", "cell result"]


def _lot(s: Settings, quiet_h: float | None = None) -> list[str]:
    """Seven cells of LOT-A with their aging readings; L-5 an outlier of its lot's K-values."""
    from tests.test_station_cells import LOT_RULES, _readings

    rules = LOT_RULES + (f"\n[lot]\nquiet_h = {quiet_h}      # test\n" if quiet_h else "")
    (s.rules_dir / "test_cells.toml").write_text(rules, encoding="utf-8")
    cells = [f"L-{n}" for n in range(1, 8)]
    drops = [0.0021 + 0.0001 * (n % 3) for n in range(len(cells))]
    drops[4] = 0.0056
    rows = []
    for cell, drop_v in zip(cells, drops, strict=True):
        rows += [(cell, "2026-11-02T08:00:00Z", 3.6512), (cell, "2026-11-09T08:00:00Z", 3.6512 - drop_v)]
    for n, cell in enumerate(cells):
        drop(s.inboxes[0].folder, f"{cell}.csv", cycle_file(cell, seed=n))
    drop(s.inboxes[0].folder, "aging.csv", _readings(rows))
    return cells


def _closing_digests(s: Settings) -> list[str]:
    with Ledger(s.ledger) as ledger:
        mails = [*ledger.outbox.in_state("pending"), *ledger.outbox.in_state("sent")]
    return [m.body_text for m in mails if "lot LOT-A, closed" in m.subject]


def _closing_digest(s: Settings) -> str:
    (body,) = _closing_digests(s)
    return body


def _check_closed_lot(s: Settings, cells: list[str]) -> None:
    """Each cell's certificate shows the close: L-5 held as an outlier (with the cautions of a
    held cell), the others graded; the closing digest links them, each on disk and current."""
    verdict, document = _standing(s, "LOT-A", "L-5")
    assert verdict == "hold"
    assert [x["outcome"] for x in document["screens"]] == ["outlier"]  # type: ignore[index]
    page1 = _page1(cell_paths(s, "LOT-A", "L-5")[1])
    assert "HOLD" in page1 and "lot screen: k_value_mV_per_day" in page1
    assert "Caution: this cell is held and must not be released until reviewed" in page1
    assert "qualified personnel" in page1
    verdict, document = _standing(s, "LOT-A", "L-1")
    assert verdict == "pass" and document["standing"]["grade"] == "A"  # type: ignore[index]
    assert "Grade A" in _page1(cell_paths(s, "LOT-A", "L-1")[1])
    with Ledger(s.ledger) as ledger:
        mails = [*ledger.outbox.in_state("pending"), *ledger.outbox.in_state("sent")]
    (hold,) = [m for m in mails if "HOLD cell L-5" in m.subject]
    assert "L-5~cell.pdf" in hold.body_text  # the hold's letter names the cell certificate
    body = _closing_digest(s)
    for cell in cells:
        pdf = cell_paths(s, "LOT-A", cell)[1]
        assert str(pdf.resolve()) in body or pdf.resolve().as_uri() in body or f"{cell}~cell.pdf" in body
        assert _current(s, "LOT-A", cell), cell


def test_a_lot_closed_by_command_publishes_its_cells_certificates_before_its_digest(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    from pipeline.cli.main import main

    s = make_station(tmp_path / "st")
    with running(s):
        cells = _lot(s)
        wait_until(lambda: settled(s, len(cells) + 1), what="the lot's files")
        wait_until(lambda: all(_current(s, "LOT-A", c) for c in cells), what="every cell published")
    assert all(_standing(s, "LOT-A", c)[0] == "pass" for c in cells)
    assert main(["lot", "close", str(s.root), "LOT-A"]) == 0  # no station runs: published here
    capsys.readouterr()
    _check_closed_lot(s, cells)


def test_a_lot_the_station_closes_waits_for_its_cells_certificates(tmp_path: Path) -> None:
    s = make_station(tmp_path / "st")

    def closed() -> bool:
        with Ledger(s.ledger) as ledger:
            return ledger.lots.get("LOT-A").closed_by == "station"

    with running(s):
        cells = _lot(s, quiet_h=0.002)  # 7.2 s
        wait_until(lambda: settled(s, len(cells) + 1), what="the lot's files")
        wait_until(closed, timeout_s=120, what="the station closing the quiet lot")
        wait_until(lambda: bool(_closing_digests(s)), what="the lot's closing digest")
        _check_closed_lot(s, cells)


def test_a_digest_waits_for_the_cell_certificates_of_its_lot_then_links_them(
    tmp_path: Path,
) -> None:
    import datetime
    import threading

    from pipeline.rulebook.book import load_rules_dir
    from pipeline.station.cellpublish import is_current, publish_cell_now
    from pipeline.station.digests import CELLS_WAIT_S, DigestDuty
    from pipeline.station.settings import read_settings
    from tests.station_kit import station_toml

    toml = station_toml()
    s = make_station(tmp_path / "st", toml.replace('digests_to = ["production@example.com"]\n', ""))
    with running(s):
        drop(s.inboxes[0].folder, "d1.csv", cycle_file("D-1"))
        wait_until(lambda: settled(s, 1) and _current(s, "LOT-A", "D-1"), what="the cell")
    (s.root / "station.toml").write_text(toml, encoding="utf-8")
    s = read_settings(s.root)  # digests go out from now on
    start = datetime.datetime.now(datetime.UTC)
    later = start + datetime.timedelta(seconds=s.routing.digest_quiet_s + 1)
    with Ledger(s.ledger) as ledger:
        # a decision the station has not published yet (as between a decision and its render)
        ledger.decisions.decide(cell_id="D-1", lot="LOT-A", verdict="hold", reason="held by test",
                                hazards=(), grade=None, cause="rules", basis=[], now=start)
        assert not is_current(s, ledger, "LOT-A", "D-1")
        DigestDuty(s, ledger, lambda: later, threading.Event()).queue()
        assert ledger.outbox.counts().get("pending", 0) == 0  # waits for the cell certificate
        published = publish_cell_now(s, ledger, load_rules_dir(s.rules_dir), "LOT-A", "D-1", later)
        assert published.pdf_path is not None and is_current(s, ledger, "LOT-A", "D-1")
        assert "HOLD" in _page1(published.pdf_path)
        DigestDuty(s, ledger, lambda: later, threading.Event()).queue()
        (digest,) = ledger.outbox.in_state("pending")
    assert "D-1~cell.pdf" in digest.body_text and "D-1.pdf" not in digest.body_text
    # past its wait, a digest goes with the certificates there are
    s2 = make_station(tmp_path / "st2", toml.replace('digests_to = ["production@example.com"]\n', ""))
    with running(s2):
        drop(s2.inboxes[0].folder, "e1.csv", cycle_file("E-1"))
        wait_until(lambda: settled(s2, 1) and _current(s2, "LOT-A", "E-1"), what="the cell")
    (s2.root / "station.toml").write_text(toml, encoding="utf-8")
    s2 = read_settings(s2.root)
    much_later = later + datetime.timedelta(seconds=CELLS_WAIT_S + 1)
    with Ledger(s2.ledger) as ledger:
        ledger.decisions.decide(cell_id="E-1", lot="LOT-A", verdict="hold", reason="held by test",
                                hazards=(), grade=None, cause="rules", basis=[], now=start)
        DigestDuty(s2, ledger, lambda: much_later, threading.Event()).queue()
        (digest,) = ledger.outbox.in_state("pending")
    assert "E-1~cell.pdf" in digest.body_text  # the one published before, on disk
