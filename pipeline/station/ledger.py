"""The station's SQLite ledger: every input, result, check row and mail, and where each stands.

Edge module: it owns one SQLite connection and nothing else (no files moved, no
mail sent, no clock read; every time is an argument, timezone-aware, stored as UTC).
Every write is one explicit ``BEGIN IMMEDIATE`` ... ``COMMIT``, so the station can
be killed at any point and, on restart, find each input at a single state boundary:

    claimed -> judged -> published -> archived
    claimed -> quarantined            (also judged -> quarantined when publishing fails)
    claimed -> duplicate              (final once it has a final_path)

The schema and its migrations live in ``pipeline.station.migrations``.

>>> import datetime, pathlib, tempfile
>>> t = datetime.datetime(2026, 1, 5, 8, 0, tzinfo=datetime.UTC)
>>> with Ledger(pathlib.Path(tempfile.mkdtemp()) / "ledger.sqlite") as ledger:
...     row, earlier = ledger.claim_input(sha256="ab" * 32, name="c1.csv", size=10,
...                                       arrived_at=t, work_path="work/c1.csv")
...     (row.state, row.version, earlier)
('claimed', 1, None)
"""

from __future__ import annotations

import contextlib
import datetime
import json
import pathlib
import re
import sqlite3
import time
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from typing import Any

from pipeline.mail.letters import Letter
from pipeline.model import CheckResult, SourceRef
from pipeline.station.migrations import MIGRATIONS, SCHEMA_VERSION, LedgerError, migrate

__all__ = [
    "SCHEMA_VERSION",
    "CheckRowData",
    "InputRow",
    "Ledger",
    "LedgerError",
    "MailRow",
    "OutgoingMail",
    "ResultRow",
    "SetAsideRow",
]

INPUT_STATES = ("claimed", "judged", "published", "archived", "quarantined", "duplicate")
FINAL_STATES = ("archived", "quarantined", "duplicate")
# A writer waits this long for another process's write lock before giving up.
BUSY_TIMEOUT_MS = 30_000
_SHA256 = re.compile(r"[0-9a-f]{64}")
_PUBLISHED = "('published', 'archived')"


def _utc(value: datetime.datetime, what: str) -> str:
    """Fixed-width ISO 8601 text in UTC, so that text order in SQL is time order."""
    if value.tzinfo is None or value.utcoffset() is None:
        raise ValueError(f"{what} must be a timezone-aware datetime, got {value!r}")
    return value.astimezone(datetime.UTC).isoformat(timespec="microseconds")


def _time(text: str) -> datetime.datetime:
    return datetime.datetime.fromisoformat(text)


def _maybe_time(text: str | None) -> datetime.datetime | None:
    return None if text is None else _time(text)


@dataclass(frozen=True, slots=True)
class InputRow:
    """One file the station claimed. ``supersedes`` / ``duplicate_of`` are input ids."""

    id: int
    sha256: str
    name: str
    size: int
    arrived_at: datetime.datetime
    state: str
    final_path: str | None
    reason: str | None
    version: int
    supersedes: int | None
    result_id: int | None
    duplicate_of: int | None = None
    work_path: str = ""
    final_at: datetime.datetime | None = None


@dataclass(frozen=True, slots=True)
class SetAsideRow:
    """An inbox entry that is not an input: quarantined at ``final_path``, or left in place."""

    id: int
    inbox: str
    name: str
    kind: str
    reason: str
    noticed_at: datetime.datetime
    state: str
    final_path: str | None


@dataclass(frozen=True, slots=True)
class CheckRowData:
    """One row of a result's check table, as stored (strings are the JSON document's values)."""

    rule_id: str
    metric: str
    value: float | None
    low: float | None
    high: float | None
    outcome: str
    severity: str
    hazard: str | None = None

    @classmethod
    def from_check(cls, check: CheckResult) -> CheckRowData:
        hazard = check.hazard.value if check.hazard else None
        return cls(
            check.rule_id,
            check.metric,
            check.value,
            check.window.low,
            check.window.high,
            check.outcome.value,
            check.severity.value,
            hazard,
        )


