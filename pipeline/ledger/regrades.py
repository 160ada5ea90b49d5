"""The ledger's regrades: archived inputs judged again under other rules, applied beside the old.

A regrade is one row (who ran it and why, the rules folder's digest and its rule sets,
what it selected, the counts of what changed; ``finished_at`` once every change is
applied). Applying one cell is ONE transaction: a result for each of the cell's inputs
judged again (with its check rows and ``regrade_id``; the input's earlier judgement
points at it through ``superseded_by`` and hands it the retest that superseded it, if
any), and the cell's new decision, cause 'regrade', whose basis names the regrade. A run
cut short and started again finds its unfinished row by the same rules and selection and
carries on: an input already judged by this regrade is not recorded twice, and a decision
that already stands is not recorded again (decisions.py), so a second run applies nothing.
What the cut-short run already recorded is asked here (:meth:`Regrades.judged_before`,
:meth:`Regrades.decided`), so that the run that carries on reports the whole regrade, each
cell against the decision the regrade superseded, as one clean run would.
"""

from __future__ import annotations

import datetime
import json
import sqlite3
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

from pipeline.ledger.connection import Connection
from pipeline.ledger.decisions import Decisions
from pipeline.ledger.rows import (
    CheckRowData,
    DecisionRow,
    ResultRow,
    decision_row,
    parse_time,
    result_row,
    utc_text,
)


@dataclass(frozen=True, slots=True)
class RegradeRow:
    id: int
    started_at: datetime.datetime
    finished_at: datetime.datetime | None
    run_by: str
    reason: str
    rules_digest: str
    rule_sets: tuple[tuple[str, str, str], ...]  # (name, revision, SHA-256)
    selection: str
    summary: Mapping[str, int]


@dataclass(frozen=True, slots=True)
class Rejudged:
    """One input's judgement under the regrade's rules, as the results table records it."""

    input_id: int
    verdict: str
    hazards: tuple[str, ...]
    result_json: str
    checks: tuple[CheckRowData, ...]
    rule_set_name: str
    rule_set_revision: str
    rule_set_sha256: str
    analysed_at: datetime.datetime
    json_path: str
    pdf_path: str | None = None


def _row(r: sqlite3.Row) -> RegradeRow:
    return RegradeRow(
        int(r["id"]),
        parse_time(r["started_at"]),
        None if r["finished_at"] is None else parse_time(r["finished_at"]),
        str(r["run_by"]),
        str(r["reason"]),
        str(r["rules_digest"]),
        tuple((str(a), str(b), str(c)) for a, b, c in json.loads(r["rule_sets"])),
        str(r["selection"]),
        json.loads(r["summary"]),
    )


