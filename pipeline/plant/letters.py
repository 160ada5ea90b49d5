"""The plant's letters: a decision the plant makes is mailed by the plant command that made it.

Edge module over the plant database and pipeline.mail. A cell whose records are at several
stations is decided in the plant (cells.py, reviews.py), and no station mails that decision:
each station saw a part of the cell only. So the plant command that decides or reviews such a
cell (``formgate plant cell show``, ``lot show``, ``lot export``, ``yield``, ``review``) sends
its letters, with the ``[smtp]`` and ``[mail]`` settings of a station.toml the command is given
(the CLI reads them; here they arrive as :class:`PlantMail`). The letters are the station's
own (pipeline.mail): the same wording, the same cautions, the same rules for when a letter is
due, applied to the cell's latest plant decision:

- a fail, or a hold for a reason other than waiting for a stage: the decision's letter
  (``decision_letter``), to ``failures_to`` or ``holds_to``;
- a decision that replaces a fail or hold mailed earlier: a short update (``superseded_letter``);
- a person's review in the plant: the review's letter (``review_letter``).

Each letter goes out once: it is recorded in ``formgate.plant_letters`` (decision id and
kind) in the transaction that sent it, under a lock per letter, so a second command, or the
same one run again, finds it sent. A mail server that refuses or cannot be reached leaves
the letter due: the next plant command that decides the cell sends it. A crash between the
server's acceptance and the commit sends it again with the same Message-ID, which mail
readers show once.
"""

from __future__ import annotations

import datetime
import json
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from typing import Any

import psycopg

from pipeline.acceptance.rules import WAITING_FOR_STAGE
from pipeline.errors import FormgateError
from pipeline.mail.cell_letters import decision_letter, superseded_letter
from pipeline.mail.letters import Letter, build_message
from pipeline.mail.review_letters import ReviewFacts, review_letter
from pipeline.mail.smtp import SmtpSettings, send
from pipeline.plant.cells import Conn, rule_book
from pipeline.plant.tables import SCHEMA


@dataclass(frozen=True, slots=True)
class PlantMail:
    """How the plant's letters are sent, and to whom (a station.toml's [smtp] and [mail])."""

    smtp: SmtpSettings
    failures_to: tuple[str, ...]
    holds_to: tuple[str, ...]
    domain: str | None
    source: str  # the settings file, for messages


@dataclass(frozen=True, slots=True)
class DueDecision:
    """The latest plant decision of a cell, as its letters need it."""

    id: int
    lot: str
    cell_id: str
    verdict: str
    reason: str
    hazards: tuple[str, ...]
    stations: tuple[str, ...]
    basis: tuple[str, ...]
    rule_set_sha256: str
    decided_at: datetime.datetime
    review_id: int | None


@dataclass
class LetterReport:
    """What a command's letters came to: lines for the person who ran it."""

    sent: list[str] = field(default_factory=list)
    failed: list[str] = field(default_factory=list)
    due: list[str] = field(default_factory=list)  # due, but no mail settings were given
    refused_role: bool = False  # the role may not read or record the plant's decisions


def only_waiting(reason: str) -> bool:
    """Whether a hold's reason is only waiting for stages (no letter: nothing to act on yet).

    >>> only_waiting("waiting for stage grading; waiting for stage aging")
    True
    >>> only_waiting("waiting for stage aging; ocv_drop_mV too close to the limit")
    False
    """
    parts = [p for p in reason.split("; ") if p]
    return bool(parts) and all(p.startswith(WAITING_FOR_STAGE) for p in parts)


_LATEST = f"""
SELECT DISTINCT ON (lot, cell_id) id, lot, cell_id, verdict, reason, hazards, stations, basis,
       rule_set_sha256, decided_at, review_id
FROM {SCHEMA}.plant_decisions {{where}} ORDER BY lot, cell_id, id DESC
"""


def latest_decisions(conn: Conn, scope: Sequence[tuple[str, str | None]] | None) -> list[DueDecision]:
    """The latest plant decision of every cell in ``scope`` ((lot, cell or None for every cell of
    the lot); None: every lot)."""
    queries: list[tuple[str, tuple[str, ...]]]
    if scope is None:
        queries = [(_LATEST.format(where=""), ())]
    else:
        queries = [(_LATEST.format(where="WHERE lot = %s" + ("" if cell is None else " AND cell_id = %s")),
                    (lot,) if cell is None else (lot, cell)) for lot, cell in dict.fromkeys(scope)]
    out = []
    for sql, args in queries:
        for r in conn.execute(sql, args):  # our own text
            out.append(DueDecision(int(r[0]), r[1], r[2], r[3], r[4], tuple(r[5]), tuple(r[6]),
                                   tuple(r[7]), r[8], r[9], r[10]))
    return out