@dataclass(frozen=True, slots=True)
class ResultRow:
    """A recorded judgement. ``superseded_by`` is the result of a later version of the same file."""

    id: int
    input_id: int
    cell_id: str
    lot: str
    verdict: str
    hazards: tuple[str, ...]
    result_json: str
    rule_set_name: str
    rule_set_revision: str
    rule_set_sha256: str
    analysed_at: datetime.datetime
    json_path: str
    pdf_path: str | None
    superseded_by: int | None
    digest_mail_id: int | None


# What the caller asks to queue is a composed letter (kind, Message-ID, recipients, subject,
# body, attachment, lot); its ``message_id`` must be unique for all time.
OutgoingMail = Letter


@dataclass(frozen=True, slots=True)
class MailRow:
    """A queued message and its delivery state; ``reply`` is the server's last answer."""

    id: int
    kind: str
    message_id: str
    recipients: tuple[str, ...]
    subject: str
    body_text: str
    attachment_path: str | None
    cell_result_id: int | None
    lot: str | None
    state: str
    attempts: int
    next_attempt_at: datetime.datetime
    last_error: str | None
    created_at: datetime.datetime
    sent_at: datetime.datetime | None
    reply: str | None = None


def _input(row: sqlite3.Row) -> InputRow:
    return InputRow(
        row["id"],
        row["sha256"],
        row["name"],
        row["size"],
        _time(row["arrived_at"]),
        row["state"],
        row["final_path"],
        row["reason"],
        row["version"],
        row["supersedes"],
        row["result_id"],
        row["duplicate_of"],
        row["work_path"],
        _maybe_time(row["final_at"]),
    )


def _result(row: sqlite3.Row) -> ResultRow:
    return ResultRow(
        row["id"],
        row["input_id"],
        row["cell_id"],
        row["lot"],
        row["verdict"],
        tuple(json.loads(row["hazards"])),
        row["result_json"],
        row["rule_set_name"],
        row["rule_set_revision"],
        row["rule_set_sha256"],
        _time(row["analysed_at"]),
        row["json_path"],
        row["pdf_path"],
        row["superseded_by"],
        row["digest_mail_id"],
    )


def _mail(row: sqlite3.Row) -> MailRow:
    return MailRow(
        row["id"],
        row["kind"],
        row["message_id"],
        tuple(json.loads(row["recipients"])),
        row["subject"],
        row["body_text"],
        row["attachment_path"],
        row["cell_result_id"],
        row["lot"],
        row["state"],
        row["attempts"],
        _time(row["next_attempt_at"]),
        row["last_error"],
        _time(row["created_at"]),
        _maybe_time(row["sent_at"]),
        row["reply"],
    )


_INPUT_SELECT = (
    "SELECT i.*, r.id AS result_id FROM inputs i LEFT JOIN results r ON r.input_id = i.id"
)


def _set_wal(conn: sqlite3.Connection) -> str:
    """Switch ``conn`` to write-ahead logging and return the journal mode now in force.

    Two processes that open a new ledger at once race to change its journal mode, and
    SQLite answers the loser at once with "database is locked" without waiting through
    the busy timeout (the change needs an exclusive lock that its busy handler does not
    wait for). So the switch is tried again for up to the busy timeout.
    """
    deadline = time.monotonic() + BUSY_TIMEOUT_MS / 1000
    pause_s = 0.005
    while True:
        try:
            return str(conn.execute("PRAGMA journal_mode = WAL").fetchone()[0])
        except sqlite3.OperationalError as exc:
            if getattr(exc, "sqlite_errorname", "") not in ("SQLITE_BUSY", "SQLITE_LOCKED"):
                raise
            if time.monotonic() >= deadline:
                raise
            time.sleep(pause_s)
            pause_s = min(2 * pause_s, 0.2)


