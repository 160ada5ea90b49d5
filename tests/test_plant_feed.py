"""The plant feed against a real PostgreSQL server: whole, once, through outages and hand edits.

The ledger is a real station's (a station run once on invented TEST-CELL files, one of them
failing), copied for each test; the server is the tests' own (tests/plant_server.py).
"""

from __future__ import annotations

import datetime
import sqlite3
import threading
from collections.abc import Iterator
from pathlib import Path

import psycopg
import pytest

from pipeline.ledger.ledger import Ledger
from pipeline.plant.connect import PlantTarget
from pipeline.plant.feed import PlantFeed, read_state, status_line
from pipeline.plant.forward import behind
from pipeline.plant.tables import FED
from tests.plant_kit import assert_whole_and_once, caught_up, copy_ledger
from tests.plant_kit import judged_ledger as judged_ledger  # a fixture
from tests.plant_server import PlantServer
from tests.station_kit import wait_until

pytestmark = pytest.mark.slow


def utc_now() -> datetime.datetime:
    return datetime.datetime.now(datetime.UTC)


@pytest.fixture
def plant_url(plant_server: PlantServer) -> str:
    return plant_server.new_database()


Alerts = list[tuple[str, str]]


def queue_alerts(into: Alerts):  # type: ignore[no-untyped-def]
    def alert(ledger: Ledger, subject: str, text: str, key: str) -> None:
        into.append((subject, key))
    return alert


@pytest.fixture
def feeds() -> Iterator[list[tuple[PlantFeed, threading.Event]]]:
    started: list[tuple[PlantFeed, threading.Event]] = []
    yield started
    for feed, stop in started:
        stop.set()
        feed.join(60)


def start(
    feeds: list[tuple[PlantFeed, threading.Event]], ledger: Path, url: str, station: str,
    alerts: Alerts | None = None, **options: float,
) -> PlantFeed:
    stop = threading.Event()
    feed = PlantFeed(ledger, PlantTarget(url, station, connect_timeout_s=2, statement_timeout_s=5),
                     stop=stop, clock=utc_now, alert=queue_alerts(alerts if alerts is not None else []),
                     poll_s=0.05, retry_max_s=0.5, alert_after_s=0.0, **options)  # type: ignore[arg-type]
    feed.start()
    feeds.append((feed, stop))
    return feed


def test_a_stations_whole_ledger_is_forwarded_and_status_says_it_is_up_to_date(
    judged_ledger: Path, plant_url: str, tmp_path: Path, feeds: list[tuple[PlantFeed, threading.Event]]
) -> None:
    ledger = copy_ledger(judged_ledger, tmp_path / "a")
    start(feeds, ledger, plant_url, "line-1", batch_rows=7)
    wait_until(lambda: caught_up(ledger), what="the feed to catch up")
    assert_whole_and_once(ledger, plant_url, "line-1")
    with psycopg.connect(plant_url) as conn:
        counts = conn.execute(
            "SELECT verdict, count(*) FROM formgate.results GROUP BY verdict ORDER BY verdict"
        ).fetchall()
        kinds = conn.execute(
            "SELECT pg_typeof(analysed_at)::text, pg_typeof(result_json)::text "
            "FROM formgate.results LIMIT 1").fetchone()
    assert counts == [("fail", 1), ("pass", 5)]
    assert kinds == ("timestamp with time zone", "jsonb")
    with Ledger(ledger) as kept:
        assert status_line(kept, "db") == "plant feed: up to date (db)"


def test_rows_forwarded_twice_are_stored_once(
    judged_ledger: Path, plant_url: str, tmp_path: Path, feeds: list[tuple[PlantFeed, threading.Event]]
) -> None:
    ledger = copy_ledger(judged_ledger, tmp_path / "a")
    alerts: Alerts = []
    feed = start(feeds, ledger, plant_url, "line-1", alerts)
    wait_until(lambda: caught_up(ledger), what="the feed to catch up")
    taken = feed.forwarded
    # every row logged again, as after a crash between the plant's commit and the ledger's
    with sqlite3.connect(ledger) as conn:
        for fed in FED:
            conn.execute(f"INSERT INTO plant_changes (tbl, row_key) SELECT ?, {fed.key} FROM {fed.table}",
                         (fed.table,))
    wait_until(lambda: caught_up(ledger) and feed.forwarded == 2 * taken, what="the second round")
    assert_whole_and_once(ledger, plant_url, "line-1")
    assert alerts == []


