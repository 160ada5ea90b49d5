"""Deliver the station's outbox: due mails from the ledger go out by SMTP, or into .eml files.

Runs as one thread of the station (and in the foreground for `formgate mail retry`,
as often and as many at once as people start it). The outbox itself lives in the
ledger, so a mail queued before a crash goes out after it; each message keeps its
Message-ID across retries, so a rare resend is recognisable. Every sender claims a
row in the ledger before it speaks to the server and records the outcome as the
claim's owner (ledger/outbox.py), so two senders never send one row. A letter the
server took is never released: if the ledger cannot record it (another process holds
the write lock past the busy timeout), the Sender keeps it and records it before it
claims anything new, and a sender that stops first leaves the claim to its lease. How
a delivery went is noted as the station's mail trouble (mailtrouble.py). Composing
letters is mail.letters' job, speaking SMTP mail.smtp's.
"""

from __future__ import annotations

import contextlib
import datetime
import logging
import os
import secrets
import socket
import sqlite3
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

from pipeline.ledger.connection import BUSY_TIMEOUT_MS
from pipeline.ledger.ledger import Ledger
from pipeline.ledger.outbox import NotClaimed
from pipeline.ledger.rows import MailRow
from pipeline.mail.letters import Letter, MailError, alert_letter, build_message
from pipeline.mail.smtp import SmtpSettings, next_attempt_delay_s, send
from pipeline.station import faults, mailtrouble
from pipeline.station.troubles import is_environmental

log = logging.getLogger("formgate.mail")

Clock = Callable[[], datetime.datetime]

# The lease of a claim must outlast the slowest conversation that is still alive, or a
# second sender would take the mail over and send it again. Each step of a conversation
# waits at most [smtp] timeout_s for the server (smtplib's socket timeout): connecting,
# the greeting, EHLO, STARTTLS and its TLS handshake, EHLO again, AUTH (up to three
# exchanges), MAIL FROM, DATA, sending the message, the final reply and QUIT: 14 steps,
# and one RCPT per recipient. Besides the conversation, a sender looks up the server's
# name (not bounded by timeout_s; a resolver gives up within about 30 s), reads the PDF it
# attaches, and writes the outcome, which may wait for the ledger's write lock for up to
# its busy timeout: LEASE_MARGIN_S covers those. With the default timeout_s of 30 s a
# claim on a one-recipient letter lasts 15 x 30 + 90 = 540 s. (A server that trickles a
# reply a byte at a time just inside timeout_s could stretch one step past its share; no
# mail server does that.)
CONVERSATION_STEPS = 14
LEASE_MARGIN_S = BUSY_TIMEOUT_MS / 1000 + 60.0


def utc_now() -> datetime.datetime:
    return datetime.datetime.now(datetime.UTC)


def lease_s(smtp: SmtpSettings, recipients: int) -> float:
    """Seconds a claim on a mail to ``recipients`` addresses lasts (see CONVERSATION_STEPS).

    >>> lease_s(SmtpSettings(host="mail.example.com", sender="a@example.com"), 1)
    540.0
    """
    return (CONVERSATION_STEPS + max(recipients, 1)) * smtp.timeout_s + LEASE_MARGIN_S


def _pid_namespace() -> str:
    """The process's pid namespace on Linux ('-' elsewhere): pids are compared only within one."""
    try:
        return os.readlink("/proc/self/ns/pid")
    except OSError:
        return "-"


def new_owner() -> str:
    """An owner id for claims, unique per process and thread: host/pid namespace/pid/thread/token.

    The random token keeps two senders apart even if a pid or thread id is used again.
    """
    return "/".join(
        (
            socket.gethostname() or "-",
            _pid_namespace(),
            str(os.getpid()),
            str(threading.get_native_id()),
            secrets.token_hex(6),
        )
    )


def _process_gone(pid: int) -> bool:
    """True if no process ``pid`` runs here (a zombie, killed but not yet reaped, counts as gone)."""
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return True
    except PermissionError:
        return False
    try:
        stat = Path(f"/proc/{pid}/stat").read_text(encoding="ascii", errors="replace")
    except OSError:
        return False
    return stat.rsplit(")", 1)[-1].split()[:1] == ["Z"]


