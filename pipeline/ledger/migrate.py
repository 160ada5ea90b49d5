"""Applying the ledger's migrations: each named step once, in order, one transaction each.

Each migration runs in its own ``BEGIN IMMEDIATE`` transaction together with the
row that records it (name, applied_at) in the ``migrations`` table, so a database
is always exactly at one migration boundary. ``PRAGMA user_version`` mirrors the
number of migrations applied; a database that is ahead of this code is refused.
The steps themselves, in order, are migrations.py's; opening connections is
connection.py's.
"""

from __future__ import annotations

import sqlite3
from collections.abc import Callable, Sequence
from dataclasses import dataclass

from pipeline.errors import FormgateError
from pipeline.model import SourceRef

# Marks the file as a formgate ledger in the SQLite header ("FGLG"), so another
# program's database is not mistaken for an empty ledger.
APPLICATION_ID = 0x46474C47


class LedgerError(FormgateError):
    """A ledger that cannot be used as it is: written by a newer formgate, damaged, or foreign."""


@dataclass(frozen=True, slots=True)
class Migration:
    """One named, ordered step of the schema. ``run`` executes inside an open transaction.

    ``rebuilds``: the step makes a table anew under its old name, which SQLite's procedure
    for schema changes does with foreign keys off (they cannot be switched inside a
    transaction, so :func:`migrate` switches them around it and checks every reference
    before the step commits).
    """

    name: str
    run: Callable[[sqlite3.Connection], None]
    rebuilds: bool = False


def sql_migration(name: str, *statements: str) -> Migration:
    """A migration made of SQL statements, run one by one.

    (``executescript`` is not used: it commits any open transaction first.)
    """

    def run(conn: sqlite3.Connection) -> None:
        for statement in statements:
            conn.execute(statement)

    return Migration(name, run)


_BOOTSTRAP = """
CREATE TABLE IF NOT EXISTS migrations (
    id INTEGER PRIMARY KEY,
    name TEXT NOT NULL UNIQUE,
    applied_at TEXT NOT NULL
) STRICT
"""


def _applied(conn: sqlite3.Connection) -> list[str]:
    return [row[0] for row in conn.execute("SELECT name FROM migrations ORDER BY id")]


def _check_known(conn: sqlite3.Connection, known: Sequence[str], where: SourceRef) -> list[str]:
    """The names applied so far, after refusing a database this code does not understand."""
    app_id = conn.execute("PRAGMA application_id").fetchone()[0]
    user_version = conn.execute("PRAGMA user_version").fetchone()[0]
    has_log = conn.execute(
        "SELECT count(*) FROM sqlite_schema WHERE type = 'table' AND name = 'migrations'"
    ).fetchone()[0]
    tables = conn.execute(
        "SELECT count(*) FROM sqlite_schema WHERE type = 'table' AND name NOT LIKE 'sqlite_%'"
    ).fetchone()[0]
    if app_id not in (0, APPLICATION_ID) or (not has_log and (tables or user_version)):
        raise LedgerError(
            "this file is an SQLite database but not a formgate ledger",
            where,
            "Point the station at a new file name; formgate creates its ledger itself.",
        )
    applied = _applied(conn) if has_log else []
    newer = [name for name in applied if name not in known]
    if newer or user_version > len(known):
        raise LedgerError(
            f"the ledger was written by a newer formgate (schema version {user_version}, "
            f"migrations this formgate does not know: {', '.join(newer) or 'none recorded'}; "
            f"this formgate knows up to version {len(known)})",
            where,
            "Run the newer formgate, or upgrade this installation; a ledger is never downgraded.",
        )
    if applied != list(known[: len(applied)]) or user_version != len(applied):
        raise LedgerError(
            f"the ledger's migration record is inconsistent (applied: {', '.join(applied)}; "
            f"user_version {user_version})",
            where,
            "Restore the ledger from a backup, or move it aside so a new one is created.",
        )
    return applied


def _is_current(conn: sqlite3.Connection, known: Sequence[str], where: SourceRef) -> bool:
    """True when every one of ``known`` is applied, read in one snapshot without the write lock;
    raises LedgerError for a database this code does not understand."""
    conn.execute("BEGIN")  # deferred: a read transaction, one consistent view
    try:
        return len(_check_known(conn, known, where)) == len(known)
    finally:
        conn.execute("ROLLBACK")


def migrate(
    conn: sqlite3.Connection,
    migrations: Sequence[Migration],
    *,
    applied_at: str,
    where: SourceRef,
) -> list[str]:
    """Apply the pending ``migrations`` in order, one transaction each; return the names applied.

    ``conn`` must be in autocommit mode (``isolation_level=None``). Safe when two
    processes open the same new file at once: each step re-reads the record after
    taking the write lock, so a migration another process applied is skipped.
    Raises LedgerError for a database that is foreign or ahead of ``migrations``.

    A ledger that is current is only read: the write lock is taken when there is a step
    to apply, so opening it never waits for another process that holds the lock (a
    station in a long write, a backup): `formgate status` reads beside it.
    """
    known = [m.name for m in migrations]
    if _is_current(conn, known, where):
        return []
    done: list[str] = []
    while True:
        # a peek without the lock: the step that rebuilds a table needs foreign keys off,
        # which only holds when set outside a transaction (rechecked under the lock below)
        peek = conn.execute("PRAGMA user_version").fetchone()[0]
        rebuilding = peek < len(migrations) and migrations[peek].rebuilds
        enforced = conn.execute("PRAGMA foreign_keys").fetchone()[0]
        if rebuilding and enforced:
            conn.execute("PRAGMA foreign_keys = OFF")
        try:
            conn.execute("BEGIN IMMEDIATE")
            try:
                applied = _check_known(conn, known, where)
                if len(applied) == len(migrations):
                    conn.execute("COMMIT")
                    return done
                step = migrations[len(applied)]
                if step.rebuilds and not rebuilding:
                    conn.execute("ROLLBACK")  # another process moved on meanwhile: peek again
                    continue
                conn.execute(_BOOTSTRAP)
                conn.execute(f"PRAGMA application_id = {APPLICATION_ID}")
                step.run(conn)
                if step.rebuilds:
                    broken = conn.execute("PRAGMA foreign_key_check").fetchall()
                    if broken:
                        raise sqlite3.IntegrityError(
                            f"migration {step.name} would leave references pointing nowhere: "
                            f"{broken[:5]}"
                        )
                conn.execute(
                    "INSERT INTO migrations (name, applied_at) VALUES (?, ?)", (step.name, applied_at)
                )
                conn.execute(f"PRAGMA user_version = {len(applied) + 1}")
                conn.execute("COMMIT")
                done.append(step.name)
            except BaseException:
                if conn.in_transaction:
                    conn.execute("ROLLBACK")
                raise
        finally:
            if rebuilding and enforced:
                conn.execute("PRAGMA foreign_keys = ON")


def applied_migrations(conn: sqlite3.Connection) -> list[tuple[str, str]]:
    """(name, applied_at) of every migration recorded, oldest first."""
    rows = conn.execute("SELECT name, applied_at FROM migrations ORDER BY id").fetchall()
    return [(str(name), str(at)) for name, at in rows]
