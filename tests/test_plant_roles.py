"""docs/plant.md's set-up and grants, run as they stand on a real server: the station's role may
add its rows and nothing more, quality staff read everything and record plant decisions."""

from __future__ import annotations

import datetime
import re
import threading
from pathlib import Path

import psycopg
import pytest

from pipeline.cli.main import main
from pipeline.plant.connect import PlantTarget
from pipeline.plant.feed import PlantFeed
from tests.conftest import REPO
from tests.plant_kit import assert_whole_and_once, caught_up, copy_ledger
from tests.plant_kit import judged_ledger as judged_ledger  # a fixture
from tests.plant_server import PlantServer
from tests.station_kit import make_station, wait_until

pytestmark = pytest.mark.slow

DOC = (REPO / "docs" / "plant.md").read_text(encoding="utf-8")


def _statements(block: str) -> list[str]:
    text = "\n".join(line for line in block.splitlines() if not line.strip().startswith("--"))
    return [s.strip() for s in text.split(";") if s.strip()]


def _run_as(url: str, statements: list[str]) -> None:
    with psycopg.connect(url, autocommit=True) as conn:
        for statement in statements:
            conn.execute(statement)  # type: ignore[arg-type]


def _feed(ledger: Path, url: str, station: str) -> None:
    stop = threading.Event()
    feed = PlantFeed(ledger, PlantTarget(url, station, connect_timeout_s=2), stop=stop,
                     clock=lambda: datetime.datetime.now(datetime.UTC), poll_s=0.05)
    feed.start()
    try:
        wait_until(lambda: caught_up(ledger), what="the feed to catch up")
    finally:
        stop.set()
        feed.join(60)


def test_the_documented_roles_feed_a_station_and_hold_it_to_its_own_columns(
    plant_server: PlantServer, judged_ledger: Path, tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
) -> None:
    setup, grants = re.findall(r"```sql\n(.*?)```", DOC, re.S)
    _run_as(plant_server.admin_url(), _statements(setup))
    owner = f"postgresql://formgate_owner@127.0.0.1:{plant_server.port}/formgate"
    assert main(["plant", "migrate", "--database", owner]) == 0
    assert ("plant schema at version 5 (applied: 0001_initial, 0002_channel_alerts, "
            "0003_plant_reviews, 0004_plant_letters, 0005_station_rows)") in capsys.readouterr().out
    _run_as(plant_server.admin_url("formgate"), _statements(grants))
    line1 = f"postgresql://formgate_line1@127.0.0.1:{plant_server.port}/formgate"
    root = tmp_path / "station"
    make_station(root)
    ledger = copy_ledger(judged_ledger, root)
    _feed(ledger, line1, "line-1")
    assert_whole_and_once(ledger, owner, "line-1")
    with psycopg.connect(line1, autocommit=True) as conn:
        for statement in ("UPDATE formgate.decisions SET verdict = 'pass'",
                          "DELETE FROM formgate.inputs",
                          "UPDATE formgate.inputs SET sha256 = repeat('0', 64)",
                          "CREATE TABLE formgate.other (x int)"):
            with pytest.raises(psycopg.errors.InsufficientPrivilege):
                conn.execute(statement)  # type: ignore[arg-type]
    # forwarded again, as after a plant restored from a backup: stored once, as the station may
    assert main(["plant", "resend", str(root)]) == 0
    assert "rows of test-station to be forwarded again" in capsys.readouterr().out
    _feed(ledger, line1, "line-1")
    assert_whole_and_once(ledger, owner, "line-1")
    # a station's role reads the plant, but a decision it makes is not recorded
    from pipeline.judge.cellverdict import CellDecision
    from pipeline.plant.cells import PlantCell, latest_plant_review, record_decision

    with psycopg.connect(line1, autocommit=True) as conn:
        sha = conn.execute("SELECT sha256 FROM formgate.rule_texts").fetchone()[0]  # type: ignore[index]
        made, new = record_decision(conn, PlantCell("LOT-A", "F-3", (), (), ()),
                                    CellDecision("fail", ("x",), (), ()), sha, decided_by="line-1",
                                    now=datetime.datetime.now(datetime.UTC))
        assert latest_plant_review(conn, "LOT-A", "F-3") is None  # it may not read them
    assert (made.id, made.decided_by, new) == (
        0, "line-1 (not recorded: this role may not record plant decisions)", True)
    engineer = f"postgresql://quality_engineer_a@127.0.0.1:{plant_server.port}/formgate"
    assert main(["plant", "find", "F-3", "--database", engineer]) == 0
    assert "station line-1  lot LOT-A  cell F-3  fail" in capsys.readouterr().out
    with psycopg.connect(engineer, autocommit=True) as conn:
        sha = conn.execute("SELECT sha256 FROM formgate.rule_texts").fetchone()[0]  # type: ignore[index]
        conn.execute(
            "INSERT INTO formgate.plant_decisions (cell_id, lot, verdict, reason, hazards, stations, "
            "basis, rule_set_sha256, decided_by, decided_at) VALUES ('F-3', 'LOT-A', 'fail', 'x', "
            "'[]', '[]', '[]', %s, 'quality_engineer_a', now())", (sha,))
        with pytest.raises(psycopg.errors.InsufficientPrivilege):
            conn.execute("UPDATE formgate.decisions SET verdict = 'pass'")


