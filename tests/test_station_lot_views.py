"""What a station shows of a lot: the time each cell was decided, and the cells whose file was refused.

A real station judges the files; `formgate lot list`, `lot show`, `lot close` and `lot
report` run as commands on its folder. The lot's export gives each cell the time of the
decision it shows (not the analysis time of its records). A file that could not be judged
but names its lot and cell in its metadata shows as that cell, not judged, in the lot's
list, its view, its report and its export.
"""

from __future__ import annotations

import csv
import io
from pathlib import Path

import pytest
from pypdf import PdfReader

from pipeline.cli.main import main
from pipeline.ledger.ledger import Ledger
from pipeline.ledger.rows import InputRow
from pipeline.station.settings import Settings
from tests.station_kit import cycle_file, drop, make_station, running, settled, wait_until
from tests.test_station_cells import AGING_RULES, _readings

pytestmark = pytest.mark.slow

# A file that names its cell and lot, with a voltage that is not a number on line 6.
BAD = b"# cell_id: C-2\n# lot: LOT-A\n# cell_type: TEST-CELL\ntime_s,voltage_V,current_A\n0.0,3.301,0.0\n10.0,3.3O2,0.0\n"
BAD_REASON = "c2.csv, line 6, column 2: voltage_V is '3.3O2', not a number."


def _export(s: Settings) -> list[dict[str, str]]:
    text = (s.results / "LOT-A" / "_lot-cells.csv").read_text(encoding="utf-8")
    return list(csv.DictReader(io.StringIO(text)))


def _pdf_text(path: Path) -> str:
    return " ".join(" ".join(p.extract_text() for p in PdfReader(path).pages).split())


