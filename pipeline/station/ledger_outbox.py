"""The ledger's outbox and lot digests: queued mail, its delivery steps, and which digest holds which cell.

A message is queued once per Message-ID, becomes due (a cell's mail once the cell is
published, a digest once its cells are recorded against it), and is sent, retried or
parked. A lot's pass cells are each covered by exactly one digest. The connection and
the shared outbox insert are LedgerBase's; inputs and results are InputsMixin's.
"""

from __future__ import annotations

import datetime
from collections.abc import Sequence
from typing import Any

from pipeline.station.ledger_base import LedgerBase
from pipeline.station.ledger_rows import (
    _PUBLISHED,
    MailRow,
    OutgoingMail,
    ResultRow,
    _mail,
    _result,
    _time,
    _utc,
)


class OutboxMixin(LedgerBase):
    """The outbox and lot digests of the Ledger."""

    def queue_mail(self, mail: OutgoingMail, *, now: datetime.datetime) -> int:
        """Queue a message due at ``now``; queuing the same message id again returns its id."""
        at = _utc(now, "now")
        with self._write():
            return self._insert_mail(mail, created_at=at, result_id=None, lot=mail.lot)

    def mail_by_message_id(self, message_id: str) -> MailRow | None:
        row = self._one("SELECT * FROM outbox WHERE message_id = ?", (message_id,))
        return None if row is None else _mail(row)

    def mail(self, mail_id: int) -> MailRow | None:
        row = self._one("SELECT * FROM outbox WHERE id = ?", (mail_id,))
        return None if row is None else _mail(row)

    def due_mail(self, now: datetime.datetime, limit: int = 50) -> list[MailRow]:
        """Pending mail whose time has come, oldest first.

        A failure/hold mail waits until its cell is published (its PDF exists); a
        digest waits until the cells it covers are recorded against it, except the
        digest of a closed lot, which covers the lot as closed.
        """
        rows = self._conn.execute(
            "SELECT o.* FROM outbox o LEFT JOIN results r ON r.id = o.cell_result_id "
            "LEFT JOIN inputs i ON i.id = r.input_id "
            "WHERE o.state = 'pending' AND o.next_attempt_at <= ? "
            "AND (o.kind NOT IN ('failure', 'hold') OR o.cell_result_id IS NULL "
            f"     OR i.state IN {_PUBLISHED}) "
            "AND (o.kind <> 'digest' "
            "     OR EXISTS (SELECT 1 FROM results d WHERE d.digest_mail_id = o.id) "
            "     OR EXISTS (SELECT 1 FROM lots l WHERE l.lot = o.lot)) "
            "ORDER BY o.created_at, o.id LIMIT ?",
            (_utc(now, "now"), limit),
        )
        return [_mail(r) for r in rows]

    def _mail_step(self, mail_id: int, done: str, sql: str, params: Sequence[Any]) -> None:
        """Apply one delivery outcome to a pending mail; repeating the outcome is a no-op."""
        with self._write() as conn:
            row = self.mail(mail_id)
            if row is None:
                raise ValueError(f"no mail with id {mail_id} in {self.path}")
            if row.state == done:
                return
            if row.state != "pending":
                raise ValueError(f"mail {mail_id} is {row.state!r}, not pending")
            conn.execute(
                f"UPDATE outbox SET attempts = attempts + 1, {sql} WHERE id = ?", (*params, mail_id)
            )

    def mark_sent(self, mail_id: int, *, now: datetime.datetime, reply: str) -> None:
        """The server accepted the message (attempts += 1)."""
        self._mail_step(
            mail_id, "sent", "state = 'sent', sent_at = ?, reply = ?", (_utc(now, "now"), reply)
        )

    def mark_retry(
        self,
        mail_id: int,
        *,
        now: datetime.datetime,
        next_attempt_at: datetime.datetime,
        error: str,
    ) -> None:
        """A temporary failure: try again at ``next_attempt_at`` (attempts += 1)."""
        _utc(now, "now")
        self._mail_step(
            mail_id,
            "-",
            "next_attempt_at = ?, last_error = ?",
            (_utc(next_attempt_at, "next_attempt_at"), error),
        )

    def park(self, mail_id: int, *, now: datetime.datetime, reply: str) -> None:
        """A permanent failure (5xx): stop trying until someone requeues it (attempts += 1)."""
        _utc(now, "now")
        self._mail_step(
            mail_id, "parked", "state = 'parked', last_error = ?, reply = ?", (reply, reply)
        )

    def requeue_mail(self, mail_id: int, *, now: datetime.datetime) -> None:
        """Make a parked message due again at ``now`` (after the address or server is fixed)."""
        with self._write() as conn:
            row = self.mail(mail_id)
            if row is None or row.state != "parked":
                raise ValueError(f"mail {mail_id} is not parked")
            conn.execute(
                "UPDATE outbox SET state = 'pending', next_attempt_at = ? WHERE id = ?",
                (_utc(now, "now"), mail_id),
            )

    def mail_in_state(self, state: str) -> list[MailRow]:
        """Every message in ``state`` ('pending', 'sent' or 'parked'), oldest first."""
        rows = self._conn.execute(
            "SELECT * FROM outbox WHERE state = ? ORDER BY created_at, id", (state,)
        )
        return [_mail(r) for r in rows]

    def hurry_pending(self, *, now: datetime.datetime) -> int:
        """Make every pending message due at ``now`` (skip its backoff); return how many."""
        with self._write() as conn:
            cur = conn.execute(
                "UPDATE outbox SET next_attempt_at = ? WHERE state = 'pending' AND next_attempt_at > ?",
                (_utc(now, "now"), _utc(now, "now")),
            )
            return cur.rowcount

    def outbox_counts(self) -> dict[str, int]:
        counts = dict.fromkeys(("pending", "sent", "parked"), 0)
        for state, n in self._conn.execute("SELECT state, count(*) FROM outbox GROUP BY state"):
            counts[state] = n
        return counts

    # ---- lot digests of passed cells ---------------------------------------------------------

    _DIGESTIBLE = (
        "FROM results r JOIN inputs i ON i.id = r.input_id WHERE r.verdict = 'pass' "
        f"AND r.digest_mail_id IS NULL AND r.superseded_by IS NULL AND i.state IN {_PUBLISHED}"
    )

    def pending_digest_lots(self) -> list[str]:
        """Lots with published, current pass cells that no digest covers yet."""
        return [
            r[0]
            for r in self._conn.execute(f"SELECT DISTINCT r.lot {self._DIGESTIBLE} ORDER BY r.lot")
        ]

    def passed_cells_for_digest(self, lot: str) -> list[ResultRow]:
        rows = self._conn.execute(
            f"SELECT r.* {self._DIGESTIBLE} AND r.lot = ? ORDER BY r.analysed_at, r.id", (lot,)
        )
        return [_result(r) for r in rows]

    def current_cells_of_lot(self, lot: str) -> list[ResultRow]:
        """Every published, current result of ``lot``, whatever its verdict, by cell id.

        A digest covers the pass cells not yet digested (they get no mail of their own),
        and lists these: the whole lot as it stands, fails and holds included.
        """
        rows = self._conn.execute(
            "SELECT r.* FROM results r JOIN inputs i ON i.id = r.input_id "
            f"WHERE r.lot = ? AND r.superseded_by IS NULL AND i.state IN {_PUBLISHED} "
            "ORDER BY r.cell_id, r.id",
            (lot,),
        )
        return [_result(r) for r in rows]

    def mark_digested(self, lot: str, result_ids: Sequence[int], mail_id: int) -> None:
        """Record that digest ``mail_id`` covers ``result_ids``; all or nothing.

        Refuses a cell that is already in another digest, so each pass cell is in
        exactly one. Marking the same cells with the same mail again is a no-op.
        """
        with self._write():
            self._link_digest(lot, result_ids, mail_id)

    def queue_digest(
        self, mail: OutgoingMail, result_ids: Sequence[int], *, now: datetime.datetime
    ) -> int:
        """Queue a digest and record the cells it covers in one transaction; return its id.

        Prefer this to queue_mail + mark_digested: no crash can leave a digest queued
        without its cells (such a digest would never become due).
        """
        at = _utc(now, "now")
        with self._write():
            mail_id = self._insert_mail(mail, created_at=at, result_id=None, lot=mail.lot)
            self._link_digest(mail.lot or "", result_ids, mail_id)
            return mail_id

    def _link_digest(self, lot: str, result_ids: Sequence[int], mail_id: int) -> None:
        mail = self.mail(mail_id)
        if mail is None or mail.kind != "digest":
            raise ValueError(f"mail {mail_id} is not a digest")
        for result_id in result_ids:
            # the results are InputsMixin's; this mixin reads the row itself to stand alone
            found = self._one("SELECT * FROM results WHERE id = ?", (result_id,))
            row = None if found is None else _result(found)
            if row is None or row.lot != lot or row.verdict != "pass":
                raise ValueError(f"result {result_id} is not a passed cell of lot {lot!r}")
            if row.digest_mail_id not in (None, mail_id):
                raise ValueError(
                    f"result {result_id} is already in digest mail {row.digest_mail_id}"
                )
            self._conn.execute(
                "UPDATE results SET digest_mail_id = ? WHERE id = ?", (mail_id, result_id)
            )

    def digest_count(self, lot: str) -> int:
        """How many digest mails were ever queued for ``lot`` (numbers the next one)."""
        row = self._one("SELECT count(*) AS n FROM outbox WHERE kind = 'digest' AND lot = ?", (lot,))
        return 0 if row is None else int(row["n"])

    def latest_activity(self, lot: str) -> datetime.datetime | None:
        """When the latest cell of ``lot`` was judged (for the digest's quiet time)."""
        row = self._one("SELECT max(analysed_at) AS t FROM results WHERE lot = ?", (lot,))
        return None if row is None or row["t"] is None else _time(row["t"])