def test_a_station_role_may_not_add_or_change_rows_under_another_station_id(
    plant_server: PlantServer, judged_ledger: Path, tmp_path: Path,
) -> None:
    """Row-level security (migration 0005_station_rows): line-2's role is refused adding a row
    under line-1's id, and its updates of line-1's rows change nothing; under its own id it may."""
    url = plant_server.new_database()
    database = url.rsplit("/", 1)[1]
    setup, grants = re.findall(r"```sql\n(.*?)```", DOC, re.S)
    # the roles are the cluster's: made by the test above, or here when it did not run
    with psycopg.connect(plant_server.admin_url(), autocommit=True) as conn:
        made = conn.execute("SELECT 1 FROM pg_roles WHERE rolname = 'formgate_station'").fetchone()
    if made is None:
        _run_as(plant_server.admin_url(), [s for s in _statements(setup)
                                           if not s.startswith("CREATE DATABASE")])
    assert main(["plant", "migrate", "--database", url]) == 0
    roles = [s for s in _statements(grants) if made is None or not s.startswith("CREATE ROLE")]
    _run_as(url, [s.replace("DATABASE formgate", f"DATABASE {database}") for s in roles])
    line1 = url.replace("plant_admin@", "formgate_line1@")
    line2 = url.replace("plant_admin@", "formgate_line2@")
    root = tmp_path / "station"
    make_station(root)
    ledger = copy_ledger(judged_ledger, root)
    _feed(ledger, line1, "line-1")
    with psycopg.connect(url) as conn:
        assert conn.execute("SELECT station_id, role_name FROM formgate.stations").fetchall() == [
            ("line-1", "formgate_line1")]
        states = conn.execute("SELECT id, state FROM formgate.inputs ORDER BY id").fetchall()
    row = ("{station}", 900, "0" * 64, "x.csv", 1, "w/x.csv", "claimed", 1, "f" * 64)
    insert = ("INSERT INTO formgate.inputs (station_id, id, sha256, name, size, arrived_at, work_path, "
              "state, version, row_sha256) VALUES (%s, %s, %s, %s, %s, now(), %s, %s, %s, %s)")
    with psycopg.connect(line2, autocommit=True) as conn:
        with pytest.raises(psycopg.errors.InsufficientPrivilege, match="row-level security"):
            conn.execute(insert, ("line-1", *row[1:]))
        with pytest.raises(psycopg.errors.InsufficientPrivilege, match="row-level security"):
            conn.execute("INSERT INTO formgate.stations (station_id, ledger_id, role_name) "
                         "VALUES ('line-9', gen_random_uuid(), 'formgate_line1')")
        changed = conn.execute("UPDATE formgate.inputs SET state = 'quarantined', "
                               "final_path = 'q/x', final_at = now() WHERE station_id = 'line-1'")
        assert changed.rowcount == 0
        assert conn.execute("SELECT count(*) FROM formgate.inputs").fetchone() == (len(states),)
        # under its own station id it registers and adds rows, as its feed does
        conn.execute("INSERT INTO formgate.stations (station_id, ledger_id) "
                     "VALUES ('line-2', gen_random_uuid())")
        conn.execute(insert, ("line-2", *row[1:]))
    with (psycopg.connect(line1, autocommit=True) as conn,
          pytest.raises(psycopg.errors.InsufficientPrivilege, match="row-level security")):
        conn.execute(insert, ("line-2", 901, *row[2:]))
    with psycopg.connect(url) as conn:
        assert conn.execute("SELECT id, state FROM formgate.inputs WHERE station_id = 'line-1' "
                            "ORDER BY id").fetchall() == states
        assert conn.execute("SELECT station_id, role_name FROM formgate.stations ORDER BY 1").fetchall() == [
            ("line-1", "formgate_line1"), ("line-2", "formgate_line2")]
    assert_whole_and_once(ledger, url, "line-1")


def test_a_role_without_the_grant_gets_a_message_not_a_crash(
    plant_server: PlantServer, capsys: pytest.CaptureFixture[str]
) -> None:
    url = plant_server.new_database()
    _run_as(url, ["CREATE ROLE plant_reader_only LOGIN"])
    reader = url.replace("plant_admin@", "plant_reader_only@")
    assert main(["plant", "migrate", "--database", url]) == 0
    assert main(["plant", "find", "F-3", "--database", reader]) == 2
    assert capsys.readouterr().err.splitlines() == [
        "the plant database refused: permission denied for schema formgate.",
        "  Ask the plant database's owner for the grants in docs/plant.md (Roles and grants).",
    ]
