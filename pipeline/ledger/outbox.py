"""The ledger's outbox: every letter queued once per Message-ID, and its delivery steps.

A message is queued once per Message-ID, becomes due (a cell's mail once the cell is
published, a digest once its cells are recorded against it), is claimed by one sender,
and is sent, retried or parked by that sender. Every table family that queues letters
with its own rows (a result's mails, an error's alerts, a decision's letters) inserts
them with :func:`insert_mail` inside its own transaction. Which digest covers which
cell is digests.py's.

Why claims: the station's mail thread and any number of `formgate mail retry`
processes read the same outbox, and without a claim each of them sends every due row
it read. A claim is one UPDATE in a write transaction that succeeds only for a
pending, due row that no other sender holds (or whose holder's lease has run out), so
one row has one live claim at a time; the outcome is recorded only by the claim's
owner and clears the claim. Choosing the lease is the sender's job (it knows its
server's timeouts); the ledger only compares times.
"""

from __future__ import annotations

import datetime
import json
from collections.abc import Sequence
from typing import Any

from pipeline.ledger.connection import Connection
from pipeline.ledger.rows import PUBLISHED, MailRow, OutgoingMail, mail_row, utc_text

# Longest a letter waits for a file it links (the cell's own certificate, rendered moments
# after the decision): a render that keeps failing must not keep a failed cell's letter back.
LINK_WAIT_S = 300.0


class NotClaimed(ValueError):
    """An outcome (sent, retry, park) or a release by a sender that does not hold the mail's claim."""


def insert_mail(
    db: Connection, mail: OutgoingMail, *, created_at: str, result_id: int | None, lot: str | None
) -> int:
    """Insert unless the message id is queued already; the row's id either way.

    Runs inside the caller's write transaction (``db.write()``), so a letter is queued
    with the rows that call for it, or not at all.
    """
    db.conn.execute(
        "INSERT INTO outbox (kind, message_id, recipients, subject, body_text, "
        "attachment_path, cell_result_id, lot, state, next_attempt_at, created_at, waits_for) "
        "VALUES (?, ?, ?, ?, ?, ?, ?, ?, 'pending', ?, ?, ?) ON CONFLICT (message_id) DO NOTHING",
        (
            mail.kind,
            mail.message_id,
            json.dumps(list(mail.recipients)),
            mail.subject,
            mail.body_text,
            mail.attachment_path,
            result_id,
            lot,
            created_at,
            created_at,
            mail.waits_for,
        ),
    )
    row = db.one("SELECT id FROM outbox WHERE message_id = ?", (mail.message_id,))
    assert row is not None
    return int(row["id"])


