"""Forwarding one batch of the ledger's changes to the plant database: at least once, stored once.

Edge module (the ledger and PostgreSQL). The ledger logs every change of a forwarded
table (``plant_changes``, kept by triggers: pipeline/ledger/migrations.py); a batch takes
the oldest changes, reads the rows as they are now, and stores them in ONE plant
transaction, parents first (tables.py's order):

1. ``INSERT … ON CONFLICT DO NOTHING RETURNING`` the keys it stored;
2. for a row already there, compare: the plant's ``row_sha256`` must be the hash of the
   row's fixed columns as the ledger holds them now. A row changed since it was forwarded
   (a hand edit, in the ledger or in the plant) is never overwritten: the batch is rolled
   back and :class:`ChangedRow` raised, and the feed stops with an alert. The columns the
   station changes in place (an input's state, a result's ``superseded_by``) are updated;
3. a row the log names that the ledger no longer has, but the plant does, was deleted by
   hand: :class:`ChangedRow` too.

Only after the plant has committed are those changes deleted from the log, so a crash
or a lost connection between the two sends them again, which stores nothing twice. What
is left in the log is how far the feed is behind. Starting the log (``start_log``) logs
the whole history first, so a station's first connection forwards everything it has.
"""

from __future__ import annotations

import datetime
from collections.abc import Sequence

import psycopg

from pipeline.ledger.ledger import Ledger
from pipeline.ledger.plantlog import PlantLog
from pipeline.plant.schema import PlantError
from pipeline.plant.tables import FED, FED_BY_TABLE, SCHEMA, Fed

# PostgreSQL takes at most 65,535 parameters in one statement
_MAX_PARAMS = 30_000
_MAX_ROWS_PER_INSERT = 200


class ChangedRow(Exception):
    """A forwarded row that is not what the plant holds: changed or deleted after it went."""

    def __init__(self, table: str, key: object, what: str) -> None:
        super().__init__(f"row {key} of table {table} {what}")
        self.table, self.key, self.what = table, key, what


def start_log(ledger: Ledger, *, now: datetime.datetime) -> str:
    """The ledger's id for the plant; the first call logs every row the ledger holds to go."""
    return PlantLog(ledger.db).start(now=now)


def resend_all(ledger: Ledger) -> int:
    """Log every row to go again (the plant restored from an older backup); how many. Rows the
    plant holds already are not stored twice. Raises PlantError before the feed ever ran."""
    logged = PlantLog(ledger.db).log_everything()
    if logged is None:
        raise PlantError("this station has never fed a plant database", None,
                         "Its first start with [plant] database forwards its whole history.")
    return logged


def behind(ledger: Ledger) -> int:
    """Changes the plant has still to take (0 also before the feed ever started)."""
    return PlantLog(ledger.db).behind()


def register(
    conn: psycopg.Connection[tuple[object, ...]], station_id: str, ledger_id: str, *, where: str
) -> None:
    """Make the station known to the plant; refuse a second ledger under the same station id."""
    with conn.transaction():
        conn.execute(
            f"INSERT INTO {SCHEMA}.stations (station_id, ledger_id) VALUES (%s, %s) "
            "ON CONFLICT (station_id) DO NOTHING",
            (station_id, ledger_id),
        )
        row = conn.execute(
            f"SELECT ledger_id::text FROM {SCHEMA}.stations WHERE station_id = %s", (station_id,)
        ).fetchone()
    if row is None or str(row[0]) != ledger_id:
        raise PlantError(
            f"the plant database {where} already has a station {station_id!r} fed from "
            "another ledger",
            None,
            "Give this station its own [plant] station_id, or, if this is the same station "
            "with a ledger restored from a backup, see docs/plant.md.",
        )


def _store_table(
    conn: psycopg.Connection[tuple[object, ...]],
    fed: Fed,
    station_id: str,
    keys: Sequence[object],
    rows: dict[object, tuple[object, ...]],
) -> int:
    """Store one table's share of a batch; the number of rows newly stored."""
    hashes = {k: fed.row_sha256(r) for k, r in rows.items()}
    present = [k for k in keys if k in rows]
    stored: set[object] = set()
    per = max(1, min(_MAX_ROWS_PER_INSERT, _MAX_PARAMS // (len(fed.columns) + 2)))
    for start in range(0, len(present), per):
        chunk = present[start:start + per]
        params: list[object] = []
        for k in chunk:
            params += [station_id, *rows[k], hashes[k]]
        cur = conn.execute(fed.insert_sql(len(chunk)), params)
        stored.update(r[0] for r in cur.fetchall())
    again = [k for k in keys if k not in stored]
    if not again:
        return len(stored)
    args: tuple[object, ...] = (again,) if fed.shared else (station_id, again)
    held: dict[object, object] = dict(conn.execute(fed.stored_sql(), args).fetchall())  # type: ignore[arg-type]
    index = {name: i for i, name in enumerate(fed.names)}
    updates = []
    for k in again:
        if k not in rows:
            if k in held:
                raise ChangedRow(fed.table, k, "was deleted from the ledger after it was forwarded")
            continue  # added and removed before it ever went: nothing to compare
        if held.get(k) != hashes[k]:
            raise ChangedRow(
                fed.table, k,
                f"differs from the row forwarded to the plant (the plant holds hash "
                f"{str(held.get(k))[:16]}…, the ledger's row hashes to {hashes[k][:16]}…): it was "
                "changed after it was forwarded, in the ledger or in the plant database",
            )
        if fed.changing:
            now = [rows[k][index[c]] for c in fed.changing]
            updates.append((*now, station_id, k, *now))
    if updates:
        with conn.cursor() as cur:
            cur.executemany(fed.update_sql(), updates)
    return len(stored)


def forward_batch(
    ledger: Ledger,
    conn: psycopg.Connection[tuple[object, ...]],
    station_id: str,
    *,
    limit: int = 500,
) -> int:
    """Forward the oldest ``limit`` changes in one plant transaction, then drop them from the
    log; the number of changes taken (0: the plant is up to date)."""
    log = PlantLog(ledger.db)
    changes = log.pending(limit)
    if not changes:
        return 0
    by_table: dict[str, list[object]] = {}
    for change in changes:
        keys = by_table.setdefault(change.table, [])
        if change.key not in keys:
            keys.append(change.key)
    unknown = [t for t in by_table if t not in FED_BY_TABLE]
    if unknown:
        raise PlantError(f"the ledger logs changes of table {unknown[0]!r}, which this formgate "
                         "does not forward", None, "Run the formgate that wrote the ledger.")
    # read the rows before the plant transaction: a row changed in between is logged again
    read = {t: log.rows(t, FED_BY_TABLE[t].names, keys) for t, keys in by_table.items()}
    with conn.transaction():
        for fed in FED:
            if fed.table in by_table:
                _store_table(conn, fed, station_id, by_table[fed.table], read[fed.table])
        conn.execute(f"UPDATE {SCHEMA}.stations SET last_fed_at = now() WHERE station_id = %s",
                     (station_id,))
    log.drop(changes[-1].seq)
    return len(changes)