class Ledger:
    """One connection to ``ledger.sqlite``; open one per process, write from one thread.

    Durability: WAL with ``synchronous=FULL`` fsyncs the log at every commit. With
    ``NORMAL`` a power cut may undo the last commits while the file moves the station
    made after them (to archive/) survive, and ledger and folders would disagree.
    """

    def __init__(self, path: pathlib.Path, *, now: datetime.datetime | None = None) -> None:
        """Open or create the ledger and apply pending migrations.

        ``now`` is recorded as each migration's ``applied_at``; it is the one time the
        ledger may take from the system clock itself, when the caller gives none.
        """
        self.path = pathlib.Path(path)
        self._where = SourceRef(str(self.path))
        applied_at = _utc(now or datetime.datetime.now(datetime.UTC), "now")
        try:
            conn = sqlite3.connect(self.path, isolation_level=None, timeout=BUSY_TIMEOUT_MS / 1000)
        except sqlite3.Error as exc:
            raise self._open_error(exc) from exc
        self._conn = conn
        try:
            conn.row_factory = sqlite3.Row
            conn.execute(f"PRAGMA busy_timeout = {BUSY_TIMEOUT_MS}")
            mode = _set_wal(conn)
            if mode != "wal":
                raise LedgerError(
                    f"the ledger cannot use write-ahead logging here (journal mode stays {mode!r})",
                    self._where,
                    "Keep the ledger on a local disk, not on a network share.",
                )
            conn.execute("PRAGMA synchronous = FULL")
            conn.execute("PRAGMA foreign_keys = ON")
            migrate(conn, MIGRATIONS, applied_at=applied_at, where=self._where)
        except sqlite3.Error as exc:
            conn.close()
            raise self._open_error(exc) from exc
        except BaseException:
            conn.close()
            raise

    def _open_error(self, exc: sqlite3.Error) -> LedgerError:
        code = getattr(exc, "sqlite_errorname", "")
        if code in ("SQLITE_NOTADB", "SQLITE_CORRUPT"):
            return LedgerError(
                f"the ledger is damaged or not an SQLite database ({exc})",
                self._where,
                "Move the file aside and restore the latest backup; formgate starts "
                "a new empty ledger if none is there.",
            )
        if code in ("SQLITE_BUSY", "SQLITE_LOCKED"):
            return LedgerError(
                f"another process kept the ledger locked for {BUSY_TIMEOUT_MS // 1000} s",
                self._where,
                "Check that only one station runs on this folder.",
            )
        return LedgerError(
            f"cannot open the ledger ({exc})",
            self._where,
            "Check that the folder exists and is writable.",
        )

    def close(self) -> None:
        with contextlib.suppress(sqlite3.Error):
            self._conn.execute("PRAGMA optimize")
        self._conn.close()

    def __enter__(self) -> Ledger:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    @contextlib.contextmanager
    def _write(self) -> Iterator[sqlite3.Connection]:
        """One explicit write transaction: all of it commits, or none of it."""
        conn = self._conn
        conn.execute("BEGIN IMMEDIATE")
        try:
            yield conn
            conn.execute("COMMIT")
        except BaseException:
            if conn.in_transaction:
                conn.execute("ROLLBACK")
            raise

    def _one(self, sql: str, params: Sequence[Any] = ()) -> sqlite3.Row | None:
        row: sqlite3.Row | None = self._conn.execute(sql, params).fetchone()
        return row

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

    # ---- outbox ------------------------------------------------------------------------------

    def _insert_mail(
        self, mail: OutgoingMail, *, created_at: str, result_id: int | None, lot: str | None
    ) -> int:
        """Insert unless the message id is queued already; the row's id either way."""
        self._conn.execute(
            "INSERT INTO outbox (kind, message_id, recipients, subject, body_text, "
            "attachment_path, cell_result_id, lot, state, next_attempt_at, created_at) "
            "VALUES (?, ?, ?, ?, ?, ?, ?, ?, 'pending', ?, ?) ON CONFLICT (message_id) DO NOTHING",
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
            ),
        )
        row = self._one("SELECT id FROM outbox WHERE message_id = ?", (mail.message_id,))
        assert row is not None
        return int(row["id"])

    def queue_mail(self, mail: OutgoingMail, *, now: datetime.datetime) -> int:
        """Queue a message due at ``now``; queuing the same message id again returns its id."""
        at = _utc(now, "now")
        with self._write():
            return self._insert_mail(mail, created_at=at, result_id=None, lot=mail.lot)

    def mail(self, mail_id: int) -> MailRow | None:
        row = self._one("SELECT * FROM outbox WHERE id = ?", (mail_id,))
        return None if row is None else _mail(row)

    def due_mail(self, now: datetime.datetime, limit: int = 50) -> list[MailRow]:
        """Pending mail whose time has come, oldest first.

        A failure/hold mail waits until its cell is published (its PDF exists); a
        digest waits until the cells it covers are recorded against it.
        """
        rows = self._conn.execute(
            "SELECT o.* FROM outbox o LEFT JOIN results r ON r.id = o.cell_result_id "
            "LEFT JOIN inputs i ON i.id = r.input_id "
            "WHERE o.state = 'pending' AND o.next_attempt_at <= ? "
            "AND (o.kind NOT IN ('failure', 'hold') OR o.cell_result_id IS NULL "
            f"     OR i.state IN {_PUBLISHED}) "
            "AND (o.kind <> 'digest' "
            "     OR EXISTS (SELECT 1 FROM results d WHERE d.digest_mail_id = o.id)) "
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
            row = self.result(result_id)
            if row is None or row.lot != lot or row.verdict != "pass":
                raise ValueError(f"result {result_id} is not a passed cell of lot {lot!r}")
            if row.digest_mail_id not in (None, mail_id):
                raise ValueError(
                    f"result {result_id} is already in digest mail {row.digest_mail_id}"
                )
            self._conn.execute(
                "UPDATE results SET digest_mail_id = ? WHERE id = ?", (mail_id, result_id)
            )

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

    def outbox_counts(self) -> dict[str, int]:
        counts = dict.fromkeys(("pending", "sent", "parked"), 0)
        for state, n in self._conn.execute("SELECT state, count(*) FROM outbox GROUP BY state"):
            counts[state] = n
        return counts

    def recent_errors(self, limit: int = 10) -> list[InputRow]:
        """Quarantined inputs and those with an error recorded, newest first."""
        rows = self._conn.execute(
            f"{_INPUT_SELECT} WHERE i.state = 'quarantined' OR (i.reason IS NOT NULL AND i.state "
            "IN ('claimed', 'judged')) ORDER BY coalesce(i.final_at, i.arrived_at) DESC, i.id DESC "
            "LIMIT ?",
            (limit,),
        )
        return [_input(r) for r in rows]

    # ---- inbox entries set aside -------------------------------------------------------------

    def set_aside(
        self,
        *,
        inbox: str,
        name: str,
        kind: str,
        reason: str,
        now: datetime.datetime,
        final_path: str | None = None,
        mails: Sequence[OutgoingMail] = (),
    ) -> int:
        """Record an entry that is not an input, and queue its alerts, in one transaction.

        With ``final_path`` it was moved to quarantine; without, it was left in place (and
        recording the same entry left in place for the same reason again adds nothing).
        """
        at = _utc(now, "now")
        state = "left_in_place" if final_path is None else "quarantined"
        with self._write() as conn:
            same = self._one(
                "SELECT id FROM set_aside WHERE state = 'left_in_place' AND ? IS NULL "
                "AND inbox = ? AND name = ? AND reason = ?",
                (final_path, inbox, name, reason),
            )
            if same is not None:
                return int(same["id"])
            cur = conn.execute(
                "INSERT INTO set_aside (inbox, name, kind, reason, noticed_at, state, final_path) "
                "VALUES (?, ?, ?, ?, ?, ?, ?)",
                (inbox, name, kind, reason, at, state, final_path),
            )
            for mail in mails:
                self._insert_mail(mail, created_at=at, result_id=None, lot=mail.lot)
            assert cur.lastrowid is not None
            return cur.lastrowid

    def set_aside_rows(self, limit: int = 10, *, state: str | None = None) -> list[SetAsideRow]:
        """Entries set aside, newest first; ``state`` 'quarantined' or 'left_in_place' filters."""
        rows = self._conn.execute(
            "SELECT * FROM set_aside WHERE ? IS NULL OR state = ? ORDER BY noticed_at DESC, id DESC "
            "LIMIT ?",
            (state, state, limit),
        )
        return [
            SetAsideRow(
                r["id"], r["inbox"], r["name"], r["kind"], r["reason"], _time(r["noticed_at"]),
                r["state"], r["final_path"],
            )
            for r in rows
        ]

    def note_state(self, key: str, value: str, *, now: datetime.datetime) -> None:
        """Set a named value of the running station (e.g. 'paused'); a real write every time."""
        with self._write() as conn:
            conn.execute(
                "INSERT INTO station_state (key, value, updated_at) VALUES (?, ?, ?) "
                "ON CONFLICT (key) DO UPDATE SET value = excluded.value, "
                "updated_at = excluded.updated_at",
                (key, value, _utc(now, "now")),
            )

    def state(self, key: str) -> tuple[str, datetime.datetime] | None:
        """(value, when it was set) of a named value, or None."""
        row = self._one("SELECT value, updated_at FROM station_state WHERE key = ?", (key,))
        return None if row is None else (row["value"], _time(row["updated_at"]))

    # ---- texts of the rules results were judged with ------------------------------------------

    def remember_rule_book(self, sha256s: Sequence[str], *, now: datetime.datetime) -> None:
        """Note the rule sets in force after a good load (nothing new if the same as the last)."""
        listed = json.dumps(sorted(sha256s))
        with self._write() as conn:
            last = self._one("SELECT rule_sets FROM rule_books ORDER BY id DESC LIMIT 1")
            if last is None or last["rule_sets"] != listed:
                conn.execute(
                    "INSERT INTO rule_books (rule_sets, loaded_at) VALUES (?, ?)",
                    (listed, _utc(now, "now")),
                )

    def last_rule_book(self) -> list[tuple[str, str]]:
        """(name, text) of each rule set of the last good load; empty if there was none."""
        last = self._one("SELECT rule_sets FROM rule_books ORDER BY id DESC LIMIT 1")
        if last is None:
            return []
        texts = [self.text_by_sha(sha) for sha in json.loads(last["rule_sets"])]
        return [t for t in texts if t is not None]


    def remember_text(
        self, *, kind: str, sha256: str, name: str, text: str, now: datetime.datetime
    ) -> None:
        """Keep a rule set's (or profile's) exact text under its SHA-256; again is a no-op."""
        with self._write() as conn:
            conn.execute(
                "INSERT OR IGNORE INTO rule_texts (sha256, kind, name, text, first_used_at) "
                "VALUES (?, ?, ?, ?, ?)",
                (sha256, kind, name, text, _utc(now, "now")),
            )

    def text_by_sha(self, sha256: str) -> tuple[str, str] | None:
        """(name, text) of a remembered rule set or profile, or None."""
        row = self._one("SELECT name, text FROM rule_texts WHERE sha256 = ?", (sha256,))
        return None if row is None else (row["name"], row["text"])

    def digest_count(self, lot: str) -> int:
        """How many digest mails were ever queued for ``lot`` (numbers the next one)."""
        row = self._one("SELECT count(*) AS n FROM outbox WHERE kind = 'digest' AND lot = ?", (lot,))
        return 0 if row is None else int(row["n"])

    def latest_activity(self, lot: str) -> datetime.datetime | None:
        """When the latest cell of ``lot`` was judged (for the digest's quiet time)."""
        row = self._one("SELECT max(analysed_at) AS t FROM results WHERE lot = ?", (lot,))
        return None if row is None or row["t"] is None else _time(row["t"])

    def integrity_ok(self) -> bool:
        """``PRAGMA integrity_check`` says 'ok' and no foreign key points nowhere."""
        rows = self._conn.execute("PRAGMA integrity_check").fetchall()
        if [tuple(r) for r in rows] != [("ok",)]:
            return False
        return not self._conn.execute("PRAGMA foreign_key_check").fetchall()
