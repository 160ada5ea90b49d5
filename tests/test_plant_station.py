"""A real station with a plant database: it judges on while the database is away, then catches up.

Every part is real: the station and its worker processes, its SQLite ledger, the .eml
letters on disk, and a PostgreSQL server of the tests' own (tests/plant_server.py).
"""

from __future__ import annotations

import datetime
import email
import email.policy
import re
import socket
from pathlib import Path

import pytest

from pipeline.ledger.ledger import Ledger
from pipeline.station.settings import read_settings
from pipeline.station.status import status_text
from tests.plant_kit import caught_up, same_rows
from tests.plant_server import PlantServer
from tests.station_kit import cycle_file, drop, make_station, running, settled, station_toml, wait_until

pytestmark = pytest.mark.slow


def _nobody_listens() -> str:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    return f"postgresql://nobody@127.0.0.1:{port}/plant"


def _plant(url: str) -> str:
    return (f'\n[plant]\ndatabase = "{url}"\nstation_id = "hall-a"\nconnect_timeout_s = 1\n'
            "retry_max_s = 0.5\nalert_after_s = 0.01\n")


def _alerts(mail: Path) -> list[str]:
    found = []
    for path in sorted(mail.glob("*.eml")):
        message = email.message_from_bytes(path.read_bytes(), policy=email.policy.default)
        if "plant" in str(message["Subject"]):
            found.append(str(message["Subject"]))
    return found


def test_a_station_judges_on_while_the_plant_is_away_and_catches_up_when_it_is_back(
    tmp_path: Path, plant_server: PlantServer
) -> None:
    s = make_station(tmp_path / "st", station_toml() + _plant(_nobody_listens()))
    with running(s):
        for n in range(4):
            drop(s.inboxes[0].folder, f"c{n}.csv", cycle_file(f"P-{n}", seed=n))
        wait_until(lambda: settled(s, 4), what="four cells judged while the plant is away")
        wait_until(lambda: bool(_alerts(s.mail)), what="the feed's alert, written as a letter")
        status = status_text(s, datetime.datetime.now(datetime.UTC))
    line = next(x.strip() for x in status.splitlines() if x.strip().startswith("plant feed:"))
    assert re.fullmatch(
        r"plant feed: [0-9,]+ rows behind since \S+ \(OperationalError: connection failed: .*\)", line
    ), line
    assert _alerts(s.mail) == ["formgate: ALERT — the plant database cannot take this station's rows: "
                               + line.split("(", 1)[1].rstrip(")")]
    with Ledger(s.ledger) as ledger:
        assert ledger.inputs.counts_since(datetime.datetime(2000, 1, 1, tzinfo=datetime.UTC)).get(
            "pass") == 4
    # a day later the database is there: the station, started again, forwards all it has
    url = plant_server.new_database()
    (s.root / "station.toml").write_text(station_toml() + _plant(url), encoding="utf-8")
    s = read_settings(s.root)
    with running(s):
        wait_until(lambda: caught_up(s.ledger) and same_rows(s.ledger, url, "hall-a"),
                   what="the feed to catch up")
        status = status_text(s, datetime.datetime.now(datetime.UTC))
    assert f"  plant feed: up to date ({url.split('@')[1]})" in status


def test_the_plant_database_killed_and_restarted_during_a_burst_loses_nothing_and_stores_nothing_twice(
    tmp_path: Path, plant_server: PlantServer
) -> None:
    url = plant_server.new_database()
    s = make_station(tmp_path / "st", station_toml() + _plant(url) + "batch_rows = 20\n")
    files = 24
    with running(s):
        for n in range(files // 2):
            drop(s.inboxes[0].folder, f"a{n}.csv", cycle_file(f"B-{n}", seed=n))
        wait_until(lambda: _forwarded(url) > 0, what="the first rows in the plant")
        plant_server.stop(crash=True)
        try:
            for n in range(files // 2, files):
                drop(s.inboxes[0].folder, f"a{n}.csv", cycle_file(f"B-{n}", seed=n))
            # the station judges the whole burst while the database is down
            wait_until(lambda: settled(s, files), what="the burst judged without the plant")
        finally:
            plant_server.start()
        wait_until(lambda: caught_up(s.ledger) and same_rows(s.ledger, url, "hall-a"),
                   what="the feed to catch up after the restart")
        # (compared while the station runs: at a stop it may record a little more, which its
        # next start forwards)
    with Ledger(s.ledger) as ledger:
        assert len(ledger.inputs.in_state("archived")) == files


def _forwarded(url: str) -> int:
    import psycopg

    try:
        with psycopg.connect(url, connect_timeout=2) as conn:
            return int(conn.execute("SELECT count(*) FROM formgate.results").fetchone()[0])  # type: ignore[index]
    except psycopg.Error:
        return 0


def test_two_stations_through_a_database_killed_mid_burst_each_end_with_exactly_their_rows(
    tmp_path: Path, plant_server: PlantServer
) -> None:
    url = plant_server.new_database()
    a = make_station(tmp_path / "a", station_toml() + _plant(url) + "batch_rows = 10\n")
    b = make_station(tmp_path / "b", station_toml() + _plant(url).replace("hall-a", "hall-b")
                     + "batch_rows = 10\n")
    files = 10
    with running(a), running(b):
        for n in range(files // 2):
            drop(a.inboxes[0].folder, f"a{n}.csv", cycle_file(f"A-{n}", seed=n))
            drop(b.inboxes[0].folder, f"b{n}.csv", cycle_file(f"B-{n}", seed=100 + n))
        wait_until(lambda: _forwarded(url) > 0, what="the first rows in the plant")
        plant_server.stop(crash=True)
        try:
            for n in range(files // 2, files):
                drop(a.inboxes[0].folder, f"a{n}.csv", cycle_file(f"A-{n}", seed=n))
                drop(b.inboxes[0].folder, f"b{n}.csv", cycle_file(f"B-{n}", seed=100 + n))
            wait_until(lambda: settled(a, files) and settled(b, files),
                       what="both bursts judged without the plant")
        finally:
            plant_server.start()
        wait_until(lambda: all(caught_up(s.ledger) and same_rows(s.ledger, url, name)
                               for s, name in ((a, "hall-a"), (b, "hall-b"))),
                   timeout_s=120, what="both feeds to catch up after the restart")
