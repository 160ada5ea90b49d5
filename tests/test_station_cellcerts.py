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