def owner_is_gone(owner: str) -> bool:
    """True only when ``owner`` is certainly dead: a process of this host and pid namespace
    that no longer runs. Anything else (another host, this very process, an id that cannot
    be read) is left to its lease."""
    parts = owner.split("/")
    if len(parts) != 5 or not parts[2].isdigit():
        return False
    host, namespace, pid = parts[0], parts[1], int(parts[2])
    if host != (socket.gethostname() or "-") or namespace != _pid_namespace():
        return False
    return pid != os.getpid() and _process_gone(pid)


def _letter(row: MailRow) -> Letter:
    body = row.body_text
    if row.waits_for is not None and not os.path.exists(row.waits_for):
        # it waited its longest (outbox.LINK_WAIT_S): the letter goes, and says so
        body += (
            "\n\nThe cell's own certificate named above was not yet published when this mail "
            "was sent; the station publishes it as soon as it can be rendered."
        )
    return Letter(
        kind=row.kind,  # type: ignore[arg-type]
        message_id=row.message_id,
        recipients=row.recipients,
        subject=row.subject,
        body_text=body,
        attachment_path=row.attachment_path,
        lot=row.lot,
    )


@dataclass(frozen=True)
class SentNotRecorded:
    """A letter the server took that the ledger has not recorded as sent yet."""

    row: MailRow  # as claimed: claimed_until is when the claim's lease ends
    reply: str
    sent_at: datetime.datetime

    def words(self) -> str:
        """What the station's log and `mail retry` say of it: the same words in both."""
        return (
            f"mail {self.row.message_id} went out but the ledger could not record it; its claim "
            f"stays until {self.row.claimed_until}, so no other sender sends it before: "
            f"{self.row.subject}"
        )


@dataclass
class Sender:
    """One sender on the outbox (the station's mail thread, or one `mail retry`): the owner id
    its claims carry, and the letters it sent that the ledger could not record yet.

    Those letters keep their claims: the sender records them before it claims anything
    new (see :func:`deliver_due`), and never releases them, so no sender (this one
    included) sends them again while their leases last.
    """

    owner: str = field(default_factory=new_owner)
    unrecorded: dict[int, SentNotRecorded] = field(default_factory=dict)

    def record_sent(self, ledger: Ledger) -> int:
        """Record as sent every letter this sender sent and could not record; how many.

        Raises what the ledger raises (``database is locked`` past the busy timeout)
        and keeps the rest for the next call.
        """
        done = 0
        for mail_id, sent in list(self.unrecorded.items()):
            _record_sent(ledger, sent, owner=self.owner)
            del self.unrecorded[mail_id]
            done += 1
        return done

    def settle(
        self, ledger: Ledger, *, clock: Clock = utc_now, stop: threading.Event | None = None
    ) -> list[SentNotRecorded]:
        """Before the sender goes away: try to record its sent letters until they are recorded
        or their claims' leases are over (or ``stop`` is set); the letters left.

        A letter left keeps its claim until the lease ends, so no other sender sends it
        while its lease lasts.
        """
        while self.unrecorded:
            try:
                self.record_sent(ledger)
            except sqlite3.OperationalError as exc:
                last = max(s.row.claimed_until or s.sent_at for s in self.unrecorded.values())
                if clock() >= last or (stop is not None and stop.is_set()):
                    break
                log.warning("%d sent mail(s) not recorded yet (%s); trying again",
                            len(self.unrecorded), exc)
                time.sleep(1.0)
        return list(self.unrecorded.values())


def _record_sent(ledger: Ledger, sent: SentNotRecorded, *, owner: str) -> None:
    """Mark one sent letter sent as ``owner``; raises only what the ledger raises."""
    row = sent.row
    try:
        ledger.outbox.mark_sent(row.id, owner=owner, now=sent.sent_at, reply=sent.reply)
    except ValueError as exc:  # NotClaimed: its lease ran out and another sender has it now
        log.warning("%s (this attempt: sent, %s)", exc, sent.reply)
    else:
        log.info("mail sent: %s to %s", row.subject, ", ".join(row.recipients))
    ended = mailtrouble.note_success(ledger, now=sent.sent_at)
    if ended is not None:
        log.warning("mail goes out again (it could not be delivered since %s)", ended.since)


