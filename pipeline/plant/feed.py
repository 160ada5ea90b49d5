"""The plant feed: a thread of the station's own that forwards the ledger to the plant database.

Edge module. The feed opens its own connection to the ledger (the station's judging and
recording never share one with it, and never wait for it beyond SQLite's short write lock
when the feed drops forwarded changes from the log) and its own connection to PostgreSQL.
It forwards batch after batch (forward.py) until the log is empty, then looks again every
``poll_s``.

A database that is down, refuses the station's role, or is slow (each statement is
cancelled after ``statement_timeout_s``) pauses the feed, never the station: it tries again
after 1 s, 2 s, 4 s … up to ``retry_max_s``, and notes the trouble in the ledger (station
value ``plant_feed``) so that `formgate status` shows "plant feed: 1,204 rows behind since
…" whether the station runs or not. Once the trouble has lasted ``alert_after_s``, one alert
is queued (``alert``, given by the station, which knows the letters). A row changed after it
was forwarded (a hand edit) or refused by the plant stops the feed at once with one alert:
nothing is overwritten, and the station goes on with its own ledger. Started again (the
station restarted), the feed tries that row again: the same finding stops it without a
second alert, and a row put back as it was lets it go on.
"""

from __future__ import annotations

import datetime
import json
import logging
import sqlite3
import threading
from collections.abc import Callable
from dataclasses import dataclass, replace
from pathlib import Path

import psycopg

from pipeline.ledger.ledger import Ledger
from pipeline.ledger.plantlog import PlantLog
from pipeline.plant.connect import PlantTarget, connect
from pipeline.plant.forward import ChangedRow, behind, forward_batch, register, start_log
from pipeline.plant.schema import PlantError, check_schema, migrate

log = logging.getLogger("formgate.plant")

FEED_STATE = "plant_feed"  # the station value's key
FIRST_RETRY_S = 1.0

Alert = Callable[[Ledger, str, str, str], None]  # (ledger, subject, text, key)


@dataclass(frozen=True, slots=True)
class FeedState:
    """What the feed last noted: a trouble (since when, the error, whether alerted) or a stop."""

    since: datetime.datetime | None = None
    error: str = ""
    alerted: bool = False
    stopped: str = ""  # why the feed stopped (a changed or refused row); "" while it runs

    def to_text(self) -> str:
        return json.dumps({
            "since": None if self.since is None else self.since.isoformat(),
            "error": self.error, "alerted": self.alerted, "stopped": self.stopped,
        })

    @classmethod
    def from_text(cls, text: str | None) -> FeedState:
        """The state a station value holds; a clear state for none or unreadable text.

        >>> t = datetime.datetime(2026, 3, 2, 8, 0, tzinfo=datetime.UTC)
        >>> FeedState.from_text(FeedState(t, "timeout").to_text()).error
        'timeout'
        """
        try:
            v = json.loads(text or "")
            since = v.get("since")
            return cls(None if since is None else datetime.datetime.fromisoformat(since),
                       str(v.get("error", "")), bool(v.get("alerted")), str(v.get("stopped", "")))
        except (ValueError, TypeError, AttributeError):
            return cls()


def read_state(ledger: Ledger) -> FeedState:
    noted = ledger.facts.state(FEED_STATE)
    return FeedState.from_text(noted[0] if noted else None)


def status_line(ledger: Ledger, shown_db: str) -> str:
    """The line `formgate status` shows for the feed, e.g.
    'plant feed: 1,204 rows behind since 2026-03-02T08:00:00+00:00 (…)'."""
    state, rows = read_state(ledger), behind(ledger)
    if PlantLog(ledger.db).started() is None and not state.stopped:
        return f"plant feed: not started yet ({shown_db}; the running station starts it)"
    lag = f"{rows:,} row{'' if rows == 1 else 's'} behind"
    if state.stopped:
        return f"plant feed: stopped, {lag}: {state.stopped}"
    if state.since is not None:
        return (f"plant feed: {lag} since {state.since.isoformat(timespec='seconds')} "
                f"({state.error})")
    return f"plant feed: {lag} ({shown_db})" if rows else f"plant feed: up to date ({shown_db})"


def describe(exc: BaseException) -> str:
    """One line for a database fault (psycopg's first line, without the libpq detail)."""
    text = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
    return f"{type(exc).__name__}: {text}"[:300]


