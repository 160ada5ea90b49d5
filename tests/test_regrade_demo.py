"""A regrade of the station `formgate demo` leaves: the cells a raised capacity floor moves,
and the cells a person reviewed.

Every part is real: the demo's station (its ledger, archive and closed lots), `formgate review`,
and `formgate regrade` judging the archive again on a Dask cluster of this machine. Each test
works on its own copy of the session's demo station.
"""

from __future__ import annotations

import csv
import io
import json
import shutil
import sqlite3
from pathlib import Path

import pytest

from pipeline.cli.main import main

pytestmark = pytest.mark.slow

QE = "quality engineer A"
NEW_FLOOR = 1.015  # the NMC capacity floor raised from 100 % to 101.5 % of rated
NEW_REVISION = "2026-12-06.1"


def _copy(demo_station: tuple[Path, str], to: Path) -> Path:
    shutil.copytree(demo_station[0], to, symlinks=True)
    return to


def _raised_floor(rules: Path, to: Path) -> Path:
    """A copy of the rules folder ``rules`` with the NMC capacity floor at NEW_FLOOR of rated,
    under a new revision."""
    shutil.copytree(rules, to)
    nmc = to / "nmc_graphite.toml"
    text = nmc.read_text(encoding="utf-8")
    section = text.index("\n[check.grading_capacity]\n")
    floor = text.index("\nlow = 1.00 ", section)
    assert floor < text.index("\n[", section + 1)  # the floor of that check
    text = text[:floor] + f"\nlow = {NEW_FLOOR} " + text[floor + len("\nlow = 1.00 "):]
    old = next(line for line in text.splitlines() if line.startswith("revision = "))
    nmc.write_text(text.replace(old, f'revision = "{NEW_REVISION}"', 1), encoding="utf-8")
    return to


def _regrade(root: Path, *args: str, capsys: pytest.CaptureFixture[str]) -> tuple[str, Path]:
    """Run `formgate regrade`; what it printed and its change report's CSV."""
    capsys.readouterr()
    assert main(["regrade", str(root), *args, "--workers", "2", "--no-progress"]) == 0
    out = capsys.readouterr().out
    csv_path = Path(next(line for line in out.splitlines() if line.strip().endswith("-changes.csv"))
                    .split()[-1])
    return out, csv_path if csv_path.is_absolute() else Path.cwd() / csv_path


def _rows(path: Path) -> list[dict[str, str]]:
    return list(csv.DictReader(io.StringIO(path.read_text(encoding="utf-8"))))


def _release(root: Path, cell: str, *accepts: str, capsys: pytest.CaptureFixture[str]) -> None:
    accept = [a for check in accepts for a in ("--accept", check)]
    assert main(["review", "release", str(root), cell, *accept, "--by", QE,
                 "--reason", "measured again by hand"]) == 0
    capsys.readouterr()


def _latest(root: Path, cell: str) -> tuple[str, str]:
    """(verdict, cause) of the cell's latest decision, read from the ledger with SQL."""
    with sqlite3.connect(f"file:{root / 'ledger.sqlite'}?mode=ro", uri=True) as db:
        return db.execute("SELECT verdict, cause FROM decisions WHERE cell_id = ? "
                          "ORDER BY id DESC LIMIT 1", (cell,)).fetchone()