class Regrades:
    """The regrades table, and applying a regrade's change to one cell."""

    def __init__(self, db: Connection, decisions: Decisions) -> None:
        self.db = db
        self.decisions = decisions

    def begin(
        self,
        *,
        run_by: str,
        reason: str,
        rules_digest: str,
        rule_sets: Sequence[tuple[str, str, str]],
        selection: str,
        now: datetime.datetime,
    ) -> RegradeRow:
        """The unfinished regrade of these rules and this selection, else a new one."""
        with self.db.write() as conn:
            found = self.db.one(
                "SELECT * FROM regrades WHERE finished_at IS NULL AND rules_digest = ? "
                "AND selection = ? ORDER BY id DESC LIMIT 1",
                (rules_digest, selection),
            )
            if found is not None:
                return _row(found)
            cur = conn.execute(
                "INSERT INTO regrades (started_at, run_by, reason, rules_digest, rule_sets, "
                "selection, summary) VALUES (?, ?, ?, ?, ?, ?, '{}')",
                (utc_text(now, "now"), run_by, reason, rules_digest,
                 json.dumps([list(r) for r in rule_sets]), selection),
            )
            assert cur.lastrowid is not None
            row = self.get(cur.lastrowid)
            assert row is not None
            return row

    def unfinished(self, rules_digest: str, selection: str) -> RegradeRow | None:
        """The unfinished regrade of these rules and this selection (one cut short), if any:
        the row :meth:`begin` carries on."""
        found = self.db.one(
            "SELECT * FROM regrades WHERE finished_at IS NULL AND rules_digest = ? "
            "AND selection = ? ORDER BY id DESC LIMIT 1",
            (rules_digest, selection),
        )
        return None if found is None else _row(found)

    def judged_before(self, regrade_id: int) -> dict[int, ResultRow]:
        """Input id -> its judgement before this regrade's, for each input whose latest
        judgement is this regrade's (the judgement that regrade superseded)."""
        rows = self.db.rows(
            "SELECT p.* FROM results r JOIN results p ON p.input_id = r.input_id "
            "AND p.id = (SELECT max(q.id) FROM results q WHERE q.input_id = r.input_id "
            "AND q.id < r.id) "
            "WHERE r.regrade_id = ? AND NOT EXISTS "
            "(SELECT 1 FROM results n WHERE n.input_id = r.input_id AND n.id > r.id)",
            (regrade_id,),
        )
        return {int(r["input_id"]): result_row(r) for r in rows}

    def decided(self, regrade_id: int) -> dict[tuple[str, str], tuple[DecisionRow | None, DecisionRow]]:
        """(lot, cell) -> (the decision this regrade's first decision on the cell superseded,
        that decision), for every cell that carries a decision of this regrade."""
        rows = self.db.rows(
            "SELECT * FROM decisions WHERE cause = 'regrade' AND basis LIKE ? ORDER BY id",
            (f'%"regrade:{int(regrade_id)}"%',),
        )
        out: dict[tuple[str, str], tuple[DecisionRow | None, DecisionRow]] = {}
        for r in rows:
            row = decision_row(r)
            if (row.lot, row.cell_id) in out or f"regrade:{regrade_id}" not in row.basis:
                continue
            before = self.db.one("SELECT * FROM decisions WHERE id = ?", (row.supersedes,)) if (
                row.supersedes is not None) else None
            out[(row.lot, row.cell_id)] = (None if before is None else decision_row(before), row)
        return out

    def get(self, regrade_id: int) -> RegradeRow | None:
        found = self.db.one("SELECT * FROM regrades WHERE id = ?", (regrade_id,))
        return None if found is None else _row(found)

    def every(self) -> list[RegradeRow]:
        return [_row(r) for r in self.db.rows("SELECT * FROM regrades ORDER BY id")]

    def rule_sets_of_cell(self, regrade_id: int, lot: str, cell_id: str) -> list[tuple[str, str]]:
        """(name, revision) of the rule sets that judged the cell's inputs in this regrade."""
        rows = self.db.rows(
            "SELECT DISTINCT rule_set_name, rule_set_revision FROM results WHERE regrade_id = ? "
            "AND lot = ? AND cell_id = ? ORDER BY rule_set_name, rule_set_revision",
            (regrade_id, lot, cell_id),
        )
        return [(str(r[0]), str(r[1])) for r in rows]

    def finish(self, regrade_id: int, summary: Mapping[str, int], now: datetime.datetime) -> None:
        with self.db.write() as conn:
            conn.execute(
                "UPDATE regrades SET finished_at = ?, summary = ? WHERE id = ?",
                (utc_text(now, "now"), json.dumps(dict(summary), sort_keys=True), regrade_id),
            )

    def apply_cell(
        self,
        regrade_id: int,
        *,
        lot: str,
        cell_id: str,
        rejudged: Sequence[Rejudged],
        verdict: str,
        reason: str,
        hazards: Sequence[str],
        basis: Sequence[str],
        now: datetime.datetime,
        grade: str | None = None,
    ) -> tuple[DecisionRow, bool]:
        """Record the cell's inputs judged again and its new decision: ONE transaction.

        Returns (the decision in force, whether it is new). Safe to repeat.
        """
        with self.db.write() as conn:
            for item in rejudged:
                if self.db.one(
                    "SELECT 1 FROM results WHERE input_id = ? AND regrade_id = ?",
                    (item.input_id, regrade_id),
                ):
                    continue
                before = self.db.one(
                    "SELECT id, superseded_by FROM results WHERE input_id = ? "
                    "ORDER BY id DESC LIMIT 1",
                    (item.input_id,),
                )
                cur = conn.execute(
                    "INSERT INTO results (input_id, cell_id, lot, verdict, hazards, result_json, "
                    "rule_set_name, rule_set_revision, rule_set_sha256, analysed_at, json_path, "
                    "pdf_path, superseded_by, regrade_id) "
                    "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                    (item.input_id, cell_id, lot, item.verdict, json.dumps(list(item.hazards)),
                     item.result_json, item.rule_set_name, item.rule_set_revision,
                     item.rule_set_sha256, utc_text(item.analysed_at, "analysed_at"),
                     item.json_path, item.pdf_path,
                     None if before is None else before["superseded_by"],
                     regrade_id),
                )
                new_id = cur.lastrowid
                assert new_id is not None
                conn.executemany(
                    "INSERT INTO checks (result_id, position, rule_id, metric, value, low, high, "
                    "outcome, severity, hazard) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                    [(new_id, n, c.rule_id, c.metric, c.value, c.low, c.high, c.outcome,
                      c.severity, c.hazard) for n, c in enumerate(item.checks)],
                )
                if before is not None:
                    conn.execute(
                        "UPDATE results SET superseded_by = ? WHERE id = ?", (new_id, before["id"])
                    )
                    # whatever pointed at the earlier judgement points at this one now
                    conn.execute(
                        "UPDATE results SET superseded_by = ? WHERE superseded_by = ? AND id <> ?",
                        (new_id, before["id"], new_id),
                    )
            row, _, new = self.decisions.decide(
                cell_id=cell_id, lot=lot, verdict=verdict, reason=reason, hazards=hazards,
                grade=grade, cause="regrade", basis=[*basis, f"regrade:{regrade_id}"], now=now,
            )
            return row, new
