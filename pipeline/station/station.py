"""The station: claim finished files from the inboxes, judge them in workers, record, publish, archive.

One main thread owns the ledger writes for inputs and results and applies every
effect in a fixed order (docs/station.md):

    claim (rename into work/) -> ledger claim -> worker judges and renders bytes
    -> ONE transaction: result, check rows, outbox rows -> write JSON and PDF
    atomically -> published -> move input to archive/YYYY-MM-DD/ -> archived

A crash anywhere leaves a state that :meth:`Station.recover` completes on the next
start. Events from the folder watcher only wake the loop; a scan of the folders is
the truth. Mail goes out from its own thread (mailer.py).

Nothing one input does stops the station: an entry that is not an input is set aside
(setaside.py), a file past a limit or that kills its worker is quarantined
(judges.py, limits.py), and an input in hand when the process died twice is
quarantined at the next start (inhand.py). Faults of the surroundings pause it until
they clear (troubles.py).

This module holds the loop and its start, stop and recovery; the class's other work
comes from its mixins: claiming (claiming.py), tasks for the workers (tasks.py),
recording and publishing (publishing.py), the rules in force (rules_in_force.py),
periodic duties (duties.py) and the guard rails (guard.py).
"""

from __future__ import annotations

import datetime
import logging
import os
import threading
import time
from collections import deque
from collections.abc import Callable
from functools import partial
from pathlib import Path

from pipeline.errors import FormgateError
from pipeline.ledger.ledger import Ledger
from pipeline.ledger.rows import InputRow
from pipeline.mail.letters import Letter
from pipeline.mail.smtp import SmtpSettings
from pipeline.names import to_text
from pipeline.rulebook.book import RuleBook
from pipeline.station.claiming import Claims
from pipeline.station.handoff import Seen
from pipeline.station.inhand import DEATHS_TO_QUARANTINE, Death, InHand, input_key
from pipeline.station.judges import JudgePool
from pipeline.station.lots import LotCloser
from pipeline.station.mailer import MailThread
from pipeline.station.publishing import final_name
from pipeline.station.rules_in_force import RulesKeeper
from pipeline.station.setaside import SetAside, writable
from pipeline.station.settings import Settings
from pipeline.station.tasks import MB
from pipeline.station.troubles import Troubles
from pipeline.station.watcher import Listing, list_entries
from pipeline.station.worker import Task
from pipeline.writing import clean_temp_files

log = logging.getLogger("formgate.station")


def utc_now() -> datetime.datetime:
    return datetime.datetime.now(datetime.UTC)


