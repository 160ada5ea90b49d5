"""The ledger's decisions on whole cells: each change recorded beside the last, never over it.

A cell is more than one file. Its decision over every stage, its readings and its lot
is recorded each time it changes: a new row that names the one it supersedes, with the
letters the change calls for in the same transaction, so the history is never
rewritten. Which cells are behind their records (a crash came between) and which wait
for a stage are asked here too. The records themselves are results.py's and readings.py's.
"""

from __future__ import annotations

import datetime
import json
from collections.abc import Callable, Sequence

from pipeline.ledger.chain import link
from pipeline.ledger.connection import Connection
from pipeline.ledger.outbox import insert_mail
from pipeline.ledger.rows import DecisionRow, OutgoingMail, decision_row, parse_time, utc_text

CAUSES = ("record", "readings", "lot closed", "rules", "review", "regrade")


class Decisions:
    """The decisions table over the ledger's one connection."""

    def __init__(self, db: Connection) -> None:
        self.db = db

    def latest(self, lot: str, cell_id: str) -> DecisionRow | None:
        row = self.db.one(
            "SELECT * FROM decisions WHERE lot = ? AND cell_id = ? ORDER BY id DESC LIMIT 1",
            (lot, cell_id),
        )
        return None if row is None else decision_row(row)

    def latest_of_lot(self, lot: str) -> dict[str, DecisionRow]:
        """Each cell of the lot -> its latest decision, in one query."""
        rows = self.db.rows(
            "SELECT d.* FROM decisions d WHERE d.lot = ? AND d.id = (SELECT max(id) FROM "
            "decisions e WHERE e.lot = d.lot AND e.cell_id = d.cell_id)",
            (lot,),
        )
        return {r["cell_id"]: decision_row(r) for r in rows}

    def of_cell(self, lot: str, cell_id: str) -> list[DecisionRow]:
        """Every decision on the cell, oldest first."""
        rows = self.db.rows(
            "SELECT * FROM decisions WHERE lot = ? AND cell_id = ? ORDER BY id", (lot, cell_id)
        )
        return [decision_row(r) for r in rows]

    def decide(
        self,
        *,
        cell_id: str,
        lot: str,
        verdict: str,
        reason: str,
        hazards: Sequence[str],
        grade: str | None,
        cause: str,
        basis: Sequence[str],
        now: datetime.datetime,
        letters: Callable[[DecisionRow | None], Sequence[OutgoingMail]] | None = None,
        review_id: int | None = None,
    ) -> tuple[DecisionRow, DecisionRow | None, bool]:
        """Record the cell's decision if it differs from its latest, with its letters: ONE
        transaction. Returns (the decision in force, the one before it, whether it is new).

        The same verdict, reason, hazards and grade again records nothing, so
        recomputing is always safe. ``letters`` is given the decision before (or None)
        and returns the mails this change calls for; they are queued with it. A decision
        resting on a person's review names it (``review_id``, cause 'review'). Each new row
        is chained by hash to the one before it (chain.py).
        """
        if cause not in CAUSES:
            raise ValueError(f"cause must be one of {CAUSES}, got {cause!r}")
        with self.db.write() as conn:
            last = self.latest(lot, cell_id)
            same = last is not None and (last.verdict, last.reason, last.hazards, last.grade) == (
                verdict, reason, tuple(hazards), grade
            )
            if last is not None and same and review_id is None:
                return last, None, False
            cur = conn.execute(
                "INSERT INTO decisions (cell_id, lot, verdict, reason, hazards, grade, cause, "
                "basis, decided_at, supersedes, review_id) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (cell_id, lot, verdict, reason, json.dumps(list(hazards)), grade, cause,
                 json.dumps(list(basis)), utc_text(now, "now"), None if last is None else last.id,
                 review_id),
            )
            assert cur.lastrowid is not None
            link(conn, "decisions", cur.lastrowid)
            new = self.db.one("SELECT * FROM decisions WHERE id = ?", (cur.lastrowid,))
            assert new is not None
            for mail in letters(last) if letters is not None else ():
                insert_mail(self.db, mail, created_at=utc_text(now, "now"), result_id=None, lot=lot)
            return decision_row(new), last, True

    def cells_behind(self, since: datetime.datetime, limit: int = 5000) -> list[tuple[str, str]]:
        """(lot, cell) of cells with a record or reading since ``since`` newer than their
        latest decision (or with none): a crash came between the two."""
        rows = self.db.rows(
            "SELECT e.lot, e.cell_id FROM ("
            "  SELECT r.lot, r.cell_id, max(r.analysed_at) AS t FROM results r "
            "  JOIN inputs i ON i.id = r.input_id WHERE i.state IN ('published', 'archived') "
            "  AND r.verdict <> 'error' AND r.analysed_at >= ? GROUP BY r.lot, r.cell_id "
            "  UNION ALL "
            "  SELECT g.lot, g.cell_id, max(i.arrived_at) FROM readings g "
            "  JOIN inputs i ON i.id = g.input_id WHERE i.state IN ('published', 'archived') "
            "  AND i.arrived_at >= ? GROUP BY g.lot, g.cell_id"
            ") e GROUP BY e.lot, e.cell_id HAVING max(e.t) > coalesce((SELECT max(d.decided_at) "
            "FROM decisions d WHERE d.lot = e.lot AND d.cell_id = e.cell_id), '') "
            "ORDER BY e.lot, e.cell_id LIMIT ?",
            (utc_text(since, "since"), utc_text(since, "since"), limit),
        )
        return [(r["lot"], r["cell_id"]) for r in rows]

    def decided_after(
        self, decision_id: int, since: datetime.datetime | None = None
    ) -> list[tuple[str, str, int]]:
        """(lot, cell, latest decision id) of each cell decided after ``decision_id`` (and
        since ``since``): the cells whose cell certificate may be behind (station/cellcerts.py)."""
        sql = "SELECT lot, cell_id, max(id) AS id FROM decisions WHERE id > ?"
        params: tuple[object, ...] = (decision_id,)
        if since is not None:
            sql += " AND decided_at >= ?"
            params += (utc_text(since, "since"),)
        rows = self.db.rows(sql + " GROUP BY lot, cell_id ORDER BY max(id)", params)
        return [(r["lot"], r["cell_id"], r["id"]) for r in rows]

    def cells_recorded_since(self, since: datetime.datetime) -> list[tuple[str, str]]:
        """(lot, cell) of each cell with a cycle-file record or a reading since ``since``."""
        rows = self.db.rows(
            "SELECT lot, cell_id FROM results WHERE analysed_at >= ? AND verdict <> 'error' "
            "UNION SELECT g.lot, g.cell_id FROM readings g JOIN inputs i ON i.id = g.input_id "
            "WHERE i.arrived_at >= ? ORDER BY 1, 2",
            (utc_text(since, "since"), utc_text(since, "since")),
        )
        return [(r["lot"], r["cell_id"]) for r in rows]

    def waiting_cells(self) -> list[tuple[str, str, str, datetime.datetime]]:
        """(lot, cell, reason, since) of every cell of an open lot whose latest decision holds
        it while it waits for a stage; ``since``: when it began to wait (its first decision,
        or a retest asked after a fail or a hold for another reason)."""
        rows = self.db.rows(
            "SELECT d.lot, d.cell_id, d.reason, (SELECT min(decided_at) FROM decisions f "
            "WHERE f.lot = d.lot AND f.cell_id = d.cell_id AND f.id > coalesce((SELECT "
            "max(g.id) FROM decisions g WHERE g.lot = d.lot AND g.cell_id = d.cell_id AND "
            "(g.verdict <> 'hold' OR g.reason NOT LIKE '%waiting for stage%')), 0)) "
            "AS first_at FROM decisions d "
            "WHERE d.verdict = 'hold' AND d.reason LIKE '%waiting for stage%' "
            "AND d.lot NOT IN (SELECT lot FROM lots) AND d.id = (SELECT max(id) FROM decisions e "
            "WHERE e.lot = d.lot AND e.cell_id = d.cell_id) ORDER BY d.lot, d.cell_id"
        )
        return [(r["lot"], r["cell_id"], r["reason"], parse_time(r["first_at"])) for r in rows]