def test_a_database_stopped_mid_feed_loses_nothing_and_stores_nothing_twice(
    judged_ledger: Path, plant_server: PlantServer, plant_url: str, tmp_path: Path,
    feeds: list[tuple[PlantFeed, threading.Event]],
) -> None:
    ledger = copy_ledger(judged_ledger, tmp_path / "a")
    alerts: Alerts = []
    feed = start(feeds, ledger, plant_url, "line-1", alerts, batch_rows=3)
    wait_until(lambda: feed.forwarded > 0, what="the first batches")
    plant_server.stop(crash=True)
    try:
        # the station records on meanwhile (and the feed, had it caught up already, has
        # something to forward and meets the outage)
        with sqlite3.connect(ledger) as conn:
            conn.execute("UPDATE inputs SET reason = 'noted during the outage' WHERE id = 1")
        with Ledger(ledger) as kept:
            wait_until(lambda: read_state(kept).since is not None, what="the feed to see the outage")
            line = status_line(kept, "db")
            rows = behind(kept)
        assert rows > 0
        assert line.startswith(f"plant feed: {rows:,} row{'s' if rows > 1 else ''} behind since ")
    finally:
        plant_server.start()
    wait_until(lambda: caught_up(ledger), what="the feed to catch up after the restart")
    assert_whole_and_once(ledger, plant_url, "line-1")
    assert [subject.split(":")[0] for subject, _ in alerts] == [
        "the plant database cannot take this station's rows"
    ]
    with psycopg.connect(plant_url) as conn:
        assert conn.execute("SELECT reason FROM formgate.inputs WHERE id = 1").fetchone() == (
            "noted during the outage",)


def test_a_row_changed_by_hand_after_it_was_forwarded_stops_the_feed_with_one_alert(
    judged_ledger: Path, plant_url: str, tmp_path: Path, feeds: list[tuple[PlantFeed, threading.Event]]
) -> None:
    ledger = copy_ledger(judged_ledger, tmp_path / "a")
    alerts: Alerts = []
    feed = start(feeds, ledger, plant_url, "line-1", alerts)
    wait_until(lambda: caught_up(ledger), what="the feed to catch up")
    with sqlite3.connect(ledger) as conn:
        failed = conn.execute("SELECT id FROM decisions WHERE verdict = 'fail'").fetchone()[0]
        conn.execute("UPDATE decisions SET verdict = 'pass', reason = '' WHERE id = ?", (failed,))
    feed.join(30)
    assert not feed.is_alive()
    assert feed.stopped_for.startswith(f"row {failed} of table decisions differs from the row forwarded")
    assert [s for s, _ in alerts] == ["the plant feed stopped: a row is not what was forwarded"]
    with psycopg.connect(plant_url) as conn:
        assert conn.execute("SELECT verdict FROM formgate.decisions WHERE id = %s",
                            (failed,)).fetchone() == ("fail",)
    with Ledger(ledger) as kept:
        assert status_line(kept, "db").startswith(
            f"plant feed: stopped, 1 row behind: row {failed} of table decisions differs")
    # started again while the row is still changed: stopped again, not alerted again
    again = start(feeds, ledger, plant_url, "line-1", alerts)
    again.join(30)
    assert again.stopped_for == feed.stopped_for and len(alerts) == 1
    # the row put back as it was: the feed goes on
    with sqlite3.connect(ledger) as conn:
        conn.execute("UPDATE decisions SET verdict = 'fail', reason = ? WHERE id = ?",
                      (_reason_of(plant_url, failed), failed))
    start(feeds, ledger, plant_url, "line-1", alerts)
    wait_until(lambda: caught_up(ledger), what="the feed to go on")
    with Ledger(ledger) as kept:
        assert read_state(kept).stopped == ""


def _reason_of(url: str, decision: int) -> str:
    with psycopg.connect(url) as conn:
        return str(conn.execute("SELECT reason FROM formgate.decisions WHERE id = %s",
                                (decision,)).fetchone()[0])  # type: ignore[index]


