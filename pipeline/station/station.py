"""The station: claim finished files from the inboxes, judge them in workers, record, publish, archive.

One main thread owns the ledger writes for inputs and results and applies every
effect in a fixed order (docs/station.md):

    claim (rename into work/) -> ledger claim -> worker judges and renders bytes
    -> ONE transaction: result, check rows, outbox rows -> write JSON and PDF
    atomically -> published -> move input to archive/YYYY-MM-DD/ -> archived

A crash anywhere leaves a state that :meth:`Station.recover` completes on the next
start. Events from the folder watcher only wake the loop; a scan of the folders is
the truth. Mail goes out from its own thread (mailer.py), lots close in another
(lots.py).

Nothing one input does stops the station: an entry that is not an input is set aside
(setaside.py), a file past a limit or that kills its worker is quarantined
(judges.py, limits.py), and an input in hand when the process died twice is
quarantined at the next start (inhand.py). Faults of the surroundings pause it until
they clear (guard.py, troubles.py).

This module holds the loop and its start, stop and recovery. Each other job is an
object of its own that owns its state and is handed what it needs when :meth:`Station.wire`
puts them together over the open ledger: the guard rails (guard.py), the rules in force
(rules_in_force.py), deciding cells (cells.py), recording and publishing (publishing.py),
tasks for the workers (tasks.py), claiming (claiming.py), entries that stay in an inbox
(lingering.py), lot digests (digests.py) and settle mode's originals (originals.py).
"""

from __future__ import annotations

import datetime
import functools
import logging
import os
import threading
import time
from collections.abc import Callable
from functools import partial
from pathlib import Path

from pipeline.ledger.certificates import HELD
from pipeline.ledger.ledger import Ledger
from pipeline.ledger.rows import InputRow
from pipeline.mail.smtp import SmtpSettings
from pipeline.names import to_text
from pipeline.station.cellcerts import CellCertificates
from pipeline.station.cells import CellDecisions
from pipeline.station.certqueue import RecordCertificates
from pipeline.station.claiming import Claims
from pipeline.station.digests import DigestDuty
from pipeline.station.guard import Guard
from pipeline.station.heartbeat import write_heartbeat
from pipeline.station.inhand import DEATHS_TO_QUARANTINE, Death, InHand, input_key
from pipeline.station.judges import JudgePool
from pipeline.station.lingering import Lingering
from pipeline.station.lots import LotCloser, report_closed_lot
from pipeline.station.mailer import MailThread
from pipeline.station.originals import Originals
from pipeline.station.plantfeed import StationFeed
from pipeline.station.publishing import Publisher, final_name
from pipeline.station.rules_in_force import RulesInForce
from pipeline.station.setaside import SetAside
from pipeline.station.settings import Settings
from pipeline.station.tasks import MB, Tasks
from pipeline.station.troubles import describe
from pipeline.station.watcher import Listing, list_entries
from pipeline.writing import clean_temp_files

log = logging.getLogger("formgate.station")


def utc_now() -> datetime.datetime:
    return datetime.datetime.now(datetime.UTC)


