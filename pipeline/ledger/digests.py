"""The ledger's lot digests: which digest mail covers which passed cell, each cell once.

A lot's published, current pass cells get no mail of their own: a digest covers them,
queued with the cells it covers in one transaction. The digest's delivery is the
outbox's (outbox.py); the results it lists are results.py's.
"""

from __future__ import annotations

import datetime
from collections.abc import Sequence

from pipeline.ledger.connection import Connection
from pipeline.ledger.outbox import insert_mail
from pipeline.ledger.rows import PUBLISHED, OutgoingMail, ResultRow, parse_time, result_row, utc_text


class Digests:
    """Which digest covers which passed cell, over the ledger's one connection."""

    _DIGESTIBLE = (
        "FROM results r JOIN inputs i ON i.id = r.input_id WHERE r.verdict = 'pass' "
        f"AND r.digest_mail_id IS NULL AND r.superseded_by IS NULL AND r.regrade_id IS NULL "
        f"AND i.state IN {PUBLISHED}"
    )

    def __init__(self, db: Connection) -> None:
        self.db = db

    def pending_lots(self) -> list[str]:
        """Lots with published, current pass cells that no digest covers yet."""
        return [
            r[0]
            for r in self.db.rows(f"SELECT DISTINCT r.lot {self._DIGESTIBLE} ORDER BY r.lot")
        ]

    def passed_cells(self, lot: str) -> list[ResultRow]:
        rows = self.db.rows(
            f"SELECT r.* {self._DIGESTIBLE} AND r.lot = ? ORDER BY r.analysed_at, r.id", (lot,)
        )
        return [result_row(r) for r in rows]

    def mark(self, lot: str, result_ids: Sequence[int], mail_id: int) -> None:
        """Record that digest ``mail_id`` covers ``result_ids``; all or nothing.

        Refuses a cell that is already in another digest, so each pass cell is in
        exactly one. Marking the same cells with the same mail again is a no-op.
        """
        with self.db.write():
            self._link_digest(lot, result_ids, mail_id)

    def queue(
        self, mail: OutgoingMail, result_ids: Sequence[int], *, now: datetime.datetime
    ) -> int:
        """Queue a digest and record the cells it covers in one transaction; return its id.

        Prefer this to Outbox.queue + mark: no crash can leave a digest queued
        without its cells (such a digest would never become due).
        """
        at = utc_text(now, "now")
        with self.db.write():
            mail_id = insert_mail(self.db, mail, created_at=at, result_id=None, lot=mail.lot)
            self._link_digest(mail.lot or "", result_ids, mail_id)
            return mail_id

    def _link_digest(self, lot: str, result_ids: Sequence[int], mail_id: int) -> None:
        found = self.db.one("SELECT kind FROM outbox WHERE id = ?", (mail_id,))
        mail = None if found is None else found["kind"]
        if mail != "digest":
            raise ValueError(f"mail {mail_id} is not a digest")
        for result_id in result_ids:
            found = self.db.one("SELECT * FROM results WHERE id = ?", (result_id,))
            row = None if found is None else result_row(found)
            if row is None or row.lot != lot or row.verdict != "pass":
                raise ValueError(f"result {result_id} is not a passed cell of lot {lot!r}")
            if row.digest_mail_id not in (None, mail_id):
                raise ValueError(
                    f"result {result_id} is already in digest mail {row.digest_mail_id}"
                )
            self.db.rows(
                "UPDATE results SET digest_mail_id = ? WHERE id = ?", (mail_id, result_id)
            )

    def count(self, lot: str) -> int:
        """How many digest mails were ever queued for ``lot`` (numbers the next one)."""
        row = self.db.one("SELECT count(*) AS n FROM outbox WHERE kind = 'digest' AND lot = ?", (lot,))
        return 0 if row is None else int(row["n"])

    def latest_activity(self, lot: str) -> datetime.datetime | None:
        """When the latest cell of ``lot`` was judged (for the digest's quiet time)."""
        row = self.db.one("SELECT max(analysed_at) AS t FROM results WHERE lot = ?", (lot,))
        return None if row is None or row["t"] is None else parse_time(row["t"])