class Station(Claims, RulesKeeper):
    """A running station over one settings file. ``run(stop)`` returns when ``stop`` is set."""

    def __init__(
        self,
        settings: Settings,
        smtp: SmtpSettings,
        *,
        clock: Callable[[], datetime.datetime] = utc_now,
    ) -> None:
        self.settings = settings
        self.smtp = smtp
        self.clock = clock
        self.wake = threading.Event()
        # opened by run(), in the thread that runs the station (SQLite's rule)
        self.ledger: Ledger = None  # type: ignore[assignment]
        self.rulebook: RuleBook | None = None
        self.rules_fingerprint: tuple[tuple[str, int, int], ...] | None = None  # None: never read
        self.rules_alerted: str = ""
        self.seen: dict[str, dict[str, Seen]] = {i.name: {} for i in settings.inboxes}
        # per inbox: when it was last listed, and the finished files found then but not yet
        # claimed (a backlog is claimed from this list, not by listing the folder every turn)
        self.ready: dict[str, tuple[float, deque[str]]] = {}
        self.queue: deque[tuple[InputRow, Task | None]] = deque()  # a task given: judge again
        self.judges = JudgePool(
            settings.workers,
            timeout_s=settings.task_timeout_s,
            memory_limit_bytes=int(settings.worker_memory_MB * MB),
        )
        self.inbox_of: dict[str, str] = {}  # work path -> inbox name, for its import profile
        self.cut_noted: dict[str, float] = {}  # inbox files said to look cut, and since when
        self.troubles = Troubles(settings.retry_max_s)
        self.blocked: deque[Callable[[], None]] = deque()  # effects to apply once unpaused
        self.unsent: list[Letter] = []  # alerts the ledger could not take yet
        self.mail_wake = threading.Event()  # the mail thread's, once it runs: mail is queued
        self.inhand = InHand(settings.ledger.with_name(f".{settings.ledger.name}.in-hand"))
        self.aside = SetAside(settings)
        self.left: dict[tuple[str, str], tuple[int, int]] = {}  # left in place, as it was then
        self.overdue_alerted: set[tuple[str, str]] = set()
        self.originals_checked: dict[Path, tuple[int, int]] = {}
        self.started_at = clock()
        self.last_heartbeat = 0.0
        self.last_reconcile = 0.0
        self.judged = 0
        self.last_error: str = ""

    @property
    def pool(self) -> object:
        """The process pool of the workers (for measurements)."""
        return self.judges.pool

    # ---- start and stop ------------------------------------------------------------------

    def run(self, stop: threading.Event) -> int:
        """Recover, then watch and work until ``stop`` is set; finish the cells in hand; 0."""
        from pipeline.station.watcher import InboxWatcher

        # SQLite connections belong to the thread that opened them: open it here
        self.ledger = Ledger(self.settings.ledger, now=self.clock())
        try:
            death = self.inhand.found_at_start()
            self.duty(lambda: self.load_rules(first=True))
            for inbox in self.settings.inboxes:
                inbox.folder.mkdir(parents=True, exist_ok=True)
            self.judges.start()
        except BaseException:
            self.ledger.close()
            raise
        watchers = [
            InboxWatcher(
                [i.folder], self.wake, polling=i.polling, poll_interval_s=i.poll_interval_s
            )
            for i in self.settings.inboxes
        ]
        mail = MailThread(
            self.settings.ledger,
            self.smtp,
            station=self.settings.station_name,
            alerts_to=self.settings.routing.alerts_to,
            domain=self.settings.routing.domain,
        )
        lots = LotCloser(self.settings, lambda: self.rulebook, self.clock, mail.wake,
                         interval_s=self.settings.reconcile_s * 6)
        try:
            self.duty(lambda: self.after_death(death))
            self.recover()
            for w in watchers:
                w.start()
            mail.start()
            self.mail_wake = mail.wake
            lots.start()
            log.info(
                "station %s watching %s",
                self.settings.station_name,
                ", ".join(str(i.folder) for i in self.settings.inboxes),
            )
            while not stop.is_set():
                self.step()
                for w in watchers:
                    w.supervise()
                if self.troubles.paused or (not self.judges.busy() and not self.queue):
                    self.wake.wait(min(self.settings.reconcile_s, 1.0))
                    self.wake.clear()
            log.info("stopping: finishing %d cell(s) in hand", self.judges.busy())
            while self.judges.busy():
                self.collect(timeout=1.0)
            self.write_heartbeat(state="stopped")
        finally:
            for w in watchers:
                w.stop()
            if lots.is_alive():
                lots.stop()
            mail.stop()
            self.judges.shutdown()
            self.inhand.close()
            self.ledger.close()
        return 0

    def step(self) -> None:
        """One turn of the loop: rules, inboxes, submissions, finished work, digests, heartbeat."""
        self.duty(self.load_rules)
        now_s = time.monotonic()
        if self.troubles.due(now_s):
            self.retry(now_s)
        if not self.troubles.paused:
            if now_s - self.last_reconcile >= self.settings.reconcile_s:
                self.last_reconcile = now_s
                self.duty(self.reconcile_work)
                self.review_originals()
            self.duty(lambda: self.scan_inboxes(now_s))
            self.duty(self.submit)
        self.collect(timeout=0.2 if self.judges.busy() else 0.0)
        if not self.troubles.paused:
            self.duty(self.queue_digests)
            self.duty(self.flush_unsent)
        if now_s - self.last_heartbeat >= self.settings.heartbeat_s:
            self.last_heartbeat = now_s
            self.write_heartbeat()

    def after_death(self, death: Death | None) -> None:
        """Quarantine the input that was in hand when the station died for the second time."""
        if death is None or death.deaths < DEATHS_TO_QUARANTINE:
            return
        why = (
            f"it crashed the judge: the station process ended {death.deaths} times while "
            f"{death.what} this file, so it is set aside before the station goes on.\n  Check "
            "it by hand with `formgate check` and report it: no input should stop formgate."
        )
        if death.input_id is not None:
            row = self.ledger.inputs.get(death.input_id)
            if row is not None and row.final_path is None and row.state in ("claimed", "judged"):
                self.quarantine(row, f"{row.name}: {why}")
        elif death.path is not None and os.path.lexists(death.path):
            name = to_text(death.path.name)
            inbox = next(
                (i.name for i in self.settings.inboxes if i.folder == death.path.parent), "work"
            )
            self.aside.entry(
                self.ledger, death.path, inbox=inbox, kind="file", reason=f"{name}: {why}",
                now=self.clock(),
            )
        self.inhand.done_with(death.key)

    def listing(self, folder: Path) -> Listing:
        """List a folder, an inbox or work/: every listing of the station goes through this
        module's ``list_entries``, so replacing that one name sees (or counts) them all."""
        return list_entries(folder)

    # ---- recovery ------------------------------------------------------------------------

    def recover(self) -> None:
        """Complete whatever a crash interrupted; clean temp files; queue unjudged work."""
        for folder in (
            self.settings.results,
            self.settings.certificates,
            self.settings.archive,
            self.settings.quarantine,
            self.settings.mail,
            self.settings.work,  # a settle-mode copy cut short
        ):

            def clean(folder: Path = folder) -> None:
                for path in clean_temp_files(folder):
                    log.info("removed an unfinished temporary file: %s", path)

            self.duty(clean)
        for row in self.ledger.inputs.in_state("claimed", "judged", "published", "duplicate"):
            if row.final_path is None:
                self.handle(input_key(row.id), "recovering", partial(self.recover_row, row))
        self.duty(self.reconcile_work)
        self.duty(self.decide_behind)

    def decide_behind(self) -> None:
        """Decide the cells whose last record or reading of the past day came in just before a
        crash, before their decision was recorded (a day back: older ones are decided at
        their next record, or when their lot closes)."""
        since = self.clock() - datetime.timedelta(days=1)
        behind = self.ledger.decisions.cells_behind(since)
        if behind:
            log.info("deciding %d cell(s) whose records came in before a restart", len(behind))
            self.decide_cells(behind, "record")

    def recover_row(self, row: InputRow) -> None:
        work = Path(row.work_path)
        if row.state == "duplicate":
            self.finish(row, "duplicate")
        elif row.state == "published":
            self.finish(row, "archived")
        elif row.state == "judged" and self.ledger.readings.exist_for(row.id):
            self.keep_readings(row, None)  # its readings are kept: publish them
        elif row.state == "judged":
            task = self.judge_again(row)
            if task is not None:
                self.queue.append((row, task))
        elif row.reason:
            self.quarantine(row, row.reason)
        elif work.exists():
            self.queue.append((row, None))
        else:
            quarantined = self.settings.quarantine / final_name(row)
            if quarantined.exists():
                self.ledger.inputs.mark_final(
                    row.id,
                    "quarantined",
                    str(quarantined),
                    row.reason or "moved before a crash",
                    now=self.clock(),
                )
            else:
                log.error(
                    "%s: input %d is recorded as claimed but its file is gone from %s",
                    row.name,
                    row.id,
                    work,
                )


__all__ = ["FormgateError", "Station", "writable"]
