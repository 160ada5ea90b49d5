"""Two real stations on one plant database: a cell formed at one and graded at the other is
decided once, in the plant, by the stations' own logic; a lot over both, its yield and export.

The stations judge invented demo cells of the shipped NMC rule set (pipeline.demo.lots);
each forwards its own ledger through its own feed to a PostgreSQL server of the tests' own.
"""

from __future__ import annotations

import csv
import hashlib
import io
import shutil
from pathlib import Path

import psycopg
import pyarrow.parquet as pq
import pytest

from pipeline.cli.main import main
from pipeline.demo.lots import DEMO_STAGED_CELLS, demo_aging_file, demo_stage_files
from pipeline.ledger.ledger import Ledger
from pipeline.shipped import RULES_DIR
from pipeline.station.settings import Settings
from tests.plant_kit import caught_up, same_rows
from tests.plant_server import PlantServer
from tests.station_kit import drop, make_station, running, settled, station_toml, wait_until

pytestmark = pytest.mark.slow

CELLS = DEMO_STAGED_CELLS[:4]
SHARED, OWN = CELLS[:3], CELLS[3]  # formed at hall A, graded at hall B; all at hall A
LOW = DEMO_STAGED_CELLS[22]  # a low-capacity cell, formed at hall A and failed at grading at hall B
assert LOW.defect == "low_capacity"
LOT = CELLS[0].lot


def _station(root: Path, station_id: str, url: str) -> Settings:
    s = make_station(root, station_toml() + f'\n[plant]\ndatabase = "{url}"\nstation_id = "{station_id}"\n')
    shutil.copy(RULES_DIR / "nmc_graphite.toml", s.rules_dir / "nmc_graphite.toml")
    return s


def _fed(s: Settings, url: str, station_id: str, files: int) -> None:
    wait_until(lambda: settled(s, files), what=f"{station_id}'s files judged")
    wait_until(lambda: caught_up(s.ledger) and same_rows(s.ledger, url, station_id),
               what=f"{station_id}'s feed to catch up")


@pytest.fixture(scope="module")
def plant(tmp_path_factory: pytest.TempPathFactory, plant_server: PlantServer) -> tuple[str, Path, Path]:
    """The plant database fed by hall A (formation and aging of every cell, grading of one) and
    hall B (grading of the others)."""
    url = plant_server.new_database()
    root = tmp_path_factory.mktemp("plant")
    a, b = _station(root / "a", "hall-a", url), _station(root / "b", "hall-b", url)
    with running(a):
        for cell in (*CELLS, LOW):
            drop(a.inboxes[0].folder, f"{cell.cell_id}-formation.csv", demo_stage_files(cell)["formation"])
        drop(a.inboxes[0].folder, "aging.csv", demo_aging_file((*CELLS, LOW)))
        drop(a.inboxes[0].folder, f"{OWN.cell_id}-grading.csv", demo_stage_files(OWN)["grading"])
        _fed(a, url, "hall-a", 7)
    with running(b):
        for cell in (*SHARED, LOW):
            drop(b.inboxes[0].folder, f"{cell.cell_id}-grading.csv", demo_stage_files(cell)["grading"])
        _fed(b, url, "hall-b", 4)
    return url, a.ledger, b.ledger


def _run(capsys: pytest.CaptureFixture[str], *argv: str) -> str:
    capsys.readouterr()
    assert main(list(argv)) == 0
    return capsys.readouterr().out


def _latest(ledger: Path, cell_id: str) -> tuple[str, str]:
    with Ledger(ledger) as kept:
        d = kept.decisions.latest(LOT, cell_id)
        assert d is not None
        return d.verdict, d.reason


def test_each_station_waits_for_the_stage_the_other_ran(plant: tuple[str, Path, Path]) -> None:
    _, a, b = plant
    assert _latest(a, SHARED[0].cell_id) == ("hold", "waiting for stage grading")
    assert _latest(b, SHARED[0].cell_id) == ("hold", "waiting for stage formation; waiting for stage aging")
    assert _latest(a, OWN.cell_id) == ("pass", "")


