"""How the station stays up: one input at a time, marked in hand; faults of the surroundings pause it.

The station's main loop applies every effect through :meth:`Guard.handle` (one
input's effects, with the input marked in hand: inhand.py) or :meth:`Guard.duty`
(the station's own work). A fault of the surroundings there (troubles.py) pauses the
station, raises one alert and keeps the interrupted effect; :meth:`Guard.retry`
tests the folders and the ledger with real writes, applies what waited, and resumes.
Alerts are queued in the ledger's outbox, and held in memory while the ledger itself
cannot be written. Any other exception is a bug and ends the process (exit 3).

The Guard owns the troubles in force, the effects that wait for a pause to end, the
alerts not yet queued and the last error shown in the heartbeat; every other job of the
station is handed the Guard and goes through it.
"""

from __future__ import annotations

import datetime
import logging
import threading
import time
from collections import deque
from collections.abc import Callable

from pipeline.ledger.ledger import Ledger
from pipeline.mail.letters import Letter, alert_letter
from pipeline.station.inhand import InHand
from pipeline.station.settings import InboxSettings, Settings
from pipeline.station.troubles import Troubles, describe, fault_key, is_environmental
from pipeline.writing import write_atomic

log = logging.getLogger("formgate.station")

SURROUNDINGS = "surroundings"  # the key of the trouble that pauses the station
PROBE_BYTES = 65536  # real bytes, flushed: an empty file can be created even on a full disk


