"""The ledger's row records and their converters: what a row of each table reads as in Python.

Records (InputRow, SetAsideRow, CheckRowData, ResultRow, MailRow), the converters from
``sqlite3.Row`` to them, the UTC time helpers every stored time passes through, and the
few SQL fragments more than one part of the ledger shares. Opening the database and
every query are left to the Ledger (pipeline.station.ledger and its parts).
"""

from __future__ import annotations

import datetime
import json
import re
import sqlite3
from dataclasses import dataclass

from pipeline.mail.letters import Letter
from pipeline.model import CheckResult

INPUT_STATES = ("claimed", "judged", "published", "archived", "quarantined", "duplicate")
FINAL_STATES = ("archived", "quarantined", "duplicate")
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