def test_a_cell_formed_at_one_station_and_graded_at_another_has_one_plant_decision(
    plant: tuple[str, Path, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    url, _, _ = plant
    cell = SHARED[0].cell_id
    out = _run(capsys, "plant", "cell", "show", cell, "--database", url)
    grading = hashlib.sha256(demo_stage_files(SHARED[0])["grading"]).hexdigest()
    assert f"cell {cell}, lot {LOT}, at 2 station(s): hall-a, hall-b" in out
    decisions = [line.strip().split("  ", 2) for line in out.splitlines()
                 if line.startswith("    station ")]
    assert [(d[0], d[2]) for d in decisions] == [
        ("station hall-a", "hold  (readings): waiting for stage grading"),
        ("station hall-b", "hold  (record): waiting for stage formation; waiting for stage aging"),
    ]
    assert f"station hall-b  {cell}-grading.csv  grading  pass" in out
    assert "  plant decision (new): pass\n" in out
    again = _run(capsys, "plant", "cell", "show", cell, "--database", url)
    assert "  plant decision: pass\n" in again  # the same decision is not recorded twice
    with psycopg.connect(url) as conn:
        rows = conn.execute(
            "SELECT verdict, stations, basis FROM formgate.plant_decisions WHERE cell_id = %s", (cell,)
        ).fetchall()
    assert len(rows) == 1 and rows[0][:2] == ("pass", ["hall-a", "hall-b"])
    assert f"hall-b:{cell}-grading.csv:{grading}" in rows[0][2]
    # a cell whose records are all at one station is decided there only
    own = _run(capsys, "plant", "cell", "show", OWN.cell_id, "--database", url)
    assert "plant decision: none (every record is at one station, which decides it)" in own


def test_the_lot_over_both_stations_has_one_yield_and_exports(
    plant: tuple[str, Path, Path], capsys: pytest.CaptureFixture[str], tmp_path: Path
) -> None:
    url, _, _ = plant
    out = _run(capsys, "plant", "lot", "show", LOT, "--database", url)
    assert out.splitlines()[0] == (
        f"lot {LOT}: 5 cell(s) at 2 station(s) (hall-a, hall-b): 4 pass, 1 fail, 0 hold; yield 80.0 %"
    )
    assert out.splitlines()[1].startswith(f"  {LOW.cell_id}  fail: grading_capacity_Ah ")
    assert f"  {SHARED[0].cell_id}  pass  (plant; hall-a, hall-b)" in out
    assert f"  {OWN.cell_id}  pass  (station hall-a; hall-a)" in out
    assert "screens over every station's passing cells (" in out
    _run(capsys, "plant", "lot", "export", LOT, "--out", str(tmp_path / "lot.csv"), "--database", url)
    _run(capsys, "plant", "lot", "export", LOT, "--out", str(tmp_path / "lot.parquet"), "--database", url)
    rows = list(csv.DictReader(io.StringIO((tmp_path / "lot.csv").read_text(encoding="utf-8"))))
    table = pq.read_table(tmp_path / "lot.parquet").to_pylist()
    assert [r["cell_id"] for r in rows] == [c.cell_id for c in (*CELLS, LOW)] == [r["cell_id"] for r in table]
    assert rows[0]["decided_by"] == "plant" and rows[0]["stations"] == "hall-a;hall-b"
    capacity = [float(r["grading_capacity_Ah"]) for r in rows]
    assert capacity == [r["grading_capacity_Ah"] for r in table] and all(c > 0 for c in capacity)


def test_yield_by_station_and_finding_a_file_by_its_hash(
    plant: tuple[str, Path, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    url, _, _ = plant
    out = _run(capsys, "plant", "yield", "--by", "station", "--database", url)
    assert out.splitlines() == [
        "station          cells   pass   fail   hold   yield",
        "hall-a               1      1      0      0  100.0 %",
        "hall-a + hall-b      4      3      1      0   75.0 %",
    ]
    by_type = _run(capsys, "plant", "yield", "--by", "cell-type", "--database", url)
    assert by_type.splitlines()[1].startswith(f"{CELLS[0].cell_type}  ")
    sha = hashlib.sha256(demo_stage_files(SHARED[1])["grading"]).hexdigest()
    found = _run(capsys, "plant", "find", sha, "--database", url)
    assert found.startswith("station hall-b  input ")
    assert f"{SHARED[1].cell_id}-grading.csv  archived" in found
    assert found.rstrip().endswith(f"cell {SHARED[1].cell_id} lot {LOT}: pass")


def test_a_review_decides_the_plant_cell_only_while_it_saw_every_file_that_counts(
    plant: tuple[str, Path, Path],
) -> None:
    from pipeline.judge.review import Asked, Decided, Reviewed
    from pipeline.plant.cells import decide_cell, fetch_cell, latest_rule_set, rule_book

    url, _, _ = plant
    with psycopg.connect(url) as conn:
        cell = fetch_cell(conn, LOT, SHARED[0].cell_id)
        book = rule_book(conn, latest_rule_set(cell) or "")
    files = {(r.input_name, r.input_sha256) for r in cell.records} | {
        (name, sha) for _, name, sha, _ in cell.readings}
    rejected = Decided("fail", "rejected by quality engineer A: dented can")
    saw_all = Reviewed(Asked("reject", "quality engineer A", "dented can"), rejected, frozenset(files))
    saw_one_station = Reviewed(Asked("reject", "quality engineer A", "dented can"), rejected,
                               frozenset(f for f in files if "grading" in f[0]))
    assert decide_cell(cell, book, [saw_all]).reason == "rejected by quality engineer A: dented can"  # type: ignore[union-attr]
    assert decide_cell(cell, book, [saw_one_station]).verdict == "pass"  # type: ignore[union-attr]


def test_a_person_reviews_a_cell_of_two_stations_in_the_plant(
    plant: tuple[str, Path, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    from pipeline.judge.review import failed_checks
    from pipeline.plant.cells import cell_as_it_stands, fetch_cell, latest_rule_set, rule_book

    url, _, _ = plant
    with psycopg.connect(url) as conn:
        cell = fetch_cell(conn, LOT, LOW.cell_id)
        now = cell_as_it_stands(cell, rule_book(conn, latest_rule_set(cell) or ""))
    assert now is not None
    failed = failed_checks(now.stages.records)
    assert failed  # the low-capacity cell failed its grading at hall B
    # a concession must name every failed check
    capsys.readouterr()
    assert main(["plant", "review", "release", LOW.cell_id, "--by", "quality engineer A", "--reason",
                 "customer concession 14", "--database", url]) == 2
    assert f"cell {LOW.cell_id} failed: it is released only as a concession that names every" in (
        capsys.readouterr().err)
    accepts = [a for c in failed for a in ("--accept", c)]
    out = _run(capsys, "plant", "review", "release", LOW.cell_id, *accepts, "--by", "quality engineer A",
               "--reason", "customer concession 14", "--database", url)
    assert out.splitlines()[0] == (
        f"cell {LOW.cell_id}, lot {LOT}: pass: released as a concession by quality engineer A accepting "
        f"{', '.join(failed)}: customer concession 14")
    # the review stands: deciding the cell again keeps it, and the lot counts it as passed
    shown = _run(capsys, "plant", "cell", "show", LOW.cell_id, "--database", url)
    assert "  plant decision: pass: released as a concession by quality engineer A" in shown
    lot = _run(capsys, "plant", "lot", "show", LOT, "--database", url)
    assert ": 5 pass, 0 fail, 0 hold; yield 100.0 %" in lot.splitlines()[0]
    # a cell of one station is reviewed at its station
    assert main(["plant", "review", "reject", OWN.cell_id, "--by", "quality engineer A", "--reason", "x",
                 "--database", url]) == 2
    assert "is not decided in the plant: its records are at one station (hall-a)" in capsys.readouterr().err

