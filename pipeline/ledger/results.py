"""The ledger's results: a judgement of one input, its check rows, and the records of a cell or lot.

A judgement is recorded in ONE transaction with its check rows and its letters, and
moves its input to 'judged'; an earlier version of the same file is superseded, never
overwritten. The input's other steps are inputs.py's, the letters' delivery outbox.py's.
"""

from __future__ import annotations

import datetime
import json
from collections.abc import Sequence
from dataclasses import dataclass

from pipeline.ledger.certificates import insert_waiting
from pipeline.ledger.connection import Connection
from pipeline.ledger.inputs import input_or_fail
from pipeline.ledger.outbox import insert_mail
from pipeline.ledger.rows import (
    PUBLISHED,
    CheckRowData,
    OutgoingMail,
    ResultRow,
    result_row,
    utc_text,
)

# Of an input judged again by a regrade, only its latest judgement counts.
_LATEST_OF_INPUT = (
    "NOT EXISTS (SELECT 1 FROM results n WHERE n.input_id = r.input_id AND n.id > r.id)"
)


@dataclass(frozen=True, slots=True)
class Counting:
    """A record that counts today, with where its input's bytes are kept."""

    result: ResultRow
    name: str
    sha256: str
    final_path: str


class Results:
    """The results and checks tables over the ledger's one connection."""

    def __init__(self, db: Connection) -> None:
        self.db = db

    def record(
        self,
        input_id: int,
        *,
        cell_id: str,
        lot: str,
        verdict: str,
        hazards: Sequence[str],
        result_json: str,
        checks: Sequence[CheckRowData],
        rule_set_name: str,
        rule_set_revision: str,
        rule_set_sha256: str,
        analysed_at: datetime.datetime,
        json_path: str,
        pdf_path: str | None,
        mails: Sequence[OutgoingMail],
        certificate_priority: int | None = None,
    ) -> int:
        """Record a judgement in ONE transaction: result, check rows, outbox rows, input -> judged.

        Returns the result id. A second call for the same input returns the first id
        and writes nothing. Earlier versions' results (same name) become superseded.
        Mails are queued at ``analysed_at`` with this result's id, and are not due until
        the input is published. With ``certificate_priority`` (and a ``pdf_path``) the
        certificate is not rendered yet: it is queued (certificates.py) in the same
        transaction, and the letters that attach it wait for it. Any failure (e.g. a check
        row that breaks a constraint: ``sqlite3.IntegrityError``) rolls all of it back.
        """
        analysed = utc_text(analysed_at, "analysed_at")
        with self.db.write() as conn:
            row = input_or_fail(self.db, input_id)
            if row.result_id is not None:
                return row.result_id
            if row.state != "claimed":
                raise ValueError(
                    f"input {input_id} is {row.state!r}; only a claimed input can be judged"
                )
            cur = conn.execute(
                "INSERT INTO results (input_id, cell_id, lot, verdict, hazards, result_json, "
                "rule_set_name, rule_set_revision, rule_set_sha256, analysed_at, json_path, "
                "pdf_path) "
                "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (
                    input_id,
                    cell_id,
                    lot,
                    verdict,
                    json.dumps(list(hazards)),
                    result_json,
                    rule_set_name,
                    rule_set_revision,
                    rule_set_sha256,
                    analysed,
                    json_path,
                    pdf_path,
                ),
            )
            result_id = cur.lastrowid
            assert result_id is not None
            conn.executemany(
                "INSERT INTO checks (result_id, position, rule_id, metric, value, low, high, "
                "outcome, severity, hazard) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                [
                    (
                        result_id,
                        n,
                        c.rule_id,
                        c.metric,
                        c.value,
                        c.low,
                        c.high,
                        c.outcome,
                        c.severity,
                        c.hazard,
                    )
                    for n, c in enumerate(checks)
                ],
            )
            for mail in mails:
                if self.db.one("SELECT 1 FROM outbox WHERE message_id = ?", (mail.message_id,)):
                    raise ValueError(
                        f"message id {mail.message_id!r} is already in the outbox; "
                        "give each result's mails their own ids"
                    )
                insert_mail(self.db, mail, created_at=analysed, result_id=result_id, lot=mail.lot or lot
                )
            if certificate_priority is not None and pdf_path is not None:
                insert_waiting(self.db, result_id, certificate_priority, queued_at=analysed)
            conn.execute("UPDATE inputs SET state = 'judged' WHERE id = ?", (input_id,))
            self._supersede(row.name)
            self._supersede_record(result_id, lot, cell_id)
            return result_id

    def _supersede(self, name: str) -> None:
        """Point every other current result under ``name`` at the latest version's result."""
        latest = self.db.one(
            "SELECT r.id FROM results r JOIN inputs i ON i.id = r.input_id WHERE i.name = ? "
            "ORDER BY i.version DESC, r.id DESC LIMIT 1",
            (name,),
        )
        if latest is not None:
            self.db.rows(
                "UPDATE results SET superseded_by = ? WHERE superseded_by IS NULL AND id <> ? "
                "AND input_id IN (SELECT id FROM inputs WHERE name = ?)",
                (latest["id"], latest["id"], name),
            )

    def _supersede_record(self, result_id: int, lot: str, cell_id: str) -> None:
        """A retest: the cell's other current records of the same stages point at the latest
        one, by analysis time (then arrival), as the cell's decision counts them, whatever
        order the workers finished in.

        A cell's formation and grading records are records of different stages and never
        supersede each other; a file with no stage holds the whole program. Which record
        *counts* for the cell's decision is the rule set's (``[records] counts``); this only
        says which record came after which.
        """
        same = (
            "FROM results WHERE lot = ? AND cell_id = ? AND verdict <> 'error' "
            "AND coalesce(json_extract(result_json, '$.stages'), '') = "
            "coalesce((SELECT json_extract(result_json, '$.stages') FROM results WHERE id = ?), '')"
        )
        latest = self.db.one(
            f"SELECT id {same} ORDER BY analysed_at DESC, input_id DESC LIMIT 1",
            (lot, cell_id, result_id),
        )
        if latest is not None:
            self.db.rows(
                f"UPDATE results SET superseded_by = ? WHERE superseded_by IS NULL AND id <> ? "
                f"AND id IN (SELECT id {same})",
                (latest["id"], latest["id"], lot, cell_id, result_id),
            )

    def of_input(self, input_id: int) -> ResultRow | None:
        row = self.db.one(
            "SELECT * FROM results WHERE input_id = ? AND regrade_id IS NULL", (input_id,)
        )
        return None if row is None else result_row(row)

    def get(self, result_id: int) -> ResultRow | None:
        row = self.db.one("SELECT * FROM results WHERE id = ?", (result_id,))
        return None if row is None else result_row(row)

    def checks(self, result_id: int) -> list[CheckRowData]:
        rows = self.db.rows(
            "SELECT rule_id, metric, value, low, high, outcome, severity, hazard FROM checks "
            "WHERE result_id = ? ORDER BY position",
            (result_id,),
        )
        return [CheckRowData(*r) for r in rows]

    def recent(self, limit: int = 10) -> list[ResultRow]:
        rows = self.db.rows(
            "SELECT * FROM results ORDER BY analysed_at DESC, id DESC LIMIT ?", (limit,)
        )
        return [result_row(r) for r in rows]

    def of_cell(self, lot: str, cell_id: str) -> list[ResultRow]:
        """Every published result of the cell's cycle files, oldest first (all records of it)."""
        return self.of_lot(lot, cell_id)

    def of_lot(self, lot: str, cell_id: str | None = None) -> list[ResultRow]:
        """Every published result of the lot's (or one cell's) cycle files, in one query,
        oldest first: every record, superseded ones included; of an input judged again by a
        regrade, only its latest judgement."""
        sql = (
            "SELECT r.* FROM results r JOIN inputs i ON i.id = r.input_id "
            f"WHERE r.lot = ? AND i.state IN ('published', 'archived') AND {_LATEST_OF_INPUT}"
        )
        params: tuple[str, ...] = (lot,)
        if cell_id is not None:
            sql, params = sql + " AND r.cell_id = ?", (lot, cell_id)
        rows = self.db.rows(sql + " ORDER BY r.analysed_at, r.id", params)
        return [result_row(r) for r in rows]

    def counting(
        self, *, lots: Sequence[str] = (), cells: Sequence[str] = (), verdicts: Sequence[str] = ()
    ) -> list[Counting]:
        """Every record that counts today (the latest judgement of each published or archived
        input that was not refused), of these lots, cells and verdicts (all when empty), by
        analysis time: what a regrade judges again."""
        sql = (
            "SELECT r.*, i.name AS input_name, i.sha256 AS input_sha256, i.final_path "
            "FROM results r JOIN inputs i ON i.id = r.input_id "
            f"WHERE i.state IN {PUBLISHED} AND r.verdict <> 'error' AND i.final_path IS NOT NULL "
            f"AND {_LATEST_OF_INPUT}"
        )
        params: list[str] = []
        for column, values in (("r.lot", lots), ("r.cell_id", cells), ("r.verdict", verdicts)):
            if values:
                sql += f" AND {column} IN ({', '.join('?' * len(values))})"
                params += list(values)
        rows = self.db.rows(sql + " ORDER BY r.analysed_at, r.id", tuple(params))
        return [
            Counting(result_row(r), str(r["input_name"]), str(r["input_sha256"]), str(r["final_path"]))
            for r in rows
        ]

    def rule_sets(self) -> list[tuple[str, str, str]]:
        """(name, revision, SHA-256) of every rule set a recorded result names, by name."""
        rows = self.db.rows(
            "SELECT DISTINCT rule_set_name, rule_set_revision, rule_set_sha256 FROM results "
            "ORDER BY rule_set_name, rule_set_revision, rule_set_sha256"
        )
        return [(str(r[0]), str(r[1]), str(r[2])) for r in rows]

    def move_outputs(self, result_id: int, json_path: str, pdf_path: str | None) -> None:
        """Record where an earlier record's published files were moved to (kept, not replaced)."""
        with self.db.write() as conn:
            conn.execute(
                "UPDATE results SET json_path = ?, pdf_path = ? WHERE id = ?",
                (json_path, pdf_path, result_id),
            )

    def current_of_lot(self, lot: str) -> list[ResultRow]:
        """Every published, current result of ``lot``, whatever its verdict, by cell id.

        A digest covers the pass cells not yet digested (they get no mail of their own),
        and lists these: the whole lot as it stands, fails and holds included.
        """
        rows = self.db.rows(
            "SELECT r.* FROM results r JOIN inputs i ON i.id = r.input_id "
            f"WHERE r.lot = ? AND r.superseded_by IS NULL AND i.state IN {PUBLISHED} "
            "ORDER BY r.cell_id, r.id",
            (lot,),
        )
        return [result_row(r) for r in rows]