def _sent_kinds(conn: Conn, decision_id: int) -> set[str]:
    return {str(r[0]) for r in conn.execute(
        f"SELECT kind FROM {SCHEMA}.plant_letters WHERE decision_id = %s", (decision_id,))}


def _last_mailed(conn: Conn, d: DueDecision) -> tuple[str, str, datetime.datetime] | None:
    """(verdict, reason, decided at) of the cell's latest earlier decision a letter went out for."""
    row = conn.execute(
        f"SELECT p.verdict, p.reason, p.decided_at FROM {SCHEMA}.plant_letters l "
        f"JOIN {SCHEMA}.plant_decisions p ON p.id = l.decision_id "
        f"WHERE p.lot = %s AND p.cell_id = %s AND p.id < %s ORDER BY p.id DESC LIMIT 1",
        (d.lot, d.cell_id, d.id),
    ).fetchone()
    return None if row is None else (row[0], row[1], row[2])


def _records(basis: Iterable[str]) -> list[tuple[str, str, str]]:
    """(where, file name, SHA-256) of each file a plant decision rests on ("station:name:sha").

    >>> _records(["hall-a:c:1.csv:ab12", "review:3"])
    [('station hall-a', 'c:1.csv', 'ab12')]
    """
    out = []
    for entry in basis:
        if entry.startswith("review:"):
            continue
        station, _, rest = entry.partition(":")
        name, _, sha = rest.rpartition(":")
        out.append((f"station {station}", name, sha))
    return out


def _where(d: DueDecision) -> str:
    return f"plant database (stations {', '.join(d.stations)})"


def _key(d: DueDecision) -> str:
    return (f"plant\n{d.lot}\n{d.cell_id}\n{d.id}\n"
            f"{d.decided_at.astimezone(datetime.UTC).isoformat()}")


def _family(conn: Conn, sha256: str) -> str | None:
    try:
        return rule_book(conn, sha256).rule_sets[0].family
    except FormgateError:
        return None


def _to(mail: PlantMail, verdicts: Iterable[str]) -> tuple[str, ...]:
    to: list[str] = []
    if "fail" in verdicts:
        to += mail.failures_to
    if "hold" in verdicts:
        to += mail.holds_to
    return tuple(dict.fromkeys(to))


def _review_letter(conn: Conn, d: DueDecision, mail: PlantMail, family: str | None) -> Letter | None:
    row = conn.execute(
        f"SELECT v.action, v.reviewer, v.reason, v.reviewed_at, v.stage, v.accepts, "
        f"a.verdict, a.reason, a.decided_at FROM {SCHEMA}.plant_reviews v "
        f"JOIN {SCHEMA}.plant_decisions a ON a.id = v.answers WHERE v.id = %s",
        (d.review_id,),
    ).fetchone()
    if row is None:
        return None
    to = _to(mail, (row[6], d.verdict))
    if not to:
        return None
    facts = ReviewFacts(
        cell_id=d.cell_id, lot=d.lot, action=row[0], reviewer=row[1], reason=row[2],
        reviewed_at=row[3], was=(row[6], row[7], row[8]), now=(d.verdict, d.reason),
        review_id=int(d.review_id or 0), stage=row[4], accepts=tuple(row[5]), hazards=d.hazards,
        family=family, kept_in="the plant database",
    )
    return review_letter(facts, to, station=_where(d), domain=mail.domain)


def letters_for(conn: Conn, d: DueDecision, mail: PlantMail) -> list[tuple[str, Letter]]:
    """The letters (kind, letter) the decision ``d`` calls for that have not gone out yet."""
    sent = _sent_kinds(conn, d.id)
    family = _family(conn, d.rule_set_sha256)
    out: list[tuple[str, Letter]] = []
    if d.review_id is not None:
        if "review" not in sent and (letter := _review_letter(conn, d, mail, family)) is not None:
            out.append(("review", letter))
        return out
    records = _records(d.basis)
    cause = (f"its stages ran at stations {' and '.join(d.stations)}, and the plant database "
             "decided it over all of their records")
    if "decision" not in sent and (d.verdict == "fail" or (d.verdict == "hold" and not only_waiting(
            d.reason))):
        to = _to(mail, (d.verdict,))
        if to:
            out.append(("decision", decision_letter(
                cell_id=d.cell_id, lot=d.lot, verdict=d.verdict,
                reasons=[r for r in d.reason.split("; ") if r], hazards=d.hazards, cause=cause,
                records=records, family=family, recipients=to, station=_where(d), key=_key(d),
                decided_at=d.decided_at, domain=mail.domain,
            )))
    before = _last_mailed(conn, d)
    if "update" not in sent and before is not None and before[0] in ("fail", "hold") and (
            before[:2] != (d.verdict, d.reason)):
        to = _to(mail, (before[0],))
        if to:
            out.append(("update", superseded_letter(
                cell_id=d.cell_id, lot=d.lot, was=before, now=(d.verdict, d.reason), cause=cause,
                records=records, family=family, recipients=to, station=_where(d), key=_key(d),
                domain=mail.domain,
            )))
    return out


