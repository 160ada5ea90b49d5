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

pytestmark = pytest.mark.slow

# A file that names its cell and lot, with a voltage that is not a number on line 6.
BAD = b"# cell_id: C-2\n# lot: LOT-A\n# cell_type: TEST-CELL\ntime_s,voltage_V,current_A\n0.0,3.301,0.0\n10.0,3.3O2,0.0\n"
BAD_REASON = "c2.csv, line 6, column 2: voltage_V is '3.3O2', not a number."


def _export(s: Settings) -> list[dict[str, str]]:
    text = (s.results / "LOT-A" / "_lot-cells.csv").read_text(encoding="utf-8")
    return list(csv.DictReader(io.StringIO(text)))


def _pdf_text(path: Path) -> str:
    return " ".join(" ".join(p.extract_text() for p in PdfReader(path).pages).split())


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
