"""The ledger's connection: opening ``ledger.sqlite`` with WAL, migrating it, and writing safely.

Connection owns the one SQLite connection of a Ledger: it opens it (busy timeout,
write-ahead log, ``synchronous=FULL``, foreign keys), applies pending migrations, turns
open failures into a LedgerError that says what to do, and gives every table family its
write transaction (``write``), its queries (``one``, ``rows``) and the integrity check.
What is stored and asked for is left to the table families (inputs.py, results.py,
outbox.py, ...), which share one Connection (ledger.py wires them).
"""

from __future__ import annotations

import contextlib
import datetime
import pathlib
import sqlite3
import time
from collections.abc import Iterator, Sequence
from typing import Any, Self

from pipeline.ledger.migrate import LedgerError, migrate
from pipeline.ledger.migrations import MIGRATIONS
from pipeline.ledger.rows import utc_text
from pipeline.model import SourceRef

# A writer waits this long for another process's write lock before giving up.
BUSY_TIMEOUT_MS = 30_000


def _set_wal(conn: sqlite3.Connection) -> str:
    """Switch ``conn`` to write-ahead logging and return the journal mode now in force.

    Two processes that open a new ledger at once race to change its journal mode, and
    SQLite answers the loser at once with "database is locked" without waiting through
    the busy timeout (the change needs an exclusive lock that its busy handler does not
    wait for). So the switch is tried again for up to the busy timeout.
    """
    deadline = time.monotonic() + BUSY_TIMEOUT_MS / 1000
    pause_s = 0.005
    while True:
        try:
            return str(conn.execute("PRAGMA journal_mode = WAL").fetchone()[0])
        except sqlite3.OperationalError as exc:
            if getattr(exc, "sqlite_errorname", "") not in ("SQLITE_BUSY", "SQLITE_LOCKED"):
                raise
            if time.monotonic() >= deadline:
                raise
            time.sleep(pause_s)
            pause_s = min(2 * pause_s, 0.2)


class Connection:
    """One open ``ledger.sqlite`` and its write discipline, shared by the table families."""

    def __init__(self, path: pathlib.Path, *, now: datetime.datetime | None = None) -> None:
        """Open or create the ledger and apply pending migrations.

        ``now`` is recorded as each migration's ``applied_at``; it is the one time the
        ledger may take from the system clock itself, when the caller gives none.
        """
        self.path = pathlib.Path(path)
        self._where = SourceRef(str(self.path))
        applied_at = utc_text(now or datetime.datetime.now(datetime.UTC), "now")
        try:
            conn = sqlite3.connect(self.path, isolation_level=None, timeout=BUSY_TIMEOUT_MS / 1000)
        except sqlite3.Error as exc:
            raise self._open_error(exc) from exc
        self.conn = conn
        self._depth = 0  # write transactions open (a write inside a write joins it)
        try:
            conn.row_factory = sqlite3.Row
            conn.execute(f"PRAGMA busy_timeout = {BUSY_TIMEOUT_MS}")
            mode = _set_wal(conn)
            if mode != "wal":
                raise LedgerError(
                    f"the ledger cannot use write-ahead logging here (journal mode stays {mode!r})",
                    self._where,
                    "Keep the ledger on a local disk, not on a network share.",
                )
            conn.execute("PRAGMA synchronous = FULL")
            conn.execute("PRAGMA foreign_keys = ON")
            migrate(conn, MIGRATIONS, applied_at=applied_at, where=self._where)
        except sqlite3.Error as exc:
            conn.close()
            raise self._open_error(exc) from exc
        except BaseException:
            conn.close()
            raise

    def _open_error(self, exc: sqlite3.Error) -> LedgerError:
        code = getattr(exc, "sqlite_errorname", "")
        if code in ("SQLITE_NOTADB", "SQLITE_CORRUPT"):
            return LedgerError(
                f"the ledger is damaged or not an SQLite database ({exc})",
                self._where,
                "Move the file aside and restore the latest backup; formgate starts "
                "a new empty ledger if none is there.",
            )
        if code in ("SQLITE_BUSY", "SQLITE_LOCKED"):
            return LedgerError(
                f"another process kept the ledger locked for {BUSY_TIMEOUT_MS / 1000:g} s",
                self._where,
                "Check that only one station runs on this folder.",
            )
        return LedgerError(
            f"cannot open the ledger ({exc})",
            self._where,
            "Check that the folder exists and is writable.",
        )

    def close(self) -> None:
        with contextlib.suppress(sqlite3.Error):
            self.conn.execute("PRAGMA optimize")
        self.conn.close()

    def __enter__(self) -> Self:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    @contextlib.contextmanager
    def write(self) -> Iterator[sqlite3.Connection]:
        """One explicit write transaction: all of it commits, or none of it.

        A write inside a write joins the outer one (a review and the decision it gives are
        written by two table families, in one transaction).
        """
        conn = self.conn
        if self._depth:
            self._depth += 1
            try:
                yield conn
            finally:
                self._depth -= 1
            return
        conn.execute("BEGIN IMMEDIATE")
        self._depth = 1
        try:
            yield conn
            conn.execute("COMMIT")
        except BaseException:
            if conn.in_transaction:
                conn.execute("ROLLBACK")
            raise
        finally:
            self._depth = 0

    def one(self, sql: str, params: Sequence[Any] = ()) -> sqlite3.Row | None:
        """The first row ``sql`` gives, or None."""
        row: sqlite3.Row | None = self.conn.execute(sql, params).fetchone()
        return row

    def rows(self, sql: str, params: Sequence[Any] = ()) -> sqlite3.Cursor:
        """Every row ``sql`` gives, as a cursor to iterate once."""
        return self.conn.execute(sql, params)

    def integrity_ok(self) -> bool:
        """``PRAGMA integrity_check`` says 'ok' and no foreign key points nowhere."""
        rows = self.conn.execute("PRAGMA integrity_check").fetchall()
        if [tuple(r) for r in rows] != [("ok",)]:
            return False
        return not self.conn.execute("PRAGMA foreign_key_check").fetchall()

    def dangling_references(self) -> list[tuple[str, int, str]]:
        """(table, row id, table it names) of each row that names a row no longer there: a row
        removed by hand, with foreign keys off, leaves these behind."""
        return [
            (str(r[0]), int(r[1]), str(r[2]))
            for r in self.conn.execute("PRAGMA foreign_key_check").fetchall()
        ]