def _needs_letter(conn: Conn, d: DueDecision) -> bool:
    """Whether ``d`` calls for a letter not sent yet, whatever the recipients (for the count
    of letters due when no mail settings were given)."""
    sent = _sent_kinds(conn, d.id)
    if d.review_id is not None:
        return "review" not in sent
    if d.verdict == "fail" or (d.verdict == "hold" and not only_waiting(d.reason)):
        return "decision" not in sent
    before = _last_mailed(conn, d)
    return (before is not None and before[0] in ("fail", "hold")
            and before[:2] != (d.verdict, d.reason) and "update" not in sent)


def _send_one(conn: Conn, d: DueDecision, kind: str, letter: Letter, mail: PlantMail, *,
              sent_by: str, now: datetime.datetime) -> tuple[bool, str]:
    """Send one letter unless it went out already, and record it in the same transaction;
    (sent now, the server's reply or what went wrong)."""

    class NotSent(Exception):
        pass

    try:
        with conn.transaction():
            # one sender per letter: a second command waits here, then finds it sent
            conn.execute("SELECT pg_advisory_xact_lock(hashtext(%s))", (f"letter\n{d.id}\n{kind}",))
            if kind in _sent_kinds(conn, d.id):
                return False, "sent already"
            result = send(build_message(letter, sender=mail.smtp.sender, date=now), mail.smtp)
            if result.outcome != "sent":
                raise NotSent(result.reply)
            conn.execute(
                f"INSERT INTO {SCHEMA}.plant_letters (decision_id, kind, message_id, recipients, "
                "subject, reply, sent_by, sent_at) VALUES (%s, %s, %s, %s::jsonb, %s, %s, %s, %s)",
                (d.id, kind, letter.message_id, json.dumps(list(letter.recipients)), letter.subject,
                 result.reply + (f"; refused: {', '.join(result.refused)}" if result.refused else ""),
                 sent_by, now),
            )
            return True, result.reply
    except NotSent as exc:
        return False, str(exc)


_WORD = {"decision": "decision", "update": "update", "review": "review"}


def send_letters(
    conn: Conn,
    scope: Sequence[tuple[str, str | None]] | None,
    mail: PlantMail | None,
    *,
    sent_by: str,
    now: datetime.datetime,
) -> LetterReport:
    """Send the letters the latest plant decisions of the cells in ``scope`` call for (see
    :func:`latest_decisions`); without ``mail``, count them as due. Never raises for a mail
    server's behaviour or for a role that may not read the plant's decisions."""
    report = LetterReport()
    try:
        decisions = latest_decisions(conn, scope)
        for d in decisions:
            what = f"cell {d.cell_id} of lot {d.lot} ({d.verdict})"
            if mail is None:
                if _needs_letter(conn, d):
                    report.due.append(what)
                continue
            for kind, letter in letters_for(conn, d, mail):
                done, reply = _send_one(conn, d, kind, letter, mail, sent_by=sent_by, now=now)
                if done:
                    report.sent.append(f"{_WORD[kind]} letter for {what} to "
                                       f"{', '.join(letter.recipients)}")
                elif reply != "sent already":
                    report.failed.append(f"{_WORD[kind]} letter for {what}: {reply}")
    except psycopg.errors.InsufficientPrivilege:
        report.refused_role = True
    return report


def report_lines(report: LetterReport, mail: PlantMail | None) -> list[str]:
    """What to tell the person who ran the command about its letters (nothing when none)."""
    out = [f"letter sent: {line}" for line in report.sent]
    out += [f"letter NOT sent: {line}; the next plant command that decides the cell tries again"
            for line in report.failed]
    if report.due:
        out.append(
            f"{len(report.due)} letter(s) due, not sent: no mail settings were given "
            f"({'; '.join(report.due[:5])}{'; …' if len(report.due) > 5 else ''}). Give --letters "
            "FOLDER, a folder whose station.toml's [smtp] and [mail] send the plant's letters "
            "(docs/plant.md)."
        )
    if report.refused_role and mail is not None:
        out.append("no letters: this role may not read or record the plant's decisions (a "
                   "station's own role); run the command as a person's role (docs/plant.md)")
    return out


def mail_settings(smtp: SmtpSettings, routing: Any, source: str) -> PlantMail:
    """A PlantMail from a station's SmtpSettings and [mail] routing (MailRouting)."""
    return PlantMail(smtp, tuple(routing.failures_to), tuple(routing.holds_to), routing.domain,
                     source)