def test_two_stations_feed_one_database_each_under_its_own_id(
    judged_ledger: Path, plant_url: str, tmp_path: Path, feeds: list[tuple[PlantFeed, threading.Event]]
) -> None:
    one, two = copy_ledger(judged_ledger, tmp_path / "a"), copy_ledger(judged_ledger, tmp_path / "b")
    start(feeds, one, plant_url, "line-1")
    start(feeds, two, plant_url, "line-2")
    wait_until(lambda: caught_up(one) and caught_up(two), what="both feeds to catch up")
    assert_whole_and_once(one, plant_url, "line-1")
    assert_whole_and_once(two, plant_url, "line-2")
    with psycopg.connect(plant_url) as conn:
        assert conn.execute("SELECT count(*) FROM formgate.rule_texts").fetchone() == (1,)


def test_a_second_ledger_under_a_station_id_in_use_is_refused(
    judged_ledger: Path, plant_url: str, tmp_path: Path, feeds: list[tuple[PlantFeed, threading.Event]]
) -> None:
    one, two = copy_ledger(judged_ledger, tmp_path / "a"), copy_ledger(judged_ledger, tmp_path / "b")
    start(feeds, one, plant_url, "line-1")
    wait_until(lambda: caught_up(one), what="the first feed")
    start(feeds, two, plant_url, "line-1")
    with Ledger(two) as kept:
        wait_until(lambda: read_state(kept).since is not None, what="the refusal")
        assert "already has a station 'line-1' fed from another ledger" in read_state(kept).error


def test_a_channel_alert_is_forwarded_and_its_clearing_follows(
    judged_ledger: Path, plant_url: str, tmp_path: Path, feeds: list[tuple[PlantFeed, threading.Event]]
) -> None:
    ledger = copy_ledger(judged_ledger, tmp_path / "a")
    with Ledger(ledger) as kept:
        assert kept.channels.raise_alert(
            station="test-station", channel="CH-07", cell_id="F-3", lot="LOT-A",
            evidence="3 of the channel's last 10 cells failed", advice="check the channel",
            mail=None, now=utc_now())
    start(feeds, ledger, plant_url, "line-1")
    wait_until(lambda: caught_up(ledger), what="the feed to catch up")
    with Ledger(ledger) as kept:
        assert kept.channels.clear("test-station", "CH-07", by="quality engineer A", why="probe replaced",
                                   now=utc_now())
    wait_until(lambda: caught_up(ledger), what="the clearing to follow")
    assert_whole_and_once(ledger, plant_url, "line-1")
    with psycopg.connect(plant_url) as conn:
        assert conn.execute("SELECT channel, cleared_by FROM formgate.channel_alerts").fetchall() == [
            ("CH-07", "quality engineer A")]



def test_a_slow_database_pauses_the_feed_like_one_that_is_down(
    judged_ledger: Path, plant_url: str, tmp_path: Path, feeds: list[tuple[PlantFeed, threading.Event]]
) -> None:
    ledger = copy_ledger(judged_ledger, tmp_path / "a")
    alerts: Alerts = []
    start(feeds, ledger, plant_url, "line-1", alerts)  # its statements are cancelled after 5 s
    wait_until(lambda: caught_up(ledger), what="the feed to catch up")
    with psycopg.connect(plant_url) as blocker:
        # another session holds the table: the feed's next statement waits until cancelled
        blocker.execute("LOCK TABLE formgate.inputs IN ACCESS EXCLUSIVE MODE")
        with sqlite3.connect(ledger) as conn:
            conn.execute("UPDATE inputs SET reason = 'noted while the database is slow' WHERE id = 1")
        with Ledger(ledger) as kept:
            wait_until(lambda: read_state(kept).since is not None, what="the feed to give up waiting")
            assert "QueryCanceled" in read_state(kept).error
        blocker.rollback()  # the database answers again
    wait_until(lambda: caught_up(ledger), what="the feed to catch up")
    assert_whole_and_once(ledger, plant_url, "line-1")
    assert [s.split(":")[0] for s, _ in alerts] == ["the plant database cannot take this station's rows"]
