"""The ledger's inputs: claiming files and every step of their states, and the counts over them.

Every input moves through claimed -> judged -> published -> archived (or to quarantined
or duplicate); this module records each step (an error's alerts in the same
transaction) and answers the status counts. A judgement's result and check rows are
results.py's; the outbox's own steps outbox.py's.
"""

from __future__ import annotations

import datetime
from collections.abc import Sequence

from pipeline.ledger.connection import Connection
from pipeline.ledger.outbox import insert_mail
from pipeline.ledger.rows import (
    FINAL_STATES,
    INPUT_SELECT,
    INPUT_STATES,
    SHA256_HEX,
    InputRow,
    OutgoingMail,
    input_row,
    parse_time,
    utc_text,
)


def input_or_fail(db: Connection, input_id: int) -> InputRow:
    """The input's row; a ValueError naming the ledger when there is none."""
    row = db.one(f"{INPUT_SELECT} WHERE i.id = ?", (input_id,))
    if row is None:
        raise ValueError(f"no input with id {input_id} in {db.path}")
    return input_row(row)


class Inputs:
    """The inputs table over the ledger's one connection."""

    def __init__(self, db: Connection) -> None:
        self.db = db

    def get(self, input_id: int) -> InputRow | None:
        row = self.db.one(f"{INPUT_SELECT} WHERE i.id = ?", (input_id,))
        return None if row is None else input_row(row)

    def claim(
        self, *, sha256: str, name: str, size: int, arrived_at: datetime.datetime, work_path: str
    ) -> tuple[InputRow, InputRow | None]:
        """Record a file moved into work/; return (its row, the earlier row it duplicates or None).

        ``name`` is the file's base name (versions are counted per name). The new row is
        a 'duplicate' when the same bytes are already judged or on their way to be
        (claimed/judged/published/archived); bytes seen only in quarantine are judged
        again. Otherwise it gets the next version under ``name`` and supersedes the
        latest earlier version. Claiming the same in-flight work_path + sha256 again
        (after a restart) returns the existing row.
        """
        if not SHA256_HEX.fullmatch(sha256):
            raise ValueError(f"sha256 must be 64 lowercase hex digits, got {sha256!r}")
        # a backslash is allowed: it is how pipeline.names escapes a name into text
        if not name or "/" in name or not name.isprintable():
            raise ValueError(f"name must be a file's base name as text, got {name!r}")
        arrived = utc_text(arrived_at, "arrived_at")
        with self.db.write() as conn:
            same = self.db.one(
                "SELECT id, duplicate_of FROM inputs WHERE work_path = ? AND sha256 = ? "
                "AND final_path IS NULL",
                (work_path, sha256),
            )
            if same is not None:
                dup = same["duplicate_of"]
                return input_or_fail(self.db, same["id"]), None if dup is None else self.get(dup)
            earlier = self.db.one(
                "SELECT id, name, version FROM inputs WHERE sha256 = ? AND state IN "
                "('claimed', 'judged', 'published', 'archived') ORDER BY id LIMIT 1",
                (sha256,),
            )
            if earlier is not None:
                state, dup_of, supersedes = "duplicate", earlier["id"], None
                version = earlier["version"] if earlier["name"] == name else 1
            else:
                latest = self.db.one(
                    "SELECT id, version FROM inputs WHERE name = ? AND state <> 'duplicate' "
                    "ORDER BY version DESC LIMIT 1",
                    (name,),
                )
                state, dup_of = "claimed", None
                supersedes = None if latest is None else latest["id"]
                version = 1 if latest is None else latest["version"] + 1
            cur = conn.execute(
                "INSERT INTO inputs (sha256, name, size, arrived_at, work_path, state, version, "
                "supersedes, duplicate_of) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (sha256, name, size, arrived, work_path, state, version, supersedes, dup_of),
            )
            new_id = cur.lastrowid
            assert new_id is not None
            return input_or_fail(self.db, new_id), None if dup_of is None else self.get(dup_of)

    def by_work_path(self, work_path: str) -> InputRow | None:
        """The in-flight row for a file in work/, else the latest row that ever used the path."""
        row = self.db.one(
            f"{INPUT_SELECT} WHERE i.work_path = ? "
            "ORDER BY i.final_path IS NULL DESC, i.id DESC LIMIT 1",
            (work_path,),
        )
        return None if row is None else input_row(row)

    def by_sha256(self, sha256: str) -> list[InputRow]:
        """Every row of a file with these bytes (its copies under other names too), oldest first."""
        rows = self.db.rows(f"{INPUT_SELECT} WHERE i.sha256 = ? ORDER BY i.id", (sha256,))
        return [input_row(r) for r in rows]

    def in_state(self, *states: str) -> list[InputRow]:
        """Rows in any of ``states``, oldest first (e.g. the unfinished work after a restart)."""
        unknown = set(states) - set(INPUT_STATES)
        if unknown:
            raise ValueError(f"unknown input states {sorted(unknown)}; known: {INPUT_STATES}")
        marks = ", ".join("?" * len(states))
        rows = self.db.rows(
            f"{INPUT_SELECT} WHERE i.state IN ({marks}) ORDER BY i.id", states
        )
        return [input_row(r) for r in rows]

    def mark_published(self, input_id: int) -> None:
        """'judged' -> 'published' once the JSON and PDF are on disk; again is a no-op."""
        with self.db.write() as conn:
            row = input_or_fail(self.db, input_id)
            if row.state in ("published", "archived"):
                return
            if row.state != "judged":
                raise ValueError(
                    f"input {input_id} is {row.state!r}; only a judged input can be published"
                )
            conn.execute("UPDATE inputs SET state = 'published' WHERE id = ?", (input_id,))

    def mark_final(
        self,
        input_id: int,
        state: str,
        final_path: str,
        reason: str | None = None,
        *,
        now: datetime.datetime | None = None,
    ) -> None:
        """Record where the input file now lies for good: archived, quarantined or duplicate.

        'archived' needs a published input; 'quarantined' a claimed or judged one and a
        reason (given here or by record_error); 'duplicate' a duplicate row. Pass
        ``now`` (UTC) as the time it reached that state; without it the ledger uses the
        analysis time, or the arrival time for an input that has no result. Repeating
        the same call is a no-op. Quarantining a judged input parks its unsent mails.
        """
        allowed = {
            "archived": ("published",),
            "quarantined": ("claimed", "judged"),
            "duplicate": ("duplicate",),
        }
        if state not in allowed:
            raise ValueError(f"final state must be one of {FINAL_STATES}, got {state!r}")
        with self.db.write() as conn:
            row = input_or_fail(self.db, input_id)
            if row.final_path is not None:
                if row.state == state and row.final_path == final_path:
                    return
                raise ValueError(
                    f"input {input_id} is already final ({row.state}, {row.final_path})"
                )
            if row.state not in allowed[state]:
                raise ValueError(f"input {input_id} is {row.state!r} and cannot become {state!r}")
            reason = reason if reason is not None else row.reason
            if state == "quarantined" and not reason:
                raise ValueError(f"input {input_id} cannot be quarantined without a reason")
            if now is not None:
                final_at = utc_text(now, "now")
            else:
                res = self.db.one(
                    "SELECT analysed_at FROM results WHERE input_id = ? AND regrade_id IS NULL",
                    (input_id,),
                )
                final_at = utc_text(parse_time(res["analysed_at"]) if res else row.arrived_at, "final time")
            conn.execute(
                "UPDATE inputs SET state = ?, final_path = ?, final_at = ?, reason = ? "
                "WHERE id = ?",
                (state, final_path, final_at, reason, input_id),
            )
            if state == "quarantined" and row.result_id is not None:
                conn.execute(
                    "UPDATE outbox SET state = 'parked', last_error = ? WHERE cell_result_id = ? "
                    "AND state = 'pending'",
                    ("input quarantined before publication", row.result_id),
                )

    def record_error(
        self,
        input_id: int,
        reason: str,
        mails: Sequence[OutgoingMail] = (),
        *,
        now: datetime.datetime | None = None,
    ) -> None:
        """Note why an input cannot be judged, and queue its alerts, in one transaction.

        The input stays where it is until mark_final(..., 'quarantined'). Mails are
        queued at ``now`` (default: the input's arrival); a message id already queued
        is not queued twice, so repeating the call after a restart is harmless.
        """
        if not reason:
            raise ValueError("record_error needs a reason")
        with self.db.write() as conn:
            row = input_or_fail(self.db, input_id)
            if row.state not in ("claimed", "judged"):
                raise ValueError(
                    f"input {input_id} is {row.state!r}; errors are recorded before it is final"
                )
            conn.execute("UPDATE inputs SET reason = ? WHERE id = ?", (reason, input_id))
            at = utc_text(now or row.arrived_at, "now")
            for mail in mails:
                insert_mail(self.db, mail, created_at=at, result_id=None, lot=mail.lot)

    def counts_since(self, since: datetime.datetime) -> dict[str, int]:
        """How many inputs reached a final state at or after ``since``, by verdict.

        Keys: pass, fail, hold, error (quarantined), duplicate, readings (an OCV reading
        file whose readings were kept: it has no result, and no verdict of its own).
        """
        counts = dict.fromkeys(("pass", "fail", "hold", "error", "duplicate", "readings"), 0)
        rows = self.db.rows(
            "SELECT CASE WHEN i.state = 'duplicate' THEN 'duplicate' "
            "WHEN i.state = 'quarantined' THEN 'error' "
            "WHEN r.verdict IS NULL AND EXISTS (SELECT 1 FROM readings g WHERE g.input_id = i.id) "
            "THEN 'readings' "
            "ELSE coalesce(r.verdict, 'error') END, count(*) "
            "FROM inputs i LEFT JOIN results r ON r.input_id = i.id AND r.regrade_id IS NULL "
            "WHERE i.final_at IS NOT NULL AND i.final_at >= ? GROUP BY 1",
            (utc_text(since, "since"),),
        )
        for key, n in rows:
            counts[key] = n
        return counts

    def recent_errors(self, limit: int = 10) -> list[InputRow]:
        """Quarantined inputs and those with an error recorded, newest first."""
        rows = self.db.rows(
            f"{INPUT_SELECT} WHERE i.state = 'quarantined' OR (i.reason IS NOT NULL AND i.state "
            "IN ('claimed', 'judged')) ORDER BY coalesce(i.final_at, i.arrived_at) DESC, i.id DESC "
            "LIMIT ?",
            (limit,),
        )
        return [input_row(r) for r in rows]