class Station:
    """A running station over one settings file. ``run(stop)`` returns when ``stop`` is set.

    The station itself holds only what outlives one run's ledger connection (settings,
    clock, the judge pool, the in-hand marker) and the loop's own timers; its jobs are
    wired in :meth:`wire`, in the thread that runs the station (SQLite's rule).
    """

    # the station's jobs, each owning its state; wired by wire() over the open ledger
    ledger: Ledger
    guard: Guard
    rules: RulesInForce
    cells: CellDecisions
    cellcerts: CellCertificates
    certificates: RecordCertificates
    publisher: Publisher
    tasks: Tasks
    lingering: Lingering
    claims: Claims
    digests: DigestDuty
    originals: Originals
    aside: SetAside

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
        self.judges = JudgePool(
            settings.workers,
            timeout_s=settings.task_timeout_s,
            memory_limit_bytes=int(settings.worker_memory_MB * MB),
        )
        self.inhand = InHand(settings.ledger.with_name(f".{settings.ledger.name}.in-hand"))
        self.started_at = clock()
        self.last_heartbeat = 0.0
        self.last_reconcile = 0.0

    def wire(self, ledger: Ledger, mail_wake: threading.Event) -> None:
        """Put the station's jobs together over ``ledger``; ``mail_wake`` wakes the mail thread."""
        s, clock = self.settings, self.clock
        self.ledger = ledger
        self.guard = Guard(s, ledger, clock, self.inhand, mail_wake)
        self.rules = RulesInForce(s, ledger, clock, self.guard)
        self.cellcerts = CellCertificates(
            s, ledger, clock, self.rules, self.judges, self.wake, mail_wake
        )
        self.cells = CellDecisions(s, ledger, clock, self.rules, mail_wake, self.cellcerts.note)
        self.certificates = RecordCertificates(
            ledger, clock, self.judges, self.wake, mail_wake, lambda row: self.tasks.judge_again(row)
        )
        self.publisher = Publisher(s, ledger, clock, self.cells, self.guard, self.certificates,
                                   functools.partial(report_closed_lot, s, ledger))
        self.tasks = Tasks(s, ledger, clock, self.judges, self.rules, self.publisher, self.guard)
        self.lingering = Lingering(s, self.guard)
        self.aside = SetAside(s, mail_wake)
        self.claims = Claims(
            s, ledger, clock, guard=self.guard, rules=self.rules, tasks=self.tasks,
            publisher=self.publisher, lingering=self.lingering, aside=self.aside,
            listing=self.listing,
        )
        self.digests = DigestDuty(s, ledger, clock, mail_wake)
        self.originals = Originals(s, self.guard)

    @property
    def pool(self) -> object:
        """The process pool of the workers (for measurements)."""
        return self.judges.pool

    # ---- start and stop ------------------------------------------------------------------

    def run(self, stop: threading.Event) -> int:
        """Recover, then watch and work until ``stop`` is set; finish the cells in hand; 0."""
        from pipeline.station.watcher import InboxWatcher

        # SQLite connections belong to the thread that opened them: open it here
        ledger = Ledger(self.settings.ledger, now=self.clock())
        mail = MailThread(
            self.settings.ledger,
            self.smtp,
            station=self.settings.station_name,
            alerts_to=self.settings.routing.alerts_to,
            domain=self.settings.routing.domain,
            outage_alert_s=self.settings.routing.outage_alert_s,
        )
        self.wire(ledger, mail.wake)
        guard = self.guard
        try:
            death = self.inhand.found_at_start()
            guard.duty(lambda: self.rules.load(first=True))
            # an inbox that is not there is not made here (it may be a share not mounted
            # yet): it is a trouble of that inbox alone, and is watched once it is back
            self.judges.start()
        except BaseException:
            ledger.close()
            raise
        watchers = [
            InboxWatcher(
                [i.folder], self.wake, polling=i.polling, poll_interval_s=i.poll_interval_s
            )
            for i in self.settings.inboxes
        ]
        lots = LotCloser(self.settings, lambda: self.rules.rulebook, self.clock, mail.wake,
                         interval_s=self.settings.reconcile_s * 6)
        plant = StationFeed(self.settings, self.clock)  # forwards the ledger to the plant database
        try:
            guard.duty(lambda: self.after_death(death))
            self.recover()
            for w in watchers:
                w.start()
            mail.start()
            lots.start()
            guard.duty(lambda: plant.start(ledger))
            log.info(
                "station %s watching %s",
                self.settings.station_name,
                ", ".join(str(i.folder) for i in self.settings.inboxes),
            )
            while not stop.is_set():
                self.step()
                for w in watchers:
                    w.supervise()
                if guard.paused or (not self.judges.busy() and not self.tasks.queue):
                    self.wake.wait(min(self.settings.reconcile_s, 1.0))
                    self.wake.clear()
            log.info("stopping: finishing %d cell(s) in hand", self.judges.busy())
            while self.judges.busy():
                self.tasks.collect(timeout=1.0)
            self.guard.duty(self.finish_urgent)
            self.guard.duty(self.finish_renders)
            self.write_heartbeat(state="stopped")
        finally:
            for w in watchers:
                w.stop()
            if lots.is_alive():
                lots.stop()
            plant.stop()
            mail.stop()
            self.judges.shutdown()
            self.inhand.close()
            ledger.close()
        return 0

    def step(self) -> None:
        """One turn of the loop: rules, inboxes, submissions, finished work, digests, heartbeat."""
        guard = self.guard
        guard.duty(self.rules.load)
        now_s = time.monotonic()
        if guard.troubles.due(now_s):
            guard.retry(now_s)
        if not guard.paused:
            if now_s - self.last_reconcile >= self.settings.reconcile_s:
                self.last_reconcile = now_s
                guard.duty(self.claims.reconcile_work)
                self.originals.review()
            guard.duty(lambda: self.claims.scan_inboxes(now_s))
            guard.duty(self.tasks.submit)
        else:  # nothing is claimed, but an inbox that goes away shows all the same
            guard.duty(lambda: self.claims.look_for_inboxes(now_s))
        self.tasks.collect(timeout=0.2 if self.judges.busy() else 0.0)
        if not guard.paused:
            guard.duty(self.render)  # rendered in the workers, written here
            guard.duty(self.digests.queue)
            guard.duty(guard.flush_unsent)
        if now_s - self.last_heartbeat >= self.settings.heartbeat_s:
            self.last_heartbeat = now_s
            self.write_heartbeat()

    def finish_urgent(self, timeout_s: float = 60.0) -> None:
        """At a stop: render the failed and held cells' certificates still waiting (their
        letters wait for them), for ``timeout_s`` at most; passed cells' wait in the ledger for
        the next start."""
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            self.render(urgent_only=True)
            urgent = self.ledger.certificates.waiting(1, most_priority=HELD)
            if not urgent and not self.certificates.in_hand() and not self.cellcerts.in_hand() \
                    and not self.cellcerts.urgent_ready():
                return
            self.wake.wait(0.05)
            self.wake.clear()
        log.warning("stopping with failed or held cells' certificates still to render: "
                    "they are rendered at the next start")

    def finish_renders(self, timeout_s: float = 30.0) -> None:
        """At a stop: write the renders in hand, the records' and the cells' (the rest wait in
        the ledger, or are found again, at the next start)."""
        deadline = time.monotonic() + timeout_s
        while self.certificates.in_hand() or self.cellcerts.in_hand():
            self.certificates.collect()
            self.cellcerts.collect()
            if time.monotonic() >= deadline:
                return
            time.sleep(0.05)

    def render(self, *, urgent_only: bool = False) -> None:
        """Write the certificates the workers rendered; hand the free workers the next ones.

        A worker is free when it has nothing to judge: judging never waits for a PDF. The
        free workers go first to failed and held cells' certificates (the records', whose
        letters attach them, then the cells' own), then to passed cells'.
        """
        self.certificates.collect()
        self.cellcerts.prepare()
        free = self.settings.workers - self.judges.busy() - self.certificates.in_hand()
        free -= self.cellcerts.in_hand()
        if self.tasks.queue or free <= 0:
            return
        free -= self.certificates.submit(free, urgent=True)
        free -= self.cellcerts.submit(free, urgent=True)
        if urgent_only:
            return
        free -= self.certificates.submit(free, urgent=False)
        self.cellcerts.submit(free, urgent=False)

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
                self.publisher.quarantine(row, f"{row.name}: {why}")
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

    def write_heartbeat(self, state: str = "running") -> None:
        """Rewrite the heartbeat file; one that cannot be written is a trouble, not a stop."""
        if state == "running" and self.guard.paused:
            state = "paused"
        beat = {
            "state": state,
            "pid": os.getpid(),
            "station": self.settings.station_name,
            "updated_at": self.clock().isoformat(),
            "started_at": self.started_at.isoformat(),
            "judged_since_start": self.publisher.judged,
            "queued": len(self.tasks.queue),
            "in_flight": self.judges.busy(),
            "rules": [
                f"{rs.name} {rs.revision}"
                for rs in (self.rules.rulebook.rule_sets if self.rules.rulebook else ())
            ],
            "troubles": self.guard.troubles.shown(),
            "last_error": self.guard.last_error,
        }
        try:
            write_heartbeat(self.settings.heartbeat, beat)  # in place when the disk is full
        except OSError as exc:
            trouble = self.guard.troubles.report(
                "heartbeat", f"the heartbeat file cannot be written ({describe(exc)})",
                now=self.clock(), now_s=time.monotonic(), blocking=False,
            )
            if trouble is not None:
                log.error("%s", trouble.reason)
            return
        self.guard.troubles.clear("heartbeat", now=self.clock())

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

            self.guard.duty(clean)
        for row in self.ledger.inputs.in_state("claimed", "judged", "published", "duplicate"):
            if row.final_path is None:
                self.guard.handle(input_key(row.id), "recovering", partial(self.recover_row, row))
        self.guard.duty(self.claims.reconcile_work)
        self.guard.duty(self.decide_behind)

    def decide_behind(self) -> None:
        """Decide the cells whose last record or reading of the past day came in just before a
        crash, before their decision was recorded (a day back: older ones are decided at
        their next record, or when their lot closes)."""
        since = self.clock() - datetime.timedelta(days=1)
        behind = self.ledger.decisions.cells_behind(since)
        if behind:
            log.info("deciding %d cell(s) whose records came in before a restart", len(behind))
            self.cells.decide_cells(behind, "record")

    def recover_row(self, row: InputRow) -> None:
        work = Path(row.work_path)
        publisher = self.publisher
        if row.state == "duplicate":
            publisher.finish(row, "duplicate")
        elif row.state == "published":
            publisher.finish(row, "archived")
        elif row.state == "judged" and self.ledger.readings.exist_for(row.id):
            publisher.keep_readings(row, None)  # its readings are kept: publish them
        elif row.state == "judged":
            task = self.tasks.judge_again(row)
            if task is not None:
                self.tasks.add(row, task)
        elif row.reason:
            publisher.quarantine(row, row.reason)
        elif work.exists():
            self.tasks.add(row)
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