def test_the_lot_export_gives_each_cell_the_time_of_its_decision(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    s = make_station(tmp_path / "st")
    (s.rules_dir / "test_cells.toml").write_text(AGING_RULES, encoding="utf-8")
    with running(s):
        drop(s.inboxes[0].folder, "c1.csv", cycle_file("C-1"))
        drop(s.inboxes[0].folder, "c3.csv", cycle_file("C-3", capacity_ah=1.5, seed=3))
        wait_until(lambda: settled(s, 2), what="the cycle files")
        drop(s.inboxes[0].folder, "aging.csv", _readings([
            ("C-1", "2026-11-02T08:00:00Z", 3.6512), ("C-1", "2026-11-09T08:00:00Z", 3.6470),
            ("C-3", "2026-11-02T08:00:00Z", 3.6512), ("C-3", "2026-11-09T08:00:00Z", 3.6470),
        ]))
        wait_until(lambda: settled(s, 3), what="the tester file")

        def decided() -> bool:
            with Ledger(s.ledger) as ledger:
                return all(len(ledger.decisions.of_cell("LOT-A", c)) == 2 for c in ("C-1", "C-3"))

        wait_until(decided, what="both cells decided on their readings")

    def times() -> tuple[dict[str, str], dict[str, str]]:
        with Ledger(s.ledger) as ledger:
            decisions = {c: d.decided_at for c, d in ledger.decisions.latest_of_lot("LOT-A").items()}
            analysed = {r.cell_id: r.analysed_at for r in ledger.results.of_lot("LOT-A")}
        return (
            {c: t.isoformat() for c, t in decisions.items()},
            {c: t.isoformat() for c, t in analysed.items()},
        )

    # a report of the open lot: each cell as the ledger decided it, when it decided it
    assert main(["lot", "report", str(s.root), "LOT-A"]) == 0
    decisions, analysed = times()
    rows = {r["cell_id"]: r for r in _export(s)}
    assert {c: r["decided_at"] for c, r in rows.items()} == decisions
    assert all(decisions[c] != analysed[c] for c in rows)  # the readings decided later
    # closing records each cell's decision at the close (the pass gets its grade): its time
    assert main(["lot", "close", str(s.root), "LOT-A"]) == 0
    decisions, _ = times()
    rows = {r["cell_id"]: r for r in _export(s)}
    assert {c: r["decided_at"] for c, r in rows.items()} == decisions
    assert (rows["C-1"]["verdict"], rows["C-3"]["verdict"]) == ("pass", "fail")
    capsys.readouterr()


def _refused_station(tmp_path: Path) -> tuple[Settings, InputRow]:
    """A station that judged one good cell and refused three files; the refused C-2's row."""
    s = make_station(tmp_path / "st")
    with running(s):
        drop(s.inboxes[0].folder, "c1.csv", cycle_file("C-1"))
        drop(s.inboxes[0].folder, "c2.csv", BAD)
        # names no cell id: it stays among the station's errors only
        drop(s.inboxes[0].folder, "nameless.csv", b"# lot: LOT-A\ntime_s,voltage_V\n0.0,3.3\n")
        # the only file of its lot, refused: the lot is known all the same
        drop(s.inboxes[0].folder, "b1.csv", BAD.replace(b"C-2", b"B-1").replace(b"LOT-A", b"LOT-B"))
        wait_until(lambda: settled(s, 4), what="the four files")
    with Ledger(s.ledger) as ledger:
        (c2,) = [r for r in ledger.inputs.in_state("quarantined") if r.name == "c2.csv"]
    assert c2.final_path is not None and c2.final_at is not None
    return s, c2


def test_a_refused_file_that_names_its_cell_shows_in_lot_list_and_lot_show(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    s, c2 = _refused_station(tmp_path)
    capsys.readouterr()
    assert main(["lot", "list", str(s.root)]) == 0
    listed = capsys.readouterr().out.splitlines()
    assert listed[0].startswith("LOT-A: 2 cell(s): 1 pass, 0 fail, 0 hold, 1 not judged; last activity ")
    assert listed[1].startswith("LOT-B: 1 cell(s): 0 pass, 0 fail, 0 hold, 1 not judged; last activity ")
    assert len(listed) == 2
    assert main(["lot", "show", str(s.root), "LOT-A"]) == 0
    assert capsys.readouterr().out.splitlines() == [
        "lot LOT-A: 2 cell(s): 1 pass, 0 fail, 0 hold, 1 not judged; open",
        f"  C-2  not judged: {BAD_REASON} (in quarantine: {c2.final_path})",
        "  C-1  pass",
    ]
    # a corrected file sent again: the cell stands on its record, no longer as refused
    with running(s):
        drop(s.inboxes[0].folder, "c2-again.csv", cycle_file("C-2", seed=2))
        wait_until(lambda: settled(s, 5), what="the corrected file")
    assert main(["lot", "show", str(s.root), "LOT-A"]) == 0
    assert capsys.readouterr().out.splitlines() == [
        "lot LOT-A: 2 cell(s): 2 pass, 0 fail, 0 hold; open", "  C-1  pass", "  C-2  pass"
    ]


def test_a_refused_file_that_names_its_cell_is_in_the_lot_report_and_export(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    s, c2 = _refused_station(tmp_path)
    capsys.readouterr()
    assert main(["lot", "report", str(s.root), "LOT-A"]) == 0
    assert capsys.readouterr().out.splitlines()[0] == (
        "lot LOT-A: 2 cell(s), yield 50.0 % (1 error, 1 pass)"
    )
    text = _pdf_text(s.certificates / "LOT-A" / "_lot-report.pdf")
    assert "Not judged (error) 1 50.0 %" in text
    assert f"C-2 ERROR {BAD_REASON}" in text
    rows = {r["cell_id"]: r for r in _export(s)}
    assert (rows["C-1"]["verdict"], rows["C-2"]["verdict"]) == ("pass", "error")
    assert rows["C-2"]["reason"] == BAD_REASON
    assert rows["C-2"]["records"] == f"quarantined:c2.csv:{c2.sha256}"
    assert c2.final_at is not None
    assert rows["C-2"]["decided_at"] == c2.final_at.isoformat()


def test_a_refused_file_that_names_its_cell_is_counted_in_the_lots_digest(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """The closing digest counts the lot as its report and `lot close` do: the cell whose file
    was refused is one of its cells, not judged, and the yield is over every cell."""
    s, _ = _refused_station(tmp_path)
    capsys.readouterr()
    assert main(["lot", "close", str(s.root), "LOT-A"]) == 0
    assert capsys.readouterr().out.splitlines()[0] == (
        "lot LOT-A: 2 cell(s), yield 50.0 % (1 error, 1 pass)"
    )
    with Ledger(s.ledger) as ledger:
        (digest,) = [m for m in ledger.outbox.in_state("pending") if m.kind == "digest"]
    assert digest.subject.endswith("2 cells: 1 not judged, 1 pass; yield 50.0 %"), digest.subject
    body = " ".join(digest.body_text.split())
    assert "Cells: 2 (1 not judged, 1 pass)" in body and "Yield: 50.0 % (1 of 2 passed)" in body
    assert f"C-2 not judged \N{EM DASH} its file was not judged (in quarantine): {BAD_REASON}" in body
