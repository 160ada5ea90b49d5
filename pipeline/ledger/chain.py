"""The hash chain over the ledger's decision and review rows: a row changed or removed by hand shows.

Each row of ``decisions`` and of ``reviews`` holds the hash of the row before it in its
table (``prev_hash``; the first row's is :data:`GENESIS`) and its own hash
(``row_hash``): SHA-256 of the table's name, the previous hash and the row's fields as
canonical JSON. Recomputing the chain in id order finds a row whose content was edited
(its own hash no longer matches), removed (the next row's ``prev_hash`` points at
nothing) or inserted (its hash does not follow). An edit that rewrites every hash after
it is not caught by the chain alone: the last hash, printed by ``formgate verify
--ledger``, is what to keep elsewhere (a mail, a plant database) to catch that too.

Pure given rows: the table's connection is the caller's.
"""

from __future__ import annotations

import hashlib
import json
import sqlite3
from collections.abc import Iterable, Mapping, Sequence

GENESIS = "0" * 64

# The fields each table's hash covers, in its schema's words. A column added later is
# added here only with a migration that rehashes the table (its rows' meaning changes).
FIELDS: Mapping[str, tuple[str, ...]] = {
    "decisions": (
        "id", "cell_id", "lot", "verdict", "reason", "hazards", "grade", "cause", "basis",
        "decided_at", "supersedes", "review_id",
    ),
    "reviews": (
        "id", "cell_id", "lot", "action", "stage", "accepts", "reviewer", "reason",
        "reviewed_at", "decision_id",
    ),
}


def row_hash(table: str, prev_hash: str, row: Mapping[str, object]) -> str:
    """The hash of one row of ``table`` that follows ``prev_hash``.

    >>> h = row_hash("reviews", GENESIS, {f: None for f in FIELDS["reviews"]})
    >>> len(h), h == row_hash("reviews", GENESIS, {f: None for f in FIELDS["reviews"]})
    (64, True)
    """
    fields = {name: row[name] for name in FIELDS[table]}
    text = json.dumps(
        {"table": table, "prev": prev_hash, "row": fields},
        sort_keys=True, separators=(",", ":"), ensure_ascii=False,
    )
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def last_hash(conn: sqlite3.Connection, table: str) -> str:
    """The hash a new row of ``table`` follows: its latest row's, or GENESIS."""
    assert table in FIELDS
    row = conn.execute(f"SELECT row_hash FROM {table} ORDER BY id DESC LIMIT 1").fetchone()
    return GENESIS if row is None else str(row[0])


def link(conn: sqlite3.Connection, table: str, row_id: int) -> str:
    """Chain the row just inserted (inside the caller's write transaction); its hash."""
    assert table in FIELDS
    conn_row = conn.execute(f"SELECT * FROM {table} WHERE id = ?", (row_id,)).fetchone()
    prev = conn.execute(
        f"SELECT row_hash FROM {table} WHERE id < ? ORDER BY id DESC LIMIT 1", (row_id,)
    ).fetchone()
    prev_hash = GENESIS if prev is None else str(prev[0])
    names = [d[0] for d in conn.execute(f"SELECT * FROM {table} LIMIT 0").description]
    values = dict(zip(names, conn_row, strict=True))
    own = row_hash(table, prev_hash, values)
    conn.execute(f"UPDATE {table} SET prev_hash = ?, row_hash = ? WHERE id = ?",
                 (prev_hash, own, row_id))
    return own


def broken_links(
    table: str, rows: Iterable[Mapping[str, object]]
) -> tuple[list[str], str]:
    """Walk ``rows`` (every row of ``table``, id order): (what is wrong, the last hash).

    >>> a = {f: None for f in FIELDS["reviews"]} | {"id": 1}
    >>> a["prev_hash"], a["row_hash"] = GENESIS, row_hash("reviews", GENESIS, a)
    >>> broken_links("reviews", [a])[0]
    []
    >>> broken_links("reviews", [a | {"reason": "edited"}])[0]
    ['reviews row 1: its content does not match its hash (changed after it was recorded)']
    """
    problems: list[str] = []
    prev = GENESIS
    for row in rows:
        rid = row["id"]
        if row["prev_hash"] != prev:
            problems.append(
                f"{table} row {rid}: it does not follow the row before it "
                "(a row was removed, inserted or rewritten before it)"
            )
        if row["row_hash"] != row_hash(table, str(row["prev_hash"]), row):
            problems.append(
                f"{table} row {rid}: its content does not match its hash "
                "(changed after it was recorded)"
            )
        prev = str(row["row_hash"])
    return problems, prev


def chained_rows(conn: sqlite3.Connection, table: str) -> list[dict[str, object]]:
    """Every row of ``table`` in id order, as :func:`broken_links` walks them."""
    assert table in FIELDS
    cur = conn.execute(f"SELECT * FROM {table} ORDER BY id")
    names = [d[0] for d in cur.description]
    return [dict(zip(names, values, strict=True)) for values in cur.fetchall()]


def rehash(conn: sqlite3.Connection, table: str) -> None:
    """Give every row of ``table`` its chain, in id order (a migration's step)."""
    names: Sequence[str] = [
        d[0] for d in conn.execute(f"SELECT * FROM {table} LIMIT 0").description
    ]
    prev = GENESIS
    for values in conn.execute(f"SELECT * FROM {table} ORDER BY id").fetchall():
        row = dict(zip(names, values, strict=True))
        own = row_hash(table, prev, row)
        conn.execute(f"UPDATE {table} SET prev_hash = ?, row_hash = ? WHERE id = ?",
                     (prev, own, row["id"]))
        prev = own
