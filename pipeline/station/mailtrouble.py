"""A mail outage as the ledger keeps it: failed and good deliveries noted, one alert, the status line.

A delivery that fails for a temporary reason (no connection, no answer in time, a 4xx
reply) starts a *mail trouble* or carries it on; the first delivery that succeeds ends
it. The trouble is a named station value in the ledger (``mail_trouble``), never an
object in memory: the station's mail thread and every `formgate mail retry` note it
through their own connections, and `formgate status` reads it from there. Once a
trouble has lasted ``outage_alert_s``, one alert is queued in the same transaction
that marks the trouble as alerted, so however many senders notice, one alert goes.

That alert waits in the outbox like any letter, so by mail it arrives only once the
server takes mail again; while the server is down, a copy is written at once as an
``.eml`` file into the station's mail folder, and its words say so. Sending is
mailer.py's job; the outbox and the station values are the ledger's.
"""

from __future__ import annotations

import datetime
import json
import logging
from dataclasses import dataclass
from pathlib import Path

from pipeline.ledger.ledger import Ledger
from pipeline.mail.letters import Letter, alert_letter, build_message
from pipeline.mail.smtp import eml_file_name, write_eml

log = logging.getLogger("formgate.mail")

MAIL_TROUBLE = "mail_trouble"  # the station value's key; "" while mail goes out


@dataclass(frozen=True, slots=True)
class MailTrouble:
    """Mail that cannot be delivered: since when, the last error and when it came, the alert."""

    since: datetime.datetime
    last_error: str
    last_at: datetime.datetime
    alerted_at: datetime.datetime | None = None

    def to_text(self) -> str:
        return json.dumps(
            {
                "since": self.since.isoformat(),
                "last_error": self.last_error,
                "last_at": self.last_at.isoformat(),
                "alerted_at": None if self.alerted_at is None else self.alerted_at.isoformat(),
            }
        )

    @classmethod
    def from_text(cls, text: str | None) -> MailTrouble | None:
        """The trouble a station value holds; None for none ("" or never set) or unreadable text.

        >>> t = datetime.datetime(2026, 3, 2, 8, 0, tzinfo=datetime.UTC)
        >>> MailTrouble.from_text(MailTrouble(t, "421 busy", t).to_text()).last_error
        '421 busy'
        >>> MailTrouble.from_text("") is None
        True
        """
        if not text:
            return None
        try:
            values = json.loads(text)
            alerted = values.get("alerted_at")
            return cls(
                datetime.datetime.fromisoformat(values["since"]),
                str(values["last_error"]),
                datetime.datetime.fromisoformat(values["last_at"]),
                None if alerted is None else datetime.datetime.fromisoformat(alerted),
            )
        except (ValueError, TypeError, KeyError, AttributeError):
            return None

    def shown(self) -> str:
        """The line `formgate status` shows.

        >>> t = datetime.datetime(2026, 3, 2, 8, 0, tzinfo=datetime.UTC)
        >>> MailTrouble(t, "421 busy", t).shown()
        'trouble: mail cannot be delivered: 421 busy since 2026-03-02T08:00:00+00:00'
        """
        since = self.since.isoformat(timespec="seconds")
        return f"trouble: mail cannot be delivered: {self.last_error} since {since}"


@dataclass(frozen=True, slots=True)
class OutageAlert:
    """Whom the outage alert goes to and when: after ``after_s`` of trouble.

    ``server`` names the mail server in the alert's words; ``sender`` and ``eml_folder``
    are for the copy written at once as an .eml file (None: no copy).
    """

    alerts_to: tuple[str, ...]
    station: str
    domain: str | None
    after_s: float
    server: str
    sender: str
    eml_folder: Path | None


def current(ledger: Ledger) -> MailTrouble | None:
    """The mail trouble in force, or None while mail goes out."""
    noted = ledger.facts.state(MAIL_TROUBLE)
    return None if noted is None else MailTrouble.from_text(noted[0])


def note_failure(ledger: Ledger, error: str, *, now: datetime.datetime) -> MailTrouble:
    """A delivery failed for a temporary reason: start the trouble, or carry it on (its start stays)."""
    noted: list[MailTrouble] = []

    def change(value: str | None) -> tuple[str, tuple[Letter, ...]]:
        was = MailTrouble.from_text(value)
        trouble = (
            MailTrouble(now, error, now)
            if was is None
            else MailTrouble(was.since, error, max(now, was.last_at), was.alerted_at)
        )
        noted.append(trouble)
        return trouble.to_text(), ()

    ledger.facts.change_state(MAIL_TROUBLE, change, now=now)
    return noted[-1]


