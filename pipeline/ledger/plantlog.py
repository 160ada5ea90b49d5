"""The ledger's log of changes for the plant feed: started once, read in order, dropped once taken.

A table family over ``plant_feed`` and ``plant_changes`` (migration 0009_plant_feed): the
triggers on every forwarded table (``FED_TABLES``) log each change once ``plant_feed`` has
its row. Starting the log logs every row already there, so a station's first connection to
a plant database forwards its whole history. What to forward and how is pipeline.plant's
job; this family only keeps the log and reads rows of the forwarded tables as they are.

>>> import datetime, pathlib, tempfile
>>> from pipeline.ledger.ledger import Ledger
>>> t = datetime.datetime(2026, 1, 5, 8, 0, tzinfo=datetime.UTC)
>>> with Ledger(pathlib.Path(tempfile.mkdtemp()) / "ledger.sqlite") as ledger:
...     log = PlantLog(ledger.db)
...     _ = ledger.inputs.claim(sha256="ab" * 32, name="c1.csv", size=10, arrived_at=t,
...                             work_path="work/c1.csv")
...     _ = log.start(now=t)
...     [(c.table, c.key) for c in log.pending(10)], log.behind()
([('inputs', 1)], 1)
"""

from __future__ import annotations

import datetime
import sqlite3
import uuid
from collections.abc import Sequence
from dataclasses import dataclass

from pipeline.ledger.connection import Connection
from pipeline.ledger.migrations import FED_TABLES
from pipeline.ledger.rows import utc_text

_KEYS = dict(FED_TABLES)


@dataclass(frozen=True, slots=True)
class Change:
    """One logged change: its place in the log, the table and the row's key."""

    seq: int
    table: str
    key: object


class PlantLog:
    """The plant feed's log over the ledger's one connection."""

    def __init__(self, db: Connection) -> None:
        self.db = db

    def started(self) -> str | None:
        """The ledger's id for the plant (a UUID), or None before the feed ever started."""
        row = self.db.one("SELECT ledger_id FROM plant_feed WHERE id = 1")
        return None if row is None else str(row["ledger_id"])

    def _log_every_row(self, conn: sqlite3.Connection) -> int:
        logged = 0
        for table, key in FED_TABLES:  # parents first
            logged += conn.execute(
                f"INSERT INTO plant_changes (tbl, row_key) SELECT ?, {key} FROM {table} ORDER BY {key}",
                (table,),
            ).rowcount
        return logged

    def start(self, *, now: datetime.datetime) -> str:
        """Start the log (once): every row already there is logged to go; the ledger's id."""
        with self.db.write() as conn:
            if conn.execute("SELECT 1 FROM plant_feed").fetchone() is None:
                self._log_every_row(conn)
                conn.execute("INSERT INTO plant_feed (id, ledger_id, started_at) VALUES (1, ?, ?)",
                             (str(uuid.uuid4()), utc_text(now, "now")))
        found = self.started()
        assert found is not None
        return found

    def log_everything(self) -> int | None:
        """Log every row to go again; how many (None: the log was never started)."""
        with self.db.write() as conn:
            if conn.execute("SELECT 1 FROM plant_feed").fetchone() is None:
                return None
            return self._log_every_row(conn)

    def behind(self) -> int:
        """Changes still to go (0 also before the log was started)."""
        row = self.db.one("SELECT count(*) FROM plant_changes")
        return int(row[0]) if row is not None else 0

    def pending(self, limit: int) -> list[Change]:
        """The oldest ``limit`` changes, in the order they were logged."""
        rows = self.db.rows(
            "SELECT seq, tbl, row_key FROM plant_changes ORDER BY seq LIMIT ?", (limit,)
        ).fetchall()
        return [Change(int(r[0]), str(r[1]), r[2]) for r in rows]

    def drop(self, through_seq: int) -> None:
        """The plant has taken every change up to ``through_seq``: drop them from the log."""
        with self.db.write() as conn:
            conn.execute("DELETE FROM plant_changes WHERE seq <= ?", (through_seq,))

    def rows(
        self, table: str, columns: Sequence[str], keys: Sequence[object]
    ) -> dict[object, tuple[object, ...]]:
        """Key -> the row's ``columns`` as the ledger holds them now, for the rows of a forwarded
        ``table`` that are still there."""
        key = _KEYS[table]  # a forwarded table's name only: never text from elsewhere
        marks = ", ".join("?" for _ in keys)
        names = ", ".join(columns)
        found = self.db.rows(
            f"SELECT {key}, {names} FROM {table} WHERE {key} IN ({marks})", list(keys)
        ).fetchall()
        return {r[0]: tuple(r)[1:] for r in found}
