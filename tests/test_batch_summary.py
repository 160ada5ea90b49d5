"""The batch summary table: one row per cell, a fail or hold saying why in one line, as check does.

Real demo cells, read and judged by the runner as `formgate demo --batch` does; the table's
reason column holds exactly what `formgate check` prints after a cell's verdict.
"""

from __future__ import annotations

import datetime
from pathlib import Path

import pytest

from pipeline.acceptance.results import CellResult
from pipeline.cli.main import main
from pipeline.demo.lots import DEMO_CELLS, demo_file_bytes
from pipeline.report.summary import summary_table
from pipeline.rulebook.book import load_rules_dir
from pipeline.runner import judge
from tests.conftest import RULES_DIR

ANALYSED_AT = datetime.datetime(2026, 12, 1, 8, 0, tzinfo=datetime.UTC)
# a normal cell, a high DCIR, an over-temperature (a hazard) and the slow drift held for review
CELLS = [DEMO_CELLS[0], DEMO_CELLS[10], DEMO_CELLS[13], DEMO_CELLS[14]]


@pytest.fixture(scope="module")
def results() -> list[CellResult]:
    rulebook = load_rules_dir(RULES_DIR)
    return [
        judge(demo_file_bytes(c), c.file_name, rulebook, analysed_at=ANALYSED_AT) for c in CELLS
    ]


def test_each_row_ends_with_the_reason_check_gives(
    results: list[CellResult], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    assert [c.defect for c in CELLS] == ["", "high_dcir", "over_temperature", "slow_drift"]
    lines = summary_table(results, [("bad.csv", "bad.csv, line 6: not a number.")]).splitlines()
    assert lines[0].split()[-1] == "reason"
    rows = {line.split()[0]: line for line in lines[2 : 2 + len(CELLS)]}
    # what formgate check prints after each file's verdict, for the same files
    for cell in CELLS:
        (tmp_path / cell.file_name).write_bytes(demo_file_bytes(cell))
    argv = ["check", *(str(tmp_path / c.file_name) for c in CELLS), "--rules", str(RULES_DIR),
            "--analysed-at", ANALYSED_AT.isoformat()]
    main(argv)
    checked = capsys.readouterr().out.splitlines()
    for cell, line in zip(CELLS, checked, strict=True):
        name, cell_id, verdict, reason = line.split("  ", 3)
        assert (name, cell_id) == (cell.file_name, cell.cell_id)
        row = rows[cell.cell_id]
        assert row.split()[1] == verdict
        assert row.endswith(f"  {reason}"), (row, reason)
    assert "[hazard: over_temperature]" in rows[CELLS[2].cell_id]
    assert "(review)" in rows[CELLS[3].cell_id]
    # every cell is one row; errors and the yield follow
    assert lines[2 + len(CELLS)] == ""
    assert lines[3 + len(CELLS) :] == [
        "bad.csv (error): bad.csv, line 6: not a number.",
        "",
        "5 file(s): 1 pass, 2 fail, 1 hold, 1 error; first-pass yield 20.0 %",
    ]
