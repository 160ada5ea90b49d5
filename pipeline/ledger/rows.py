"""The ledger's row records and their converters: what a row of each table reads as in Python.

Records (InputRow, SetAsideRow, CheckRowData, ResultRow, MailRow, DecisionRow, LotRow,
StoredReading), the converters from ``sqlite3.Row`` to them, the UTC time helpers every
stored time passes through, what a mail to queue must offer (OutgoingMail), and the few
SQL fragments more than one table family shares. Opening the database is connection.py's;
every query is its table family's module's.
"""

from __future__ import annotations

import datetime
import json
import re
import sqlite3
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Protocol

from pipeline.acceptance.results import CheckResult
from pipeline.read.readings import Reading

INPUT_STATES = ("claimed", "judged", "published", "archived", "quarantined", "duplicate")
FINAL_STATES = ("archived", "quarantined", "duplicate")
SHA256_HEX = re.compile(r"[0-9a-f]{64}")
PUBLISHED = "('published', 'archived')"


def utc_text(value: datetime.datetime, what: str) -> str:
    """Fixed-width ISO 8601 text in UTC, so that text order in SQL is time order."""
    if value.tzinfo is None or value.utcoffset() is None:
        raise ValueError(f"{what} must be a timezone-aware datetime, got {value!r}")
    return value.astimezone(datetime.UTC).isoformat(timespec="microseconds")


def parse_time(text: str) -> datetime.datetime:
    return datetime.datetime.fromisoformat(text)


def maybe_time(text: str | None) -> datetime.datetime | None:
    return None if text is None else parse_time(text)


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
    """A recorded judgement. ``superseded_by``: the result that came after it, of a later version
    of the same file, a retest of the same cell and stages, or a regrade of the same input."""

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
    regrade_id: int | None = None  # a regrade's judgement of the input, not the station's own


class OutgoingMail(Protocol):
    """A composed letter to queue (the mail part's ``Letter`` is one); ``message_id`` must be
    unique for all time. The ledger stores letters; it never composes or sends them."""

    @property
    def kind(self) -> str: ...
    @property
    def message_id(self) -> str: ...
    @property
    def recipients(self) -> Sequence[str]: ...
    @property
    def subject(self) -> str: ...
    @property
    def body_text(self) -> str: ...
    @property
    def attachment_path(self) -> str | None: ...
    @property
    def lot(self) -> str | None: ...
    @property
    def waits_for(self) -> str | None: ...


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
    claimed_by: str | None = None  # the sender that holds the mail now (outbox.claim)
    claimed_until: datetime.datetime | None = None  # its lease: after this, it may be taken over
    waits_for: str | None = None  # a file the body links: due once it is published (outbox.due)


@dataclass(frozen=True, slots=True)
class DecisionRow:
    """One decision on a whole cell. ``basis``: the ledger ids (result or input) it rests on."""

    id: int
    cell_id: str
    lot: str
    verdict: str
    reason: str
    hazards: tuple[str, ...]
    grade: str | None
    cause: str
    basis: tuple[str, ...]
    decided_at: datetime.datetime
    supersedes: int | None
    review_id: int | None = None  # the review it rests on (cause 'review')


@dataclass(frozen=True, slots=True)
class ReviewRow:
    """A person's review of a held or failed cell: release, reject, or retest of one stage.

    ``accepts``: for a release of a failed cell, the failed checks (rule ids) it accepts as a
    concession; ``decision_id``: the decision it answered.
    """

    id: int
    cell_id: str
    lot: str
    action: str  # 'release', 'reject' or 'retest'
    stage: str | None  # the stage to test again (retest only)
    accepts: tuple[str, ...]
    reviewer: str
    reason: str
    reviewed_at: datetime.datetime
    decision_id: int


@dataclass(frozen=True, slots=True)
class PublishedRow:
    """A file the station published, with its SHA-256 as written, and what it shows."""

    id: int
    path: str
    sha256: str
    kind: str  # 'result', 'certificate', 'cell result', 'cell certificate', 'lot report', ...
    lot: str | None
    cell_id: str | None
    result_id: int | None
    decision_id: int | None
    published_at: datetime.datetime


@dataclass(frozen=True, slots=True)
class LotRow:
    """A lot as the ledger knows it: its cells' latest decisions counted, and its close."""

    lot: str
    cells: int
    counts: dict[str, int]
    last_activity: datetime.datetime | None
    closed_at: datetime.datetime | None
    closed_by: str | None
    report_path: str | None
    export_path: str | None


@dataclass(frozen=True, slots=True)
class StoredReading:
    """A reading as kept: the reading, and the input file (name, SHA-256) that brought it."""

    input_id: int
    file_name: str
    file_sha256: str
    reading: Reading


def input_row(row: sqlite3.Row) -> InputRow:
    return InputRow(
        row["id"],
        row["sha256"],
        row["name"],
        row["size"],
        parse_time(row["arrived_at"]),
        row["state"],
        row["final_path"],
        row["reason"],
        row["version"],
        row["supersedes"],
        row["result_id"],
        row["duplicate_of"],
        row["work_path"],
        maybe_time(row["final_at"]),
    )


def result_row(row: sqlite3.Row) -> ResultRow:
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
        parse_time(row["analysed_at"]),
        row["json_path"],
        row["pdf_path"],
        row["superseded_by"],
        row["digest_mail_id"],
        row["regrade_id"],
    )


def mail_row(row: sqlite3.Row) -> MailRow:
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
        parse_time(row["next_attempt_at"]),
        row["last_error"],
        parse_time(row["created_at"]),
        maybe_time(row["sent_at"]),
        row["reply"],
        row["claimed_by"],
        maybe_time(row["claimed_until"]),
        row["waits_for"],
    )


INPUT_SELECT = (
    "SELECT i.*, r.id AS result_id FROM inputs i "
    "LEFT JOIN results r ON r.input_id = i.id AND r.regrade_id IS NULL"
)


def decision_row(r: sqlite3.Row) -> DecisionRow:
    return DecisionRow(
        r["id"],
        r["cell_id"],
        r["lot"],
        r["verdict"],
        r["reason"],
        tuple(json.loads(r["hazards"])),
        r["grade"],
        r["cause"],
        tuple(str(b) for b in json.loads(r["basis"])),
        parse_time(r["decided_at"]),
        r["supersedes"],
        r["review_id"],
    )


def review_row(r: sqlite3.Row) -> ReviewRow:
    return ReviewRow(
        r["id"], r["cell_id"], r["lot"], r["action"], r["stage"],
        tuple(str(a) for a in json.loads(r["accepts"])), r["reviewer"], r["reason"],
        parse_time(r["reviewed_at"]), r["decision_id"],
    )


def published_row(r: sqlite3.Row) -> PublishedRow:
    return PublishedRow(
        r["id"], r["path"], r["sha256"], r["kind"], r["lot"], r["cell_id"], r["result_id"],
        r["decision_id"], parse_time(r["published_at"]),
    )


def set_aside_row(r: sqlite3.Row) -> SetAsideRow:
    return SetAsideRow(
        r["id"], r["inbox"], r["name"], r["kind"], r["reason"], parse_time(r["noticed_at"]),
        r["state"], r["final_path"],
    )
