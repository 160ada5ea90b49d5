"""Helpers for the plant tests: a ledger copied, caught up, and compared with the plant's rows."""

from __future__ import annotations

import sqlite3
from pathlib import Path

import psycopg
import pytest

from pipeline.ledger.ledger import Ledger
from pipeline.plant.feed import read_state
from pipeline.plant.forward import behind
from pipeline.plant.tables import FED
from tests.station_kit import cycle_file, drop, make_station, running, settled, wait_until


@pytest.fixture(scope="module")
def judged_ledger(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The ledger of a station that judged six cells (one failed) of lot LOT-A."""
    s = make_station(tmp_path_factory.mktemp("station") / "st")
    with running(s):
        for n in range(6):
            capacity = 1.5 if n == 3 else 2.0
            drop(s.inboxes[0].folder, f"c{n}.csv", cycle_file(f"F-{n}", capacity_ah=capacity, seed=n))
        wait_until(lambda: settled(s, 6), what="six cells judged")
    return s.ledger


def copy_ledger(source: Path, folder: Path) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    target = folder / "ledger.sqlite"
    with sqlite3.connect(source) as a, sqlite3.connect(target) as b:
        a.backup(b)
    return target


def caught_up(ledger: Path) -> bool:
    with Ledger(ledger) as kept:
        started = kept.db.one("SELECT 1 FROM plant_feed") is not None
        return started and behind(kept) == 0 and read_state(kept).since is None


def ledger_hashes(ledger: Path) -> dict[str, set[str]]:
    with sqlite3.connect(ledger) as conn:
        return {
            fed.table: {fed.row_sha256(tuple(r)) for r in conn.execute(
                f"SELECT {', '.join(fed.names)} FROM {fed.table}")}
            for fed in FED
        }


def plant_hashes(url: str, station: str) -> dict[str, list[str]]:
    """Every row_sha256 the plant holds for ``station`` per table (a list: twice shows)."""
    with psycopg.connect(url) as conn:
        out = {}
        for fed in FED:
            where = "" if fed.shared else " WHERE station_id = %s"
            rows = conn.execute(f"SELECT row_sha256 FROM formgate.{fed.table}{where}",  # type: ignore[arg-type]
                                () if fed.shared else (station,)).fetchall()
            out[fed.table] = sorted(r[0] for r in rows)
        return out


def assert_whole_and_once(ledger: Path, url: str, station: str) -> None:
    mine, theirs = ledger_hashes(ledger), plant_hashes(url, station)
    for table, hashes in mine.items():
        assert len(theirs[table]) == len(set(theirs[table])), f"{table}: a row stored twice"
        assert set(theirs[table]) == hashes, f"{table}: the plant's rows are not the ledger's"
    with sqlite3.connect(ledger) as a, psycopg.connect(url) as b:
        inputs = {r[0] for r in a.execute("SELECT sha256 FROM inputs")}
        held = {r[0] for r in b.execute("SELECT sha256 FROM formgate.inputs WHERE station_id = %s",
                                        (station,))}
    assert held == inputs


def same_rows(ledger: Path, url: str, station: str) -> bool:
    """Whether the plant holds exactly the ledger's rows for ``station`` (each once)."""
    try:
        assert_whole_and_once(ledger, url, station)
    except AssertionError:
        return False
    return True
