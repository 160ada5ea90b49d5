"""The ledger's certificate queue: certificates recorded as due, rendered after judging.

A station records a judged file's result at once and renders its certificate later, in
the worker processes, when they are free (station/certqueue.py). The queue is a table, so
a certificate promised survives a crash: a result recorded with ``certificate_priority``
has a row here until its PDF is written or given up. Failed cells come first (priority
0), then held (1), then passed (2), each oldest first.

A failure or hold letter attaches its certificate: it is not due while the row waits
(outbox.py). A render given up (``failed``) sends its letters on without the attachment,
with a line that says why, so that no failed cell's letter waits for ever.
"""

from __future__ import annotations

import datetime
from dataclasses import dataclass

from pipeline.ledger.connection import Connection
from pipeline.ledger.rows import maybe_time, parse_time, utc_text

FAILED = 0
HELD = 1
PASSED = 2
PRIORITY = {"fail": FAILED, "hold": HELD, "pass": PASSED}


@dataclass(frozen=True, slots=True)
class Waiting:
    """A certificate not yet rendered: its result, priority, since when, and renders lost."""

    result_id: int
    priority: int
    queued_at: datetime.datetime
    losses: int


@dataclass(frozen=True, slots=True)
class Backlog:
    """How many certificates wait and since when the oldest has (None when none waits)."""

    waiting: int
    oldest: datetime.datetime | None
    failed: int


def insert_waiting(db: Connection, result_id: int, priority: int, *, queued_at: str) -> None:
    """Queue a result's certificate inside the caller's write transaction (its result's)."""
    if priority not in (FAILED, HELD, PASSED):
        raise ValueError(f"a certificate's priority is 0, 1 or 2, got {priority!r}")
    db.conn.execute(
        "INSERT INTO certificate_queue (result_id, priority, queued_at) VALUES (?, ?, ?) "
        "ON CONFLICT (result_id) DO NOTHING",
        (result_id, priority, queued_at),
    )


class Certificates:
    """The certificate queue over the ledger's one connection."""

    def __init__(self, db: Connection) -> None:
        self.db = db

    def waiting(self, limit: int, *, most_priority: int = PASSED) -> list[Waiting]:
        """Certificates still to render, failed cells first, then held, then passed, each
        oldest first; only those of priority ``most_priority`` or more urgent."""
        rows = self.db.rows(
            "SELECT result_id, priority, queued_at, losses FROM certificate_queue "
            "WHERE done_at IS NULL AND priority <= ? ORDER BY priority, queued_at, result_id "
            "LIMIT ?",
            (most_priority, limit),
        )
        return [
            Waiting(r["result_id"], r["priority"], parse_time(r["queued_at"]), r["losses"])
            for r in rows
        ]

    def is_waiting(self, result_id: int) -> bool:
        return self.db.one(
            "SELECT 1 FROM certificate_queue WHERE result_id = ? AND done_at IS NULL", (result_id,)
        ) is not None

    def outcome(self, result_id: int) -> tuple[str | None, datetime.datetime | None]:
        """('rendered' | 'failed' | None while waiting, when it was done); (None, None) if the
        result has no row (its certificate was rendered with it, or none was wanted)."""
        row = self.db.one(
            "SELECT outcome, done_at FROM certificate_queue WHERE result_id = ?", (result_id,)
        )
        if row is None:
            return None, None
        return row["outcome"], maybe_time(row["done_at"])

    def rendered(self, result_id: int, *, now: datetime.datetime) -> None:
        """The certificate is written and recorded as published: its letters are due."""
        with self.db.write() as conn:
            conn.execute(
                "UPDATE certificate_queue SET done_at = ?, outcome = 'rendered' "
                "WHERE result_id = ? AND done_at IS NULL",
                (utc_text(now, "now"), result_id),
            )

    def lost(self, result_id: int) -> int:
        """A render that never came back (its worker or pool died): count it; the count."""
        with self.db.write() as conn:
            conn.execute(
                "UPDATE certificate_queue SET losses = losses + 1 "
                "WHERE result_id = ? AND done_at IS NULL",
                (result_id,),
            )
            row = self.db.one("SELECT losses FROM certificate_queue WHERE result_id = ?",
                              (result_id,))
            return 0 if row is None else int(row["losses"])

    def give_up(self, result_id: int, error: str, *, now: datetime.datetime) -> None:
        """The certificate cannot be rendered: record why, and let its letters go without it.

        ONE transaction: the queue row, and each pending letter that would attach the
        certificate loses the attachment and says why in a last paragraph.
        """
        why = error.strip() or "no reason given"
        with self.db.write() as conn:
            cur = conn.execute(
                "UPDATE certificate_queue SET done_at = ?, outcome = 'failed', error = ? "
                "WHERE result_id = ? AND done_at IS NULL",
                (utc_text(now, "now"), why, result_id),
            )
            if cur.rowcount != 1:
                return
            note = (
                "\n\nThe certificate of this record could not be rendered, so none is attached "
                f"({why.splitlines()[0][:300]}). The result JSON named above is the record; "
                "the station log has the details."
            )
            conn.execute(
                "UPDATE outbox SET attachment_path = NULL, body_text = body_text || ? "
                "WHERE cell_result_id = ? AND state = 'pending' AND attachment_path IS NOT NULL",
                (note, result_id),
            )

    def backlog(self) -> Backlog:
        """What `formgate status` shows: certificates waiting, the oldest's time, given up."""
        row = self.db.one(
            "SELECT count(*) AS n, min(queued_at) AS oldest FROM certificate_queue "
            "WHERE done_at IS NULL"
        )
        failed = self.db.one(
            "SELECT count(*) AS n FROM certificate_queue WHERE outcome = 'failed'"
        )
        assert row is not None and failed is not None
        return Backlog(int(row["n"]), maybe_time(row["oldest"]), int(failed["n"]))