def note_success(ledger: Ledger, *, now: datetime.datetime) -> MailTrouble | None:
    """A delivery succeeded: end the trouble; the trouble that ended, or None if there was none."""
    if current(ledger) is None:  # the usual case, read without taking the write lock
        return None
    ended: list[MailTrouble] = []

    def change(value: str | None) -> tuple[str, tuple[Letter, ...]] | None:
        was = MailTrouble.from_text(value)
        if was is None:
            return None  # another sender ended it a moment ago
        ended.append(was)
        return "", ()

    ledger.facts.change_state(MAIL_TROUBLE, change, now=now)
    return ended[0] if ended else None


def alert_if_due(ledger: Ledger, alert: OutageAlert, *, now: datetime.datetime) -> Letter | None:
    """Queue the outage alert once the trouble has lasted ``alert.after_s``; the letter if queued now.

    The trouble is marked as alerted in the transaction that queues the letter, so of
    several senders noticing at once, one queues it. Without ``alerts_to`` nothing is
    queued (the trouble line in `formgate status` stays). The copy in the mail folder
    is written after the letter is queued; a copy that cannot be written is logged.
    """
    trouble = current(ledger)
    if (
        trouble is None
        or trouble.alerted_at is not None
        or not alert.alerts_to
        or (now - trouble.since).total_seconds() < alert.after_s
    ):
        return None
    queued: list[Letter] = []

    def change(value: str | None) -> tuple[str, tuple[Letter, ...]] | None:
        was = MailTrouble.from_text(value)
        if was is None or was.alerted_at is not None:
            return None  # ended, or alerted by another sender a moment ago
        letter = outage_letter(was, alert, now=now)
        queued.append(letter)
        marked = MailTrouble(was.since, was.last_error, was.last_at, now)
        return marked.to_text(), (letter,)

    if not ledger.facts.change_state(MAIL_TROUBLE, change, now=now):
        return None
    letter = queued[0]
    log.error("mail cannot be delivered since %s; alert queued: %s", trouble.since, letter.subject)
    if alert.eml_folder is not None:
        try:
            path, _ = write_eml(
                build_message(letter, sender=alert.sender, date=now), alert.eml_folder
            )
        except (OSError, ValueError) as exc:
            log.warning("the outage alert's copy could not be written to %s: %s",
                        alert.eml_folder, exc)
        else:
            log.info("the outage alert's copy is in %s", path)
    return letter


def _duration(seconds: float) -> str:
    """
    >>> _duration(900), _duration(45), _duration(5400)
    ('15 min', '45 s', '1.5 h')
    """
    if seconds >= 3600:
        return f"{seconds / 3600:.3g} h"
    if seconds >= 60:
        return f"{seconds / 60:.3g} min"
    return f"{seconds:.3g} s"


def outage_letter(trouble: MailTrouble, alert: OutageAlert, *, now: datetime.datetime) -> Letter:
    """The one alert of a mail outage; its key is the outage's start, so one Message-ID per outage."""
    since = trouble.since.isoformat(timespec="seconds")
    subject = f"mail cannot be delivered since {since}"
    key = f"mail-outage:{trouble.since.isoformat()}"
    # The Message-ID follows from the key and the domain alone, and names the .eml copy.
    message_id = alert_letter(
        subject, "-", alert.alerts_to, station=alert.station, key=key, domain=alert.domain
    ).message_id
    if alert.eml_folder is not None:
        copy = (
            "a copy of it was written at once as a file on the station, "
            f"{alert.eml_folder / eml_file_name(message_id)}, and "
        )
    else:
        copy = ""
    text = (
        f"The station cannot hand its mail to the mail server {alert.server}: every attempt "
        f"since {since} has failed for a reason that may pass, for more than "
        f"{_duration(alert.after_s)} by {now.isoformat(timespec='seconds')}. The last attempt, "
        f"at {trouble.last_at.isoformat(timespec='seconds')}, failed with:\n"
        f"  {trouble.last_error}\n\n"
        "No mail is lost: every letter waits in the station's outbox and is tried again by "
        "itself (after 30 s, then twice as long each time, up to an hour). But until the "
        "server takes mail again, NOBODY IS TOLD BY MAIL OF A FAILED OR HELD CELL: find them "
        "with `formgate status STATION` and in the certificates folder, and keep failed "
        "cells apart as usual until qualified personnel release them.\n\n"
        "How this alert reaches you: it waits in the same outbox, so by mail it arrives only "
        "once the server takes mail again. If you are reading it as a mail, the outage has "
        "ended or is ending, and the mail that waited goes out with it. While the server is "
        f"down, nothing reaches anyone by mail: {copy}`formgate status STATION` shows the "
        "line 'trouble: mail cannot be delivered: <last error> since <time>' until a mail "
        "goes out again.\n\n"
        f"What to do: check that the mail server {alert.server} is up and that the station "
        "reaches it (its name, port and security in the [smtp] table of station.toml, the "
        "network, a firewall). Once it takes mail again, the waiting mail goes out by itself; "
        "`formgate mail retry STATION` sends it at once."
    )
    return alert_letter(
        subject, text, alert.alerts_to, station=alert.station, key=key, domain=alert.domain
    )