def test_a_released_cell_is_asked_again_exactly_when_the_new_rules_change_what_was_seen(
    demo_station: tuple[Path, str], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    root = _copy(demo_station, tmp_path / "station")
    # S04-024: held at the close of DEMO-LOT-04 (an outlier of its lot's K-value screen) and
    # released; its grading capacity lies under the raised floor. L01-009: failed in the open
    # DEMO-LOT-01 for its capacity, released as a concession; no NMC rule judges it.
    _release(root, "S04-024", capsys=capsys)
    _release(root, "L01-009", "grading_capacity", capsys=capsys)
    assert _latest(root, "S04-024") == ("pass", "review")
    assert _latest(root, "L01-009") == ("pass", "review")
    # the station's own rules, unchanged: nothing changes, no cell is asked again
    out, report = _regrade(root, capsys=capsys)
    assert "no cell changes" in out and "new review" not in out
    assert _rows(report) == []
    # the raised floor fails the released S04-024: listed for a new review, not changed
    proposed = _raised_floor(root / "rules", tmp_path / "proposed")
    out, report = _regrade(root, "--rules", str(proposed), capsys=capsys)
    reviewed = {r["cell_id"]: r for r in _rows(report) if r["applied"] == "left for a new review"}
    assert set(reviewed) == {"S04-024"}
    assert (reviewed["S04-024"]["change"], reviewed["S04-024"]["check"]) == (
        "pass → fail", "grading_capacity")
    assert "pass → fail (left for a new review): 1" in out
    # applied, it records the other cells and leaves the person's decision standing
    shutil.copy(proposed / "nmc_graphite.toml", root / "rules" / "nmc_graphite.toml")
    out, report = _regrade(root, "--apply", "--by", QE, "--reason", "floor raised", capsys=capsys)
    assert "pass → fail (left for a new review): 1" in out
    assert {r["cell_id"] for r in _rows(report) if r["applied"] == "left for a new review"} == {
        "S04-024"}
    assert _latest(root, "S04-024") == ("pass", "review")
    assert _latest(root, "L01-009") == ("pass", "review")
    # a cell it decided anew names the rule set and revision that judged that cell again
    assert main(["cell", "show", str(root), "S04-001"]) == 0
    shown = capsys.readouterr().out
    assert f"(regrade 1 under nmc-graphite {NEW_REVISION}: floor raised)" in shown
    assert "lfp-graphite" not in shown


def test_a_raised_capacity_floor_lists_exactly_the_cells_between_the_old_and_new_floor(
    demo_station: tuple[Path, str], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    root = _copy(demo_station, tmp_path / "station")
    # what should change, from the ledger's rows alone: every NMC record that counts whose
    # grading capacity lies between the floor it was judged by and the raised one
    expected: dict[str, str] = {}
    with sqlite3.connect(f"file:{root / 'ledger.sqlite'}?mode=ro", uri=True) as db:
        latest = {cell: verdict for cell, verdict in db.execute(
            "SELECT cell_id, verdict FROM decisions d WHERE id = "
            "(SELECT max(id) FROM decisions e WHERE e.cell_id = d.cell_id AND e.lot = d.lot)")}
        for cell, text in db.execute(
            "SELECT cell_id, result_json FROM results WHERE superseded_by IS NULL "
            "AND verdict <> 'error' AND rule_set_name = 'nmc-graphite'"
        ):
            doc = json.loads(text)
            check = next((c for c in doc["checks"] if c["id"] == "grading_capacity"), None)
            if check is None:  # a formation file: no grading capacity measured
                continue
            rated = doc["cell_type"]["nominal_capacity_Ah"]
            assert check["low"] == pytest.approx(1.00 * rated)
            if check["low"] <= check["value"] < NEW_FLOOR * rated:
                expected[cell] = f"{latest[cell]} → fail"
    assert len(expected) >= 5 and "pass → fail" in expected.values()
    proposed = _raised_floor(root / "rules", tmp_path / "proposed")
    out, report = _regrade(root, "--rules", str(proposed), capsys=capsys)
    rows = _rows(report)
    assert {r["cell_id"]: r["change"] for r in rows} == expected
    for cell in expected:  # each with its capacity check: the old floor and outcome, the new
        [line] = [r for r in rows if r["cell_id"] == cell and r["check"] == "grading_capacity"]
        assert (line["old_outcome"], line["new_outcome"]) == ("in_window", "out_of_window")
        assert float(line["new_low"]) == pytest.approx(float(line["old_low"]) * NEW_FLOOR)
        assert float(line["old_low"]) <= float(line["new_value"]) < float(line["new_low"])
    assert "dry run: nothing recorded" in out


def test_one_cell_of_a_closed_lot_regrades_its_whole_lot_and_says_so(
    demo_station: tuple[Path, str], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    root = _copy(demo_station, tmp_path / "station")
    proposed = _raised_floor(root / "rules", tmp_path / "proposed")
    with sqlite3.connect(f"file:{root / 'ledger.sqlite'}?mode=ro", uri=True) as db:
        assert db.execute("SELECT closed_at FROM lots WHERE lot = 'DEMO-LOT-04'").fetchone()[0]
    # the lot as a whole: what the raised floor changes in it
    _, whole = _regrade(root, "--rules", str(proposed), "--lot", "DEMO-LOT-04", capsys=capsys)
    lot = {r["cell_id"]: r["change"] for r in _rows(whole)}
    assert "S04-018" in lot and len(lot) > 1
    # one cell of the closed lot: its screens need every cell, so the lot is judged whole and
    # decided as above (no cell held or released by old and new records mixed), and it says so
    out, one = _regrade(root, "--rules", str(proposed), "--cell", "S04-018", capsys=capsys)
    assert "lot DEMO-LOT-04 is closed: its screens compare every cell, so all " in out
    assert "of its inputs were judged again (the selection took 2)" in out
    assert {r["cell_id"]: r["change"] for r in _rows(one)} == lot
    assert "pass → hold" not in out
    # a cell of an open lot is regraded alone
    out, alone = _regrade(root, "--rules", str(proposed), "--cell", "N02-001", capsys=capsys)
    assert "is closed" not in out
    assert {r["cell_id"]: r["change"] for r in _rows(alone)} == {"N02-001": "pass → fail"}
    # applied, the cells of the lot decided anew are those the lot's own regrade lists
    shutil.copy(proposed / "nmc_graphite.toml", root / "rules" / "nmc_graphite.toml")
    out, applied = _regrade(root, "--cell", "S04-018", "--apply", "--by", QE, "--reason",
                            "floor raised", capsys=capsys)
    assert {r["cell_id"]: r["change"] for r in _rows(applied)} == lot
    with sqlite3.connect(f"file:{root / 'ledger.sqlite'}?mode=ro", uri=True) as db:
        regraded = {cell for (cell,) in db.execute(
            "SELECT DISTINCT cell_id FROM decisions WHERE cause = 'regrade'")}
    assert regraded == set(lot)  # no review in this lot: every change recorded