def _claim(
    ledger: Ledger, seen: MailRow, smtp: SmtpSettings, *, owner: str, now: datetime.datetime
) -> MailRow | None:
    """Claim ``seen`` for ``owner``; None while another sender holds it (or has just done it)."""
    holder = seen.claimed_by
    live = holder is not None and holder != owner and seen.claimed_until is not None and (
        seen.claimed_until > now
    )
    gone = live and owner_is_gone(str(holder))
    if live and not gone:
        return None
    until = now + datetime.timedelta(seconds=lease_s(smtp, len(seen.recipients)))
    row = ledger.outbox.claim(
        seen.id, owner=owner, now=now, until=until, take_from=holder if gone else None
    )
    if row is not None and holder is not None and holder != owner:
        why = "its process is gone" if gone else f"its lease ran out at {seen.claimed_until}"
        log.warning("taking over mail %s from sender %s (%s): %s", seen.id, holder, why,
                    seen.subject)
    return row


def deliver_due(
    ledger: Ledger,
    smtp: SmtpSettings,
    *,
    station: str,
    alerts_to: tuple[str, ...],
    domain: str | None = None,
    outage_alert_s: float = 900.0,
    sender: Sender | None = None,
    clock: Clock = utc_now,
    stop: threading.Event | None = None,
) -> dict[str, int]:
    """Send every mail that is due now; return how many this sender sent, retried and parked,
    and how many it left to another sender that held them ('elsewhere').

    Each row is claimed for ``sender`` (default: a new one) before it is sent, and its
    outcome is recorded by that sender. A letter the server took whose record fails
    stays with the sender, claimed, and the error is raised; the next call records it
    first and claims nothing new until it is recorded. 4xx replies and connection
    errors retry with capped exponential backoff and carry on the mail trouble; a mail
    that goes out ends it; ``outage_alert_s`` into a trouble, one alert is queued. 5xx
    replies park the mail with the server's answer and queue an alert (never for an
    alert, so a broken alert address cannot feed itself).
    """
    sender = sender or Sender()
    owner = sender.owner
    counts = {"sent": 0, "retry": 0, "park": 0, "elsewhere": 0}
    counts["sent"] += sender.record_sent(ledger)  # first: a locked ledger stops the turn here
    for seen in ledger.outbox.due(clock()):
        if stop is not None and stop.is_set():
            break
        if seen.id in sender.unrecorded:
            continue
        row = _claim(ledger, seen, smtp, owner=owner, now=clock())
        if row is None:
            counts["elsewhere"] += 1
            continue
        try:
            outcome, reply = _attempt(row, smtp, clock)
        except BaseException:
            # nothing went out: let another sender have it at once rather than after the lease
            with contextlib.suppress(Exception):
                ledger.outbox.release(row.id, owner=owner)
            raise
        if outcome == "sent":
            # from here on the letter is the sender's until recorded: never released
            sender.unrecorded[row.id] = SentNotRecorded(row, reply, clock())
            faults.point("after_send")
            counts["sent"] += sender.record_sent(ledger)
            continue
        try:
            outcome = _record_unsent(
                ledger, row, outcome, reply, owner=owner, station=station,
                alerts_to=alerts_to, domain=domain, now=clock(),
            )
        except BaseException:
            with contextlib.suppress(Exception):  # nothing went out (see above)
                ledger.outbox.release(row.id, owner=owner)
            raise
        counts[outcome] += 1
    if smtp.host is not None:  # .eml files have no server to be down (a full disk pauses instead)
        mailtrouble.alert_if_due(
            ledger,
            mailtrouble.OutageAlert(
                alerts_to=alerts_to,
                station=station,
                domain=domain,
                after_s=outage_alert_s,
                server=f"{smtp.host}:{smtp.port}",
                sender=smtp.sender,
                eml_folder=smtp.eml_folder,
            ),
            now=clock(),
        )
    return counts


