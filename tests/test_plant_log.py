"""The ledger's log of changes for the plant feed (kept by triggers once the feed has started),
and what the plant tests do where no PostgreSQL server can be started."""

from __future__ import annotations

import datetime
import sqlite3
from pathlib import Path

import pytest

from pipeline.ledger.ledger import Ledger
from pipeline.ledger.migrations import FED_TABLES

T0 = datetime.datetime(2026, 3, 2, 6, 0, tzinfo=datetime.UTC)


def _claim(ledger: Ledger, n: int) -> int:
    row, _ = ledger.inputs.claim(sha256=f"{n:064x}", name=f"c{n}.csv", size=10, arrived_at=T0,
                                 work_path=f"work/c{n}.csv")
    return row.id


def _log(path: Path) -> list[tuple[str, object]]:
    with sqlite3.connect(path) as conn:
        return [(str(t), k) for t, k in conn.execute("SELECT tbl, row_key FROM plant_changes ORDER BY seq")]


def test_no_change_is_logged_before_the_feed_starts_and_every_one_after(tmp_path: Path) -> None:
    path = tmp_path / "ledger.sqlite"
    with Ledger(path, now=T0) as ledger:
        _claim(ledger, 1)
        assert _log(path) == []
        with ledger.db.write() as conn:
            conn.execute("INSERT INTO plant_feed (id, ledger_id, started_at) VALUES (1, ?, ?)",
                         ("0" * 36, T0.isoformat()))
        second = _claim(ledger, 2)
        with ledger.db.write() as conn:
            conn.execute("UPDATE inputs SET reason = 'by hand' WHERE id = 1")
            conn.execute("DELETE FROM inputs WHERE id = ?", (second,))
    assert _log(path) == [("inputs", second), ("inputs", 1), ("inputs", second)]


def test_every_fed_table_has_its_three_triggers_at_the_latest_schema(tmp_path: Path) -> None:
    path = tmp_path / "ledger.sqlite"
    Ledger(path, now=T0).close()
    with sqlite3.connect(path) as conn:
        triggers = {
            (str(t), str(n)) for t, n in conn.execute(
                "SELECT tbl_name, name FROM sqlite_schema WHERE type = 'trigger'")
        }
    for table, _ in FED_TABLES:
        for what in ("insert", "update", "delete"):
            assert (table, f"plant_log_{table}_{what}") in triggers


def test_without_server_binaries_the_plant_tests_skip_and_say_why_but_fail_in_ci(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    from tests import plant_server

    monkeypatch.setattr(plant_server, "server_bin", lambda: None)
    with pytest.raises(pytest.skip.Exception, match=r"no PostgreSQL server binaries .* apt-get install postgresql"):
        plant_server.require_server({})
    with pytest.raises(pytest.fail.Exception, match="CI must run them"):
        plant_server.require_server({"CI": "true"})


def test_every_ledger_table_and_column_is_forwarded_to_the_plant_or_kept_at_the_station_for_a_reason(
    tmp_path: Path,
) -> None:
    from pipeline.plant.tables import FED, KEPT_AT_STATION

    path = tmp_path / "ledger.sqlite"
    Ledger(path, now=T0).close()
    with sqlite3.connect(path) as conn:
        tables = {str(r[0]) for r in conn.execute(
            "SELECT name FROM sqlite_schema WHERE type = 'table' AND name NOT LIKE 'sqlite_%'")}
        columns = {t: tuple(str(r[1]) for r in conn.execute(f"PRAGMA table_info({t})")) for t in tables}
    fed = {f.table: f for f in FED}
    assert sorted(tables - set(fed) - set(KEPT_AT_STATION)) == [], (
        "a ledger table neither forwarded (pipeline/plant/tables.py FED, a plant migration and "
        "the ledger's triggers) nor kept at the station (KEPT_AT_STATION, with why)")
    for table, spec in fed.items():
        assert spec.names == columns[table], f"{table}: a column is not forwarded to the plant"
    assert [(t, k) for t, k in FED_TABLES] == [(f.table, f.key) for f in FED]


def test_status_says_a_feed_that_never_ran_has_not_started(tmp_path: Path) -> None:
    from pipeline.plant.feed import status_line
    from pipeline.plant.forward import start_log

    with Ledger(tmp_path / "ledger.sqlite", now=T0) as ledger:
        _claim(ledger, 1)
        assert status_line(ledger, "db:5432/plant") == (
            "plant feed: not started yet (db:5432/plant; the running station starts it)")
        start_log(ledger, now=T0)
        assert status_line(ledger, "db:5432/plant") == "plant feed: 1 row behind (db:5432/plant)"

