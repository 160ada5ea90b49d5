"""What a station counts, it counts as what it is: cells in a digest's log line, reading files in status.

A cell of a line with stages comes as a formation file and a grading file: two passed
records, one cell. The log line of a lot's digest counts cells, as the digest does. An
OCV reading file has no verdict of its own: `formgate status` counts it as a reading file,
never as an error.
"""

from __future__ import annotations

import datetime
import logging
import shutil
from pathlib import Path

import pytest

from pipeline.ledger.ledger import Ledger
from pipeline.station.status import status_text
from tests.station_kit import (
    cycle_file,
    drop,
    make_station,
    running,
    settled,
    station_toml,
    wait_until,
)

pytestmark = pytest.mark.slow


def test_the_digest_log_line_counts_cells_as_the_digest_does(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    from pipeline.demo.lots import (
        DEMO_STAGED_CELLS,
        demo_aging_file,
        demo_stage_files,
        stage_file_name,
    )
    from pipeline.shipped import RULES_DIR

    # the digest waits until the lot has been quiet for 4 s: all five files are judged by then
    toml = station_toml().replace("digest_quiet_s = 1.0", "digest_quiet_s = 4.0")
    s = make_station(tmp_path / "st", toml)
    shutil.copy(RULES_DIR / "nmc_graphite.toml", s.rules_dir / "nmc_graphite.toml")
    # a normal cell, and the cell of low capacity: its formation passes, its grading fails
    cells = [DEMO_STAGED_CELLS[0], DEMO_STAGED_CELLS[22]]
    assert cells[1].defect == "low_capacity"
    caplog.set_level(logging.INFO, logger="formgate.station")
    with running(s):
        for stage in ("formation", "grading"):
            for cell in cells:
                drop(s.inboxes[0].folder, stage_file_name(cell, stage), demo_stage_files(cell)[stage])
        drop(s.inboxes[0].folder, "aging.csv", demo_aging_file(cells))
        wait_until(lambda: settled(s, 5), what="four stage files and the tester file")

        def digested() -> bool:
            with Ledger(s.ledger) as ledger:
                return ledger.digests.count(cells[0].lot) == 1

        wait_until(digested, what="the lot's digest")
    with Ledger(s.ledger) as ledger:
        (digest,) = [m for m in ledger.outbox.in_state("sent") if m.kind == "digest"]
    assert "2 cells: 1 fail, 1 pass" in digest.subject
    lines = [r.getMessage() for r in caplog.records if r.getMessage().startswith("digest queued")]
    assert lines == ["digest queued for lot DEMO-LOT-04: 2 cell(s), 1 newly passed"]


def _readings() -> bytes:
    return (
        b"# kind: ocv readings\n# lot: LOT-A\ncell_id,time,ocv_V,cell_type\n"
        b"C-1,2026-11-02T08:00:00Z,3.6512,TEST-CELL\nC-1,2026-11-09T08:00:00Z,3.6470,TEST-CELL\n"
    )


def test_status_counts_a_reading_file_as_a_reading_file_not_an_error(tmp_path: Path) -> None:
    s = make_station(tmp_path / "st")
    with running(s):
        drop(s.inboxes[0].folder, "c1.csv", cycle_file("C-1"))
        drop(s.inboxes[0].folder, "aging.csv", _readings())
        drop(s.inboxes[0].folder, "bad.csv", b"# cell_id: C-2\nnot a cycle file\n")
        wait_until(lambda: settled(s, 3), what="the three files")
    report = status_text(s, datetime.datetime.now(datetime.UTC))
    assert "today (UTC): 1 pass, 0 fail, 0 hold, 1 error, 0 duplicate, 1 reading file\n" in report
    with Ledger(s.ledger) as ledger:
        midnight = datetime.datetime.now(datetime.UTC).replace(hour=0, minute=0, second=0)
        assert ledger.inputs.counts_since(midnight) == {
            "pass": 1, "fail": 0, "hold": 0, "error": 1, "duplicate": 0, "readings": 1
        }