class Guard:
    """The station's guard rails over one open ledger."""

    def __init__(
        self,
        settings: Settings,
        ledger: Ledger,
        clock: Callable[[], datetime.datetime],
        inhand: InHand,
        mail_wake: threading.Event,
    ) -> None:
        self.settings = settings
        self.ledger = ledger
        self.clock = clock
        self.inhand = inhand
        self.mail_wake = mail_wake  # set when a letter is queued: the mail thread sends it
        self.troubles = Troubles(settings.retry_max_s)
        self.blocked: deque[Callable[[], None]] = deque()  # effects to apply once unpaused
        self.unsent: list[Letter] = []  # alerts the ledger could not take yet
        self.last_error = ""  # shown in the heartbeat and status

    @property
    def paused(self) -> bool:
        return self.troubles.paused

    def handle(self, key: str, what: str, effect: Callable[[], None], *, retry: bool = True) -> None:
        """Apply ``effect`` for one input, marked in hand; a fault of the surroundings pauses.

        With ``retry`` the effect is applied again once the fault clears; without, the input
        stays where it is and the next listing finds it again.
        """

        def run() -> None:
            with self.inhand.holding(key, what):
                effect()

        if self.troubles.paused:
            if retry:
                self.blocked.append(run)
            return
        try:
            run()
        except Exception as exc:
            if not is_environmental(exc):
                raise
            if retry:
                self.blocked.append(run)
            self.pause(exc)

    def duty(self, effect: Callable[[], None]) -> None:
        """Run one of the station's own duties; a fault of the surroundings pauses the station."""
        try:
            effect()
        except Exception as exc:
            if not is_environmental(exc):
                raise
            self.pause(exc)

    def note_error(self, text: str) -> None:
        """Remember ``text`` as the station's last error (the heartbeat and status show it)."""
        self.last_error = text

    def pause(self, exc: BaseException) -> None:
        reason = describe(exc, ledger=self.settings.ledger)
        self.last_error = reason
        trouble = self.troubles.report(
            SURROUNDINGS,
            reason,
            now=self.clock(),
            now_s=time.monotonic(),
            kind=fault_key(exc, ledger=self.settings.ledger),
        )
        if trouble is None:
            return
        log.error("paused: %s; the station tries again by itself and resumes when it can", reason)
        if not trouble.repeated:
            self.alert(
                f"station paused: {reason}",
                f"The station has paused: {reason}.\n\nIt claims no new files until this is "
                "fixed, tries again by itself (after 1 s, then twice as long each time, up to "
                f"{self.settings.retry_max_s:g} s) and resumes on its own; nothing is lost. "
                "Free the disk, make the folder writable again, or bring back the folder or "
                "share that went away.",
                key=f"paused:{trouble.since.isoformat()}",
            )
        self.note_pause(trouble.shown())

    def retry(self, now_s: float) -> None:
        """While paused: test the folders and the ledger, apply what is waiting, and resume."""
        if SURROUNDINGS not in self.troubles.active:
            return
        try:
            for folder in (
                self.settings.work,
                self.settings.archive,
                self.settings.quarantine,
                self.settings.results,
                self.settings.certificates,
            ):
                probe = folder / ".formgate-probe"
                write_atomic(b"\0" * PROBE_BYTES, probe, make_parents=False)
                probe.unlink()
            self.ledger.facts.note_state("paused", "", now=self.clock())
            while self.blocked:
                self.blocked[0]()
                self.blocked.popleft()
        except Exception as exc:
            if not is_environmental(exc):
                raise
            wait_s = self.troubles.failed_again(now_s)
            log.info("still paused (%s); next try in %g s", describe(exc, ledger=self.settings.ledger),
                     wait_s)
            return
        ended = self.troubles.clear(SURROUNDINGS, now=self.clock())
        if ended is not None:
            log.warning("resumed: the fault has cleared (%s)", ended.shown())
            if self.last_error == ended.reason:
                self.last_error = ""  # the pause is over: status no longer shows it as an error
        self.flush_unsent()

    def note_pause(self, shown: str) -> None:
        try:
            self.ledger.facts.note_state("paused", shown, now=self.clock())
        except Exception as exc:  # the ledger may be the fault: the heartbeat shows it too
            if not is_environmental(exc):
                raise

    def alert(self, subject: str, text: str, *, key: str) -> None:
        """Queue one alert (sent when mail works); kept in memory while the ledger cannot take it."""
        routing = self.settings.routing
        if not routing.alerts_to:
            return
        letter = alert_letter(
            subject,
            text,
            routing.alerts_to,
            station=self.settings.station_name,
            key=key,
            domain=routing.domain,
        )
        self.unsent.append(letter)
        self.flush_unsent()

    def flush_unsent(self) -> None:
        while self.unsent:
            try:
                self.ledger.outbox.queue(self.unsent[0], now=self.clock())
            except Exception as exc:
                if not is_environmental(exc):
                    raise
                return
            self.unsent.pop(0)
            self.mail_wake.set()

    def inbox_trouble(self, inbox: InboxSettings, exc: OSError | None) -> None:
        key = f"inbox:{inbox.name}"
        if exc is None:
            if self.troubles.clear(key, now=self.clock()) is not None:
                log.warning("inbox %s is back: the station takes its files again", inbox.name)
            return
        now = self.clock()
        since = f"since {now.isoformat(timespec='seconds')}"
        if isinstance(exc, FileNotFoundError):
            reason = f"inbox {inbox.name} is missing (its folder {inbox.folder} is not there)"
            what = (f"The folder of inbox {inbox.name}, {inbox.folder}, is not there {since}: "
                    "a share that is not mounted, or a folder removed or renamed.")
        else:
            reason = f"inbox {inbox.name} cannot be listed ({describe(exc)})"
            what = f"The station cannot list {inbox.folder} {since}: {describe(exc)}."
        trouble = self.troubles.report(key, reason, now=now, now_s=time.monotonic(), blocking=False)
        if trouble is None:
            self.troubles.reword(key, reason)  # e.g. missing, then there but unreadable
            return
        log.error("%s; the other inboxes go on", reason)
        if not trouble.repeated:
            # said as status says it (Trouble.shown): the reason, and since when
            self.alert(f"{reason} {since}", f"{what} Files handed over there wait until the "
                       "station can take them; the other inboxes go on, and this one resumes "
                       "by itself once the folder is back.",
                       key=f"inbox:{inbox.name}:{trouble.since.isoformat()}")
