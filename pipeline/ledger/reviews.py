"""The ledger's reviews: what a person decided about a held or failed cell, by whom, when and why.

A review (release, reject, or retest of one stage) is a row of its own, never an edit of a
decision, and answers the decision in force when it was made (ISO 9001:2015, clause 8.7,
control of nonconforming outputs, asks for the nonconformity, the action taken, any
concession and the authority that decided). The decision that rests on it is recorded by
decisions.py in the same transaction (:meth:`Reviews.record` takes its values), so a cell
never has a review without the decision it gave. Each row is chained by hash (chain.py).
Whether a review is allowed (a concession over a hazard, say) is the caller's to decide.
"""

from __future__ import annotations

import datetime
import json
from collections.abc import Callable, Sequence

from pipeline.acceptance.rules import only_waiting
from pipeline.ledger.chain import link
from pipeline.ledger.connection import Connection
from pipeline.ledger.decisions import Decisions
from pipeline.ledger.outbox import insert_mail
from pipeline.ledger.rows import (
    DecisionRow,
    OutgoingMail,
    ReviewRow,
    decision_row,
    parse_time,
    review_row,
    utc_text,
)

ACTIONS = ("release", "reject", "retest")


class Reviews:
    """The reviews table over the ledger's one connection."""

    def __init__(self, db: Connection, decisions: Decisions) -> None:
        self.db = db
        self.decisions = decisions

    def record(
        self,
        *,
        cell_id: str,
        lot: str,
        action: str,
        stage: str | None,
        accepts: Sequence[str],
        reviewer: str,
        reason: str,
        now: datetime.datetime,
        answers: int,
        decision: Callable[[ReviewRow], tuple[str, str, Sequence[str], str | None]],
        letters: Callable[[ReviewRow, DecisionRow], Sequence[OutgoingMail]] = lambda r, d: (),
        basis: Sequence[str] = (),
    ) -> tuple[ReviewRow, DecisionRow]:
        """Record a review and the decision it gives, with its letters: ONE transaction.

        ``answers``: the id of the decision the reviewer saw; if the cell's decision changed
        since (a record arrived, another review), nothing is written and ValueError says
        so. ``decision`` turns the review into (verdict, reason, hazards, grade).
        ``basis``: the records the reviewer's decision rests on besides the review (the
        cell's files as "stage:name:sha256"), so that what came after it can be told.
        """
        if action not in ACTIONS:
            raise ValueError(f"action must be one of {ACTIONS}, got {action!r}")
        if not reason.strip():
            raise ValueError("a review needs a reason")
        at = utc_text(now, "now")
        with self.db.write() as conn:
            latest = self.decisions.latest(lot, cell_id)
            if latest is None or latest.id != answers:
                raise ValueError(
                    f"the decision of cell {cell_id} of lot {lot} changed since it was shown "
                    f"(it is now {'none' if latest is None else latest.id}, not {answers})"
                )
            cur = conn.execute(
                "INSERT INTO reviews (cell_id, lot, action, stage, accepts, reviewer, reason, "
                "reviewed_at, decision_id) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (cell_id, lot, action, stage, json.dumps(list(accepts)), reviewer, reason, at,
                 answers),
            )
            assert cur.lastrowid is not None
            link(conn, "reviews", cur.lastrowid)
            found = self.db.one("SELECT * FROM reviews WHERE id = ?", (cur.lastrowid,))
            assert found is not None
            review = review_row(found)
            verdict, why, hazards, grade = decision(review)
            given, _, _ = self.decisions.decide(
                cell_id=cell_id, lot=lot, verdict=verdict, reason=why, hazards=hazards,
                grade=grade, cause="review", basis=[f"review:{review.id}", *basis], now=now,
                review_id=review.id,
            )
            for mail in letters(review, given):
                insert_mail(self.db, mail, created_at=at, result_id=None, lot=lot)
            return review, given

    def of_cell(self, lot: str, cell_id: str) -> list[ReviewRow]:
        """Every review of the cell, oldest first."""
        rows = self.db.rows(
            "SELECT * FROM reviews WHERE lot = ? AND cell_id = ? ORDER BY id", (lot, cell_id)
        )
        return [review_row(r) for r in rows]

    def of_lot(self, lot: str) -> list[ReviewRow]:
        """Every review of the lot's cells, oldest first."""
        rows = self.db.rows("SELECT * FROM reviews WHERE lot = ? ORDER BY id", (lot,))
        return [review_row(r) for r in rows]

    def given(self, review: ReviewRow) -> DecisionRow | None:
        """The decision ``review`` gave (recorded with it)."""
        row = self.db.one(
            "SELECT * FROM decisions WHERE lot = ? AND cell_id = ? AND review_id = ?",
            (review.lot, review.cell_id, review.id),
        )
        return None if row is None else decision_row(row)

    def get(self, review_id: int) -> ReviewRow | None:
        row = self.db.one("SELECT * FROM reviews WHERE id = ?", (review_id,))
        return None if row is None else review_row(row)

    def waiting(self) -> list[tuple[str, str, str, str, datetime.datetime]]:
        """(lot, cell, verdict, reason, since) of every cell whose standing decision waits for a
        person: a fail, or a hold for a reason other than a stage still to come, with no
        review after it; oldest first. ``since``: when that verdict began (a hold decided
        again for another reason keeps waiting since its first)."""
        rows = self.db.rows(
            "SELECT d.lot, d.cell_id, d.verdict, d.reason, (SELECT min(f.decided_at) FROM "
            "decisions f WHERE f.lot = d.lot AND f.cell_id = d.cell_id AND f.id > "
            "coalesce((SELECT max(g.id) FROM decisions g WHERE g.lot = d.lot AND "
            "g.cell_id = d.cell_id AND (g.verdict <> d.verdict OR g.cause = 'review')), 0)) "
            "AS since FROM decisions d WHERE d.verdict IN ('fail', 'hold') "
            "AND d.cause <> 'review' AND d.id = (SELECT max(id) FROM decisions e "
            "WHERE e.lot = d.lot AND e.cell_id = d.cell_id)"
        )
        found = [
            (r["lot"], r["cell_id"], r["verdict"], r["reason"], parse_time(r["since"]))
            for r in rows
            if r["verdict"] == "fail" or not only_waiting(r["reason"])
        ]
        return sorted(found, key=lambda w: (w[4], w[0], w[1]))