def _attempt(row: MailRow, smtp: SmtpSettings, clock: Clock) -> tuple[str, str]:
    """Build and send one claimed mail: its outcome ('sent', 'retry' or 'park') and reply."""
    try:
        message = build_message(_letter(row), sender=smtp.sender, date=clock())
    except (MailError, OSError, ValueError) as exc:
        return "park", f"message could not be built: {exc}"
    result = send(message, smtp)
    return result.outcome, result.reply


def _record_unsent(
    ledger: Ledger,
    row: MailRow,
    outcome: str,
    reply: str,
    *,
    owner: str,
    station: str,
    alerts_to: tuple[str, ...],
    domain: str | None,
    now: datetime.datetime,
) -> str:
    """Record a mail that did not go out (``outcome`` 'retry' or 'park') as ``owner``; the
    outcome, or 'elsewhere' when another sender took the claim over meanwhile (its lease
    had run out)."""
    try:
        if outcome == "retry":
            delay = next_attempt_delay_s(row.attempts + 1)
            ledger.outbox.mark_retry(
                row.id,
                owner=owner,
                now=now,
                next_attempt_at=now + datetime.timedelta(seconds=delay),
                error=reply,
            )
            log.warning("mail delayed (%s); next try in %.0f s: %s", reply, delay, row.subject)
        else:
            ledger.outbox.park(row.id, owner=owner, now=now, reply=reply)
            log.error("mail parked (%s): %s", reply, row.subject)
    except NotClaimed as exc:
        log.warning("%s (this attempt: %s, %s)", exc, outcome, reply)
        return "elsewhere"
    if outcome == "retry":
        mailtrouble.note_failure(ledger, reply, now=now)
    elif row.kind != "alert" and alerts_to:
        alert = alert_letter(
            f"mail could not be delivered: {row.subject}",
            f"The mail server refused a message for good.\n\nSubject: {row.subject}\n"
            f"To: {', '.join(row.recipients)}\nServer reply: {reply}\n\n"
            "Fix the cause (address, server settings), then run "
            "`formgate mail retry STATION --parked` to send it again.",
            alerts_to,
            station=station,
            key=f"parked:{row.message_id}",
            domain=domain,
        )
        ledger.outbox.queue(alert, now=now)
    return outcome


class MailThread(threading.Thread):
    """Delivers due mail every few seconds until stopped; uses its own ledger connection."""

    def __init__(
        self,
        ledger_path: Path,
        smtp: SmtpSettings,
        *,
        station: str,
        alerts_to: tuple[str, ...],
        domain: str | None,
        outage_alert_s: float = 900.0,
        interval_s: float = 5.0,
    ) -> None:
        super().__init__(name="formgate-mail", daemon=False)
        self.ledger_path = ledger_path
        self.smtp = smtp
        self.station = station
        self.alerts_to = alerts_to
        self.domain = domain
        self.outage_alert_s = outage_alert_s
        self.interval_s = interval_s
        self.stop_event = threading.Event()
        self.wake = threading.Event()
        self.error: str | None = None

    def run(self) -> None:
        sender = Sender()  # made here, in the thread whose claims it names
        with Ledger(self.ledger_path) as ledger:
            while not self.stop_event.is_set():
                try:
                    deliver_due(
                        ledger,
                        self.smtp,
                        station=self.station,
                        alerts_to=self.alerts_to,
                        domain=self.domain,
                        outage_alert_s=self.outage_alert_s,
                        sender=sender,
                        stop=self.stop_event,
                    )
                    self.error = None
                except Exception as exc:
                    self.error = f"{type(exc).__name__}: {exc}"
                    if is_environmental(exc):  # a full disk, an unwritable ledger: it passes
                        log.warning("mail delivery paused (%s); trying again shortly", self.error)
                    else:
                        log.exception("mail delivery failed; trying again shortly")
                self.wake.wait(self.interval_s)
                self.wake.clear()
            with contextlib.suppress(Exception):
                sender.settle(ledger, stop=self.stop_event)  # one more try on the way out
            for sent in sender.unrecorded.values():
                log.warning("%s", sent.words())

    def stop(self) -> None:
        self.stop_event.set()
        self.wake.set()
        if self.is_alive():
            self.join(timeout=60)