class PlantFeed(threading.Thread):
    """Forward the ledger at ``ledger_path`` to the plant until ``stop`` is set."""

    def __init__(
        self,
        ledger_path: Path,
        target: PlantTarget,
        *,
        stop: threading.Event,
        clock: Callable[[], datetime.datetime],
        alert: Alert | None = None,
        batch_rows: int = 500,
        poll_s: float = 1.0,
        retry_max_s: float = 300.0,
        alert_after_s: float = 900.0,
        migrate_schema: bool = True,
    ) -> None:
        # a daemon: a database that hangs without answering (a server process stopped, not
        # gone) can hold a statement for as long as its connection lasts, and must not keep the
        # station's process from ending; nothing is lost when it is cut off (at least once)
        super().__init__(name="plant-feed", daemon=True)
        self.ledger_path = ledger_path
        self.target = target
        self.stop = stop
        self.clock = clock
        self.alert = alert
        self.batch_rows = batch_rows
        self.poll_s = poll_s
        self.retry_max_s = retry_max_s
        self.alert_after_s = alert_after_s
        self.migrate_schema = migrate_schema
        self.forwarded = 0  # changes taken by the plant since start (for tests and benchmarks)
        self.stopped_for = ""

    def run(self) -> None:
        try:
            with Ledger(self.ledger_path, now=self.clock()) as ledger:
                self._run(ledger)
        except Exception:  # a bug must not end the station: the feed alone stops, and says so
            log.exception("the plant feed stopped on a fault of formgate")
            self.stopped_for = "a fault of formgate (see the station log)"

    def _run(self, ledger: Ledger) -> None:
        ledger_id = start_log(ledger, now=self.clock())
        state = read_state(ledger)
        conn: psycopg.Connection[tuple[object, ...]] | None = None
        wait_s = FIRST_RETRY_S
        try:
            while not self.stop.is_set():
                try:
                    if conn is None:
                        conn = self._open(ledger_id)
                    taken = forward_batch(ledger, conn, self.target.station_id, limit=self.batch_rows)
                    self.forwarded += taken
                    if state.since is not None or state.stopped:
                        if state.since is not None:
                            log.warning("plant feed: the plant database takes rows again")
                        state = self._note(ledger, FeedState())
                    wait_s = FIRST_RETRY_S
                    if taken == 0:
                        self.stop.wait(self.poll_s)
                except ChangedRow as found:
                    self._give_up(ledger, state, f"{found}; nothing was overwritten", found)
                    return
                except (psycopg.IntegrityError, psycopg.DataError) as exc:
                    self._give_up(ledger, state, f"the plant database refuses a row ({describe(exc)})",
                               exc)
                    return
                except (psycopg.Error, PlantError, sqlite3.OperationalError) as exc:
                    if conn is not None:
                        conn.close()
                        conn = None
                    state = self._trouble(ledger, state, exc)
                    self.stop.wait(wait_s)
                    wait_s = min(2 * wait_s, self.retry_max_s)
        finally:
            if conn is not None:
                conn.close()

    def _open(self, ledger_id: str) -> psycopg.Connection[tuple[object, ...]]:
        conn = connect(self.target)
        try:
            where = self.target.shown()
            if check_schema(conn, where=where):
                if not self.migrate_schema:
                    raise PlantError(f"the plant database {where} needs its schema set up", None,
                                     "Run `formgate plant migrate` (docs/plant.md).")
                migrate(conn, where=where)
            register(conn, self.target.station_id, ledger_id, where=where)
        except BaseException:
            conn.close()
            raise
        return conn

    def _note(self, ledger: Ledger, state: FeedState) -> FeedState:
        try:
            ledger.facts.note_state(FEED_STATE, state.to_text(), now=self.clock())
        except sqlite3.OperationalError as exc:  # the ledger locked or full: the station says so
            log.warning("plant feed: cannot note its state in the ledger (%s)", exc)
        return state

    def _trouble(self, ledger: Ledger, state: FeedState, exc: BaseException) -> FeedState:
        now, error = self.clock(), describe(exc)
        if state.since is None:
            log.error("plant feed paused: %s (the station goes on; the feed tries again)", error)
            state = FeedState(now, error)
        else:
            state = replace(state, error=error)
        since = state.since or now
        if not state.alerted and (now - since).total_seconds() >= self.alert_after_s:
            self._alert(
                ledger,
                f"the plant database cannot take this station's rows: {error}",
                f"The station {self.target.station_id} cannot forward its ledger to the plant "
                f"database {self.target.shown()} since {since.isoformat(timespec='seconds')}: "
                f"{error}. The station goes on judging and recording in its own ledger; the "
                f"feed tries again by itself and catches up once the database takes rows "
                f"again ({behind(ledger):,} rows wait now). `formgate status` shows how far it is "
                "behind.",
                f"plant-down:{since.isoformat()}",
            )
            state = replace(state, alerted=True)
        return self._note(ledger, state)

    def _give_up(self, ledger: Ledger, state: FeedState, why: str, exc: BaseException) -> None:
        log.error("plant feed stopped: %s", why)
        self.stopped_for = why
        if state.stopped != why:
            self._alert(
                ledger,
                "the plant feed stopped: a row is not what was forwarded",
                f"The station {self.target.station_id} stopped forwarding its ledger to the plant "
                f"database {self.target.shown()}: {why}. The station goes on judging and "
                "recording in its own ledger. Find out who changed the row and why (formgate "
                "verify STATION --ledger checks the ledger), put it back as it was, and restart "
                "the station: the feed then goes on from where it stopped (docs/plant.md).",
                f"plant-stopped:{why}",
            )
        self._note(ledger, FeedState(state.since, state.error, state.alerted, why))
        del exc

    def _alert(self, ledger: Ledger, subject: str, text: str, key: str) -> None:
        if self.alert is not None:
            self.alert(ledger, subject, text, key)
