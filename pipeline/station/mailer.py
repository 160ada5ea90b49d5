"""Deliver the station's outbox: due mails from the ledger go out by SMTP, or into .eml files.

Runs as one thread of the station (and once, in the foreground, for
`formgate mail retry`). The outbox itself lives in the ledger, so a mail queued
before a crash goes out after it; each message keeps its Message-ID across
retries, so a rare resend is recognisable. Composing letters is mail.py's job,
speaking SMTP smtp.py's.
"""

from __future__ import annotations

import datetime
import logging
import threading
from collections.abc import Callable
from pathlib import Path

from pipeline.ledger.ledger import Ledger
from pipeline.ledger.rows import MailRow
from pipeline.mail.letters import Letter, MailError, alert_letter, build_message
from pipeline.mail.smtp import SmtpSettings, next_attempt_delay_s, send
from pipeline.station import faults
from pipeline.station.troubles import is_environmental

log = logging.getLogger("formgate.mail")

Clock = Callable[[], datetime.datetime]


def utc_now() -> datetime.datetime:
    return datetime.datetime.now(datetime.UTC)


def _letter(row: MailRow) -> Letter:
    return Letter(
        kind=row.kind,  # type: ignore[arg-type]
        message_id=row.message_id,
        recipients=row.recipients,
        subject=row.subject,
        body_text=row.body_text,
        attachment_path=row.attachment_path,
        lot=row.lot,
    )


def deliver_due(
    ledger: Ledger,
    smtp: SmtpSettings,
    *,
    station: str,
    alerts_to: tuple[str, ...],
    domain: str | None = None,
    clock: Clock = utc_now,
    stop: threading.Event | None = None,
) -> dict[str, int]:
    """Send every mail that is due now; return how many were sent, retried and parked.

    4xx replies and connection errors retry with capped exponential backoff; 5xx
    replies park the mail with the server's answer and queue an alert (never for
    an alert, so a broken alert address cannot feed itself).
    """
    counts = {"sent": 0, "retry": 0, "park": 0}
    for row in ledger.outbox.due(clock()):
        if stop is not None and stop.is_set():
            break
        try:
            message = build_message(_letter(row), sender=smtp.sender, date=clock())
        except (MailError, OSError, ValueError) as exc:
            outcome, reply = "park", f"message could not be built: {exc}"
        else:
            result = send(message, smtp)
            outcome, reply = result.outcome, result.reply
        now = clock()
        if outcome == "sent":
            faults.point("after_send")
            ledger.outbox.mark_sent(row.id, now=now, reply=reply)
            log.info("mail sent: %s to %s", row.subject, ", ".join(row.recipients))
        elif outcome == "retry":
            delay = next_attempt_delay_s(row.attempts + 1)
            ledger.outbox.mark_retry(
                row.id,
                now=now,
                next_attempt_at=now + datetime.timedelta(seconds=delay),
                error=reply,
            )
            log.warning("mail delayed (%s); next try in %.0f s: %s", reply, delay, row.subject)
        else:
            ledger.outbox.park(row.id, now=now, reply=reply)
            log.error("mail parked (%s): %s", reply, row.subject)
            if row.kind != "alert" and alerts_to:
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
        counts[outcome] += 1
    return counts


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
        interval_s: float = 5.0,
    ) -> None:
        super().__init__(name="formgate-mail", daemon=False)
        self.ledger_path = ledger_path
        self.smtp = smtp
        self.station = station
        self.alerts_to = alerts_to
        self.domain = domain
        self.interval_s = interval_s
        self.stop_event = threading.Event()
        self.wake = threading.Event()
        self.error: str | None = None

    def run(self) -> None:
        with Ledger(self.ledger_path) as ledger:
            while not self.stop_event.is_set():
                try:
                    deliver_due(
                        ledger,
                        self.smtp,
                        station=self.station,
                        alerts_to=self.alerts_to,
                        domain=self.domain,
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

    def stop(self) -> None:
        self.stop_event.set()
        self.wake.set()
        if self.is_alive():
            self.join(timeout=60)