class Outbox:
    """The outbox table over the ledger's one connection."""

    def __init__(self, db: Connection) -> None:
        self.db = db

    def queue(self, mail: OutgoingMail, *, now: datetime.datetime) -> int:
        """Queue a message due at ``now``; queuing the same message id again returns its id."""
        at = utc_text(now, "now")
        with self.db.write():
            return insert_mail(self.db, mail, created_at=at, result_id=None, lot=mail.lot)

    def by_message_id(self, message_id: str) -> MailRow | None:
        row = self.db.one("SELECT * FROM outbox WHERE message_id = ?", (message_id,))
        return None if row is None else mail_row(row)

    def get(self, mail_id: int) -> MailRow | None:
        row = self.db.one("SELECT * FROM outbox WHERE id = ?", (mail_id,))
        return None if row is None else mail_row(row)

    def due(self, now: datetime.datetime, limit: int = 50) -> list[MailRow]:
        """Pending mail whose time has come, oldest first, claimed or not (see :meth:`claim`).

        A failure/hold mail waits until its cell is published and the certificate it
        attaches is rendered (or given up: certificates.py); a mail that names a file it
        links (``waits_for``: the cell's own certificate) waits until that file is
        published after the mail was queued, for at most ``LINK_WAIT_S`` (the sender then
        says the file is not there yet); a digest waits until the cells it covers are
        recorded against it, except the digest of a closed lot, which covers the lot as
        closed.
        """
        at = utc_text(now, "now")
        gave_up = utc_text(now - datetime.timedelta(seconds=LINK_WAIT_S), "now")
        rows = self.db.rows(
            "SELECT o.* FROM outbox o LEFT JOIN results r ON r.id = o.cell_result_id "
            "LEFT JOIN inputs i ON i.id = r.input_id "
            "WHERE o.state = 'pending' AND o.next_attempt_at <= ? "
            "AND (o.kind NOT IN ('failure', 'hold') OR o.cell_result_id IS NULL "
            f"     OR i.state IN {PUBLISHED}) "
            "AND NOT EXISTS (SELECT 1 FROM certificate_queue q "
            "     WHERE q.result_id = o.cell_result_id AND q.done_at IS NULL) "
            "AND (o.waits_for IS NULL OR o.created_at <= ? "
            "     OR EXISTS (SELECT 1 FROM published p WHERE p.path = o.waits_for "
            "                AND p.published_at >= o.created_at)) "
            "AND (o.kind <> 'digest' "
            "     OR EXISTS (SELECT 1 FROM results d WHERE d.digest_mail_id = o.id) "
            "     OR EXISTS (SELECT 1 FROM lots l WHERE l.lot = o.lot)) "
            "ORDER BY o.created_at, o.id LIMIT ?",
            (at, gave_up, limit),
        )
        return [mail_row(r) for r in rows]

    def claim(
        self,
        mail_id: int,
        *,
        owner: str,
        now: datetime.datetime,
        until: datetime.datetime,
        take_from: str | None = None,
    ) -> MailRow | None:
        """Claim a pending, due mail for ``owner`` until ``until``; the row as claimed, or None.

        One UPDATE in a write transaction: it succeeds only while the mail is pending and
        due at ``now`` and nobody else holds a live claim on it (a claim whose lease has
        run out is taken over). ``take_from`` also takes it from that owner before its
        lease is over: the caller knows that owner has died. A sender that already
        holds the claim gets it again with the new lease.
        """
        if not owner:
            raise ValueError("a claim needs an owner: the id of the sending process and thread")
        at, end = utc_text(now, "now"), utc_text(until, "until")
        if end <= at:
            raise ValueError(f"a claim's lease must end after now ({end} is not after {at})")
        with self.db.write() as conn:
            cur = conn.execute(
                "UPDATE outbox SET claimed_by = ?, claimed_until = ? "
                "WHERE id = ? AND state = 'pending' AND next_attempt_at <= ? "
                "AND (claimed_by IS NULL OR claimed_until <= ? OR claimed_by IN (?, ?))",
                (owner, end, mail_id, at, at, owner, take_from or owner),
            )
            return self.get(mail_id) if cur.rowcount == 1 else None

    def being_sent(self, now: datetime.datetime) -> list[MailRow]:
        """Pending mail that a sender holds a live claim on at ``now``, oldest first."""
        rows = self.db.rows(
            "SELECT * FROM outbox WHERE state = 'pending' AND claimed_by IS NOT NULL "
            "AND claimed_until > ? ORDER BY created_at, id",
            (utc_text(now, "now"),),
        )
        return [mail_row(r) for r in rows]

    def release(self, mail_id: int, *, owner: str) -> bool:
        """Give up ``owner``'s claim without an outcome (nothing was sent); False if not held."""
        with self.db.write() as conn:
            cur = conn.execute(
                "UPDATE outbox SET claimed_by = NULL, claimed_until = NULL "
                "WHERE id = ? AND claimed_by = ?",
                (mail_id, owner),
            )
            return cur.rowcount == 1

    def _mail_step(
        self, mail_id: int, owner: str, done: str, sql: str, params: Sequence[Any]
    ) -> None:
        """Apply one delivery outcome to a mail ``owner`` has claimed, and clear the claim.

        Repeating an outcome that is final already (sent, parked) is a no-op. Raises
        NotClaimed when ``owner`` does not hold the claim: another sender took the mail
        over after this one's lease ran out, and only the holder records its outcome.
        """
        with self.db.write() as conn:
            row = self.get(mail_id)
            if row is None:
                raise ValueError(f"no mail with id {mail_id} in {self.db.path}")
            if row.state == done:
                return
            if row.state != "pending":
                raise ValueError(f"mail {mail_id} is {row.state!r}, not pending")
            if row.claimed_by != owner:
                raise NotClaimed(
                    f"mail {mail_id} in {self.db.path} is claimed by "
                    f"{row.claimed_by or 'no sender'}, not by {owner}: only the sender that "
                    "holds its claim records what became of it. Claim it first "
                    "(outbox.claim); a claim lost after its lease ran out stays lost"
                )
            conn.execute(
                f"UPDATE outbox SET attempts = attempts + 1, {sql}, "
                "claimed_by = NULL, claimed_until = NULL WHERE id = ? AND claimed_by = ?",
                (*params, mail_id, owner),
            )

    def mark_sent(self, mail_id: int, *, owner: str, now: datetime.datetime, reply: str) -> None:
        """The server accepted the message (attempts += 1); ``owner`` holds its claim."""
        self._mail_step(
            mail_id,
            owner,
            "sent",
            "state = 'sent', sent_at = ?, reply = ?",
            (utc_text(now, "now"), reply),
        )

    def mark_retry(
        self,
        mail_id: int,
        *,
        owner: str,
        now: datetime.datetime,
        next_attempt_at: datetime.datetime,
        error: str,
    ) -> None:
        """A temporary failure: try again at ``next_attempt_at`` (attempts += 1)."""
        utc_text(now, "now")
        self._mail_step(
            mail_id,
            owner,
            "-",
            "next_attempt_at = ?, last_error = ?",
            (utc_text(next_attempt_at, "next_attempt_at"), error),
        )

    def park(self, mail_id: int, *, owner: str, now: datetime.datetime, reply: str) -> None:
        """A permanent failure (5xx): stop trying until someone requeues it (attempts += 1)."""
        utc_text(now, "now")
        self._mail_step(
            mail_id, owner, "parked", "state = 'parked', last_error = ?, reply = ?", (reply, reply)
        )

    def requeue(self, mail_id: int, *, now: datetime.datetime) -> None:
        """Make a parked message due again at ``now`` (after the address or server is fixed)."""
        with self.db.write() as conn:
            row = self.get(mail_id)
            if row is None or row.state != "parked":
                raise ValueError(f"mail {mail_id} is not parked")
            conn.execute(
                "UPDATE outbox SET state = 'pending', next_attempt_at = ? WHERE id = ?",
                (utc_text(now, "now"), mail_id),
            )

    def in_state(self, state: str) -> list[MailRow]:
        """Every message in ``state`` ('pending', 'sent' or 'parked'), oldest first."""
        rows = self.db.rows(
            "SELECT * FROM outbox WHERE state = ? ORDER BY created_at, id", (state,)
        )
        return [mail_row(r) for r in rows]

    def hurry_pending(self, *, now: datetime.datetime) -> int:
        """Make every pending message due at ``now`` (skip its backoff); return how many."""
        with self.db.write() as conn:
            cur = conn.execute(
                "UPDATE outbox SET next_attempt_at = ? WHERE state = 'pending' AND next_attempt_at > ?",
                (utc_text(now, "now"), utc_text(now, "now")),
            )
            return cur.rowcount

    def waiting_for_files(self, now: datetime.datetime) -> int:
        """Pending mail held back only by a certificate it attaches or a file it links that is
        not there yet (see :meth:`due`): `formgate status` says so beside the pending count."""
        gave_up = utc_text(now - datetime.timedelta(seconds=LINK_WAIT_S), "now")
        row = self.db.one(
            "SELECT count(*) AS n FROM outbox o WHERE o.state = 'pending' AND ("
            " EXISTS (SELECT 1 FROM certificate_queue q "
            "         WHERE q.result_id = o.cell_result_id AND q.done_at IS NULL)"
            " OR (o.waits_for IS NOT NULL AND o.created_at > ? AND NOT EXISTS ("
            "     SELECT 1 FROM published p WHERE p.path = o.waits_for "
            "     AND p.published_at >= o.created_at)))",
            (gave_up,),
        )
        return 0 if row is None else int(row["n"])

    def counts(self) -> dict[str, int]:
        counts = dict.fromkeys(("pending", "sent", "parked"), 0)
        for state, n in self.db.rows("SELECT state, count(*) FROM outbox GROUP BY state"):
            counts[state] = n
        return counts
