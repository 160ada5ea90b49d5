"""The ledger's inputs and results: claiming files, their states, judgements and their checks.

Every input moves through claimed -> judged -> published -> archived (or to quarantined
or duplicate); this mixin records each step, the result and check rows of a judgement
(with its mails, in the same transaction), and answers the status counts over them.
The connection and transactions are LedgerBase's; the outbox's own steps, set-aside
entries and station values are other mixins'.
"""

from __future__ import annotations

import datetime
import json
from collections.abc import Sequence

from pipeline.station.ledger_base import LedgerBase
from pipeline.station.ledger_rows import (
    _INPUT_SELECT,
    _SHA256,
    FINAL_STATES,
    INPUT_STATES,
    CheckRowData,
    InputRow,
    OutgoingMail,
    ResultRow,
    _input,
    _result,
    _utc,
)


class InputsMixin(LedgerBase):
    """Inputs and results of the Ledger."""

    def _input_or_fail(self, input_id: int) -> InputRow:
        row = self.input(input_id)
        if row is None:
            raise ValueError(f"no input with id {input_id} in {self.path}")
        return row

    # ---- inputs ------------------------------------------------------------------------------

    def input(self, input_id: int) -> InputRow | None:
        row = self._one(f"{_INPUT_SELECT} WHERE i.id = ?", (input_id,))
        return None if row is None else _input(row)

    def claim_input(
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
        if not _SHA256.fullmatch(sha256):
            raise ValueError(f"sha256 must be 64 lowercase hex digits, got {sha256!r}")
        # a backslash is allowed: it is how pipeline.inputnames escapes a name into text
        if not name or "/" in name or not name.isprintable():
            raise ValueError(f"name must be a file's base name as text, got {name!r}")
        arrived = _utc(arrived_at, "arrived_at")
        with self._write() as conn:
            same = self._one(
                "SELECT id, duplicate_of FROM inputs WHERE work_path = ? AND sha256 = ? "
                "AND final_path IS NULL",
                (work_path, sha256),
            )
            if same is not None:
                dup = same["duplicate_of"]
                return self._input_or_fail(same["id"]), None if dup is None else self.input(dup)
            earlier = self._one(
                "SELECT id, name, version FROM inputs WHERE sha256 = ? AND state IN "
                "('claimed', 'judged', 'published', 'archived') ORDER BY id LIMIT 1",
                (sha256,),
            )
            if earlier is not None:
                state, dup_of, supersedes = "duplicate", earlier["id"], None
                version = earlier["version"] if earlier["name"] == name else 1
            else:
                latest = self._one(
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
            return self._input_or_fail(new_id), None if dup_of is None else self.input(dup_of)

    def input_by_work_path(self, work_path: str) -> InputRow | None:
        """The in-flight row for a file in work/, else the latest row that ever used the path."""
        row = self._one(
            f"{_INPUT_SELECT} WHERE i.work_path = ? "
            "ORDER BY i.final_path IS NULL DESC, i.id DESC LIMIT 1",
            (work_path,),
        )
        return None if row is None else _input(row)

    def inputs_in_state(self, *states: str) -> list[InputRow]:
        """Rows in any of ``states``, oldest first (e.g. the unfinished work after a restart)."""
        unknown = set(states) - set(INPUT_STATES)
        if unknown:
            raise ValueError(f"unknown input states {sorted(unknown)}; known: {INPUT_STATES}")
        marks = ", ".join("?" * len(states))
        rows = self._conn.execute(
            f"{_INPUT_SELECT} WHERE i.state IN ({marks}) ORDER BY i.id", states
        )
        return [_input(r) for r in rows]

    def mark_published(self, input_id: int) -> None:
        """'judged' -> 'published' once the JSON and PDF are on disk; again is a no-op."""
        with self._write() as conn:
            row = self._input_or_fail(input_id)
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
        with self._write() as conn:
            row = self._input_or_fail(input_id)
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
                final_at = _utc(now, "now")
            else:
                res = self.result_for_input(input_id)
                final_at = _utc(res.analysed_at if res else row.arrived_at, "final time")
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
        with self._write() as conn:
            row = self._input_or_fail(input_id)
            if row.state not in ("claimed", "judged"):
                raise ValueError(
                    f"input {input_id} is {row.state!r}; errors are recorded before it is final"
                )
            conn.execute("UPDATE inputs SET reason = ? WHERE id = ?", (reason, input_id))
            at = _utc(now or row.arrived_at, "now")
            for mail in mails:
                self._insert_mail(mail, created_at=at, result_id=None, lot=mail.lot)

    # ---- results -----------------------------------------------------------------------------

    def record_result(
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
    ) -> int:
        """Record a judgement in ONE transaction: result, check rows, outbox rows, input -> judged.

        Returns the result id. A second call for the same input returns the first id
        and writes nothing. Earlier versions' results (same name) become superseded.
        Mails are queued at ``analysed_at`` with this result's id, and are not due until
        the input is published. Any failure (e.g. a check row that breaks a constraint:
        ``sqlite3.IntegrityError``) rolls all of it back.
        """
        analysed = _utc(analysed_at, "analysed_at")
        with self._write() as conn:
            row = self._input_or_fail(input_id)
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
                if self._one("SELECT 1 FROM outbox WHERE message_id = ?", (mail.message_id,)):
                    raise ValueError(
                        f"message id {mail.message_id!r} is already in the outbox; "
                        "give each result's mails their own ids"
                    )
                self._insert_mail(
                    mail, created_at=analysed, result_id=result_id, lot=mail.lot or lot
                )
            conn.execute("UPDATE inputs SET state = 'judged' WHERE id = ?", (input_id,))
            self._supersede(row.name)
            return result_id

    def _supersede(self, name: str) -> None:
        """Point every other current result under ``name`` at the latest version's result."""
        latest = self._one(
            "SELECT r.id FROM results r JOIN inputs i ON i.id = r.input_id WHERE i.name = ? "
            "ORDER BY i.version DESC LIMIT 1",
            (name,),
        )
        if latest is not None:
            self._conn.execute(
                "UPDATE results SET superseded_by = ? WHERE superseded_by IS NULL AND id <> ? "
                "AND input_id IN (SELECT id FROM inputs WHERE name = ?)",
                (latest["id"], latest["id"], name),
            )

    def result_for_input(self, input_id: int) -> ResultRow | None:
        row = self._one("SELECT * FROM results WHERE input_id = ?", (input_id,))
        return None if row is None else _result(row)

    def result(self, result_id: int) -> ResultRow | None:
        row = self._one("SELECT * FROM results WHERE id = ?", (result_id,))
        return None if row is None else _result(row)

    def checks_for_result(self, result_id: int) -> list[CheckRowData]:
        rows = self._conn.execute(
            "SELECT rule_id, metric, value, low, high, outcome, severity, hazard FROM checks "
            "WHERE result_id = ? ORDER BY position",
            (result_id,),
        )
        return [CheckRowData(*r) for r in rows]

    # ---- status ------------------------------------------------------------------------------

    def counts_since(self, since: datetime.datetime) -> dict[str, int]:
        """How many inputs reached a final state at or after ``since``, by verdict.

        Keys: pass, fail, hold, error (quarantined), duplicate.
        """
        counts = dict.fromkeys(("pass", "fail", "hold", "error", "duplicate"), 0)
        rows = self._conn.execute(
            "SELECT CASE WHEN i.state = 'duplicate' THEN 'duplicate' "
            "WHEN i.state = 'quarantined' THEN 'error' "
            "ELSE coalesce(r.verdict, 'error') END, count(*) "
            "FROM inputs i LEFT JOIN results r ON r.input_id = i.id "
            "WHERE i.final_at IS NOT NULL AND i.final_at >= ? GROUP BY 1",
            (_utc(since, "since"),),
        )
        for key, n in rows:
            counts[key] = n
        return counts

    def recent_results(self, limit: int = 10) -> list[ResultRow]:
        rows = self._conn.execute(
            "SELECT * FROM results ORDER BY analysed_at DESC, id DESC LIMIT ?", (limit,)
        )
        return [_result(r) for r in rows]

    def recent_errors(self, limit: int = 10) -> list[InputRow]:
        """Quarantined inputs and those with an error recorded, newest first."""
        rows = self._conn.execute(
            f"{_INPUT_SELECT} WHERE i.state = 'quarantined' OR (i.reason IS NOT NULL AND i.state "
            "IN ('claimed', 'judged')) ORDER BY coalesce(i.final_at, i.arrived_at) DESC, i.id DESC "
            "LIMIT ?",
            (limit,),
        )
        return [_input(r) for r in rows]
