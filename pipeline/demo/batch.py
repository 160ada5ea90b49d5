"""`formgate demo`: write the invented demo lot, check every file, print the lot summary.

The lot itself (cells, defects, curves) is demo.py's; this module only runs the
ordinary check path over it and shows where the outputs went.
"""

from __future__ import annotations

import datetime
from pathlib import Path

from pipeline.demo.lots import ALL_DEMO_CELLS, REVIEW_CASES, DemoCell, write_demo_lot
from pipeline.report.summary import summary_table
from pipeline.rulebook.book import load_rules_dir
from pipeline.runner import check_file
from pipeline.shipped import RULES_DIR


def expected_verdict(cell: DemoCell) -> str:
    """What the shipped rules must say of an invented cell: its case is built for that."""
    if not cell.defect:
        return "pass"
    return "hold" if cell.defect in REVIEW_CASES else "fail"


def run_demo(folder: Path, *, analysed_at: datetime.datetime, rules_dir: Path = RULES_DIR) -> int:
    """Write the lots into ``folder/inbox`` and check them into ``folder``.

    Returns 0 if every cell got the verdict its invented defect (or lack of one) calls for.
    """
    inbox = folder / "inbox"
    cells = ALL_DEMO_CELLS
    paths = write_demo_lot(inbox, cells=cells)
    rulebook = load_rules_dir(rules_dir)
    results, errors = [], []
    for path in paths:
        outcome = check_file(path, rulebook, folder, analysed_at=analysed_at)
        if outcome.result is not None:
            results.append(outcome.result)
        elif outcome.error is not None:
            errors.append((path.name, str(outcome.error).splitlines()[0]))
    table = summary_table(results, errors)
    (folder / "summary.txt").write_text(table, encoding="utf-8")
    print(table, end="")
    # every invented defect is one a reject check must catch; normal cells must pass
    expected = {cell.cell_id: expected_verdict(cell) for cell in cells}
    surprises = [
        f"{r.cell_id}: expected {expected[r.cell_id]}, got {r.verdict.kind.value}"
        for r in results
        if r.cell_id in expected and expected[r.cell_id] != r.verdict.kind.value
    ]
    for line in surprises:
        print(f"unexpected: {line}")
    print(f"\ninputs:        {inbox}")
    print(f"certificates:  {folder / 'certificates'}")
    print(f"results:       {folder / 'results'}")
    print(f"summary:       {folder / 'summary.txt'}")
    return 1 if surprises or errors else 0
