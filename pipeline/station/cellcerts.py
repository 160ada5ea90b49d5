"""The station's cell certificates: publish each cell's certificate and JSON once its rows change.

A duty of the station's main loop that never renders there. A cell is a *candidate*
when a decision on it is recorded (any thread or process: the ledger's decisions after
the last one seen are read each turn), when one of its records or readings came in (its
content may change without a new decision: a retest that passes as the first did, one
reading more), and at start-up (every cell decided in the past week, every cell recorded
in the past day: a crash or a stop may have come between its decision and its
certificate). For each candidate, in the main thread, the cell's summary and JSON are
built from the ledger (about a millisecond); a cell whose published JSON is that very
text is done. The others' certificates are rendered in the judge pool's worker processes
(cellpublish.render_job, about 0.2 s each) when a worker has nothing to judge: the
station's loop hands out its free workers, failed and held cells' certificates (these and
the records' of certqueue.py) before passed ones; the main thread then writes JSON and
certificate atomically and records both (cellpublish.py), and wakes the mail thread (a
letter that names the cell's certificate waits for it).

A render the pool lost (a worker died, the pool was replaced) is asked for again; one that
failed is logged and left until the cell changes again, or the next start.
"""

from __future__ import annotations

import datetime
import logging
import threading
import time
from collections.abc import Callable
from concurrent.futures import Future

from pipeline.errors import FormgateError
from pipeline.ledger.ledger import Ledger
from pipeline.station import faults
from pipeline.station.cellpublish import CellJob, CellRendered, job_for, render_job, write_and_record
from pipeline.station.judges import JudgePool
from pipeline.station.rules_in_force import RulesInForce
from pipeline.station.settings import Settings

log = logging.getLogger("formgate.station")

DECIDED_BACK = datetime.timedelta(days=7)  # at start: cells decided since, checked again
RECORDED_BACK = datetime.timedelta(days=1)  # at start: cells recorded since, checked again
CHECKS_PER_TURN = 50  # candidates looked at per turn of the loop, so a turn stays short
LOST_AFTER_S = 600.0  # a render not back after this long is asked for again

Key = tuple[str, str]


class CellCertificates:
    """Keep every cell's certificate and JSON showing what its ledger rows give now."""

    def __init__(
        self,
        settings: Settings,
        ledger: Ledger,
        clock: Callable[[], datetime.datetime],
        rules: RulesInForce,
        judges: JudgePool,
        wake: threading.Event,
        mail_wake: threading.Event | None = None,
    ) -> None:
        self.settings = settings
        self.ledger = ledger
        self.clock = clock
        self.rules = rules
        self.judges = judges
        self.wake = wake
        self.mail_wake = mail_wake
        self.candidates: dict[Key, None] = {}  # in the order they came
        self.ready: dict[Key, CellJob] = {}  # looked at, waiting for a free worker
        self.in_flight: dict[Key, tuple[Future[CellRendered], CellJob, object, float]] = {}
        self.failed: dict[Key, str] = {}  # cell -> the JSON text whose render failed
        self.seen = 0  # the last decision id read
        self.started = False

    # ---- candidates ---------------------------------------------------------------------------

    def note(self, lot: str, cell_id: str) -> None:
        """A record or reading of the cell came in: check its certificate (CellDecisions calls this)."""
        self.candidates[(lot, cell_id)] = None
        self.ready.pop((lot, cell_id), None)  # looked at again

    def start(self) -> None:
        """The cells a stop or crash may have left behind: decided in the past week, or
        recorded in the past day."""
        now = self.clock()
        decided = self.ledger.decisions.decided_after(0, now - DECIDED_BACK)
        for lot, cell, _ in decided:
            self.candidates[(lot, cell)] = None
        for key in self.ledger.decisions.cells_recorded_since(now - RECORDED_BACK):
            self.candidates[key] = None
        # later decisions are candidates as they come (poll); with none lately, the last of all
        latest = decided or self.ledger.decisions.decided_after(0)
        self.seen = max((d for _, _, d in latest), default=0)
        self.started = True
        if self.candidates:
            log.info("checking the cell certificates of %d cell(s) decided or recorded lately",
                     len(self.candidates))

    def poll(self) -> None:
        """Every decision recorded since the last turn makes its cell a candidate."""
        for lot, cell, decision_id in self.ledger.decisions.decided_after(self.seen):
            self.candidates[(lot, cell)] = None
            self.ready.pop((lot, cell), None)
            self.seen = max(self.seen, decision_id)

    # ---- the loop's turn ----------------------------------------------------------------------

    def prepare(self) -> None:
        """Publish what the workers rendered, then look at the next candidates (the station's
        loop then hands out free workers: :meth:`submit`)."""
        if not self.started:
            self.start()
        self.collect()
        self.poll()
        self.look()

    def pending(self) -> int:
        """Cells waiting for their certificate: candidates, looked at, and renders in hand."""
        return len(self.candidates) + len(self.ready) + len(self.in_flight)

    def in_hand(self) -> int:
        """Renders handed to the workers and not yet back."""
        return len(self.in_flight)

    def urgent_ready(self) -> bool:
        """Whether a failed or held cell's certificate waits for a worker."""
        return any(job.summary.decision.verdict != "pass" for job in self.ready.values())

    def look(self) -> None:
        """Build the jobs of up to CHECKS_PER_TURN candidates: a cell whose published JSON is
        what its rows give now is done, one with no certificate is published at once."""
        rulebook = self.rules.rulebook
        if rulebook is None:
            return
        checked = 0
        for key in list(self.candidates):
            if checked >= CHECKS_PER_TURN:
                return
            if key in self.in_flight:
                continue  # checked again once its render is back
            del self.candidates[key]
            checked += 1
            try:
                job = job_for(self.settings, self.ledger, rulebook, *key)
            except FormgateError as exc:  # e.g. its cell type is in no rule set any more
                log.error("cell %s of lot %s: no cell certificate: %s", key[1], key[0], exc)
                continue
            if job is None or self.failed.get(key) == job.json_text:
                continue
            if not job.certificate:
                self.publish(job, CellRendered(None))  # the JSON alone: no render to wait for
                continue
            self.ready[key] = job

    def submit(self, slots: int, *, urgent: bool) -> int:
        """Hand up to ``slots`` looked-at cells to the workers (``urgent``: failed and held
        cells' only); how many were handed."""
        used = 0
        for key, job in list(self.ready.items()):
            if used >= slots:
                break
            if key in self.in_flight or (urgent and job.summary.decision.verdict == "pass"):
                continue
            pool = self.judges.pool
            future = self.judges.run_aside(render_job, job)
            if future is None:  # no pool in service now: next turn
                break
            del self.ready[key]
            future.add_done_callback(lambda _: self.wake.set())
            self.in_flight[key] = (future, job, pool, time.monotonic())
            used += 1
        return used

    def collect(self) -> None:
        now_s = time.monotonic()
        for key, (future, job, pool, since) in list(self.in_flight.items()):
            if not future.done():
                if self.judges.pool is not pool or now_s - since > LOST_AFTER_S:
                    del self.in_flight[key]  # its pool was replaced: ask again
                    self.candidates[key] = None
                continue
            del self.in_flight[key]
            if future.cancelled() or future.exception() is not None:
                self.candidates[key] = None  # lost with its worker or pool: ask again
                continue
            rendered = future.result()
            if rendered.error:
                log.error("cell %s of lot %s: its certificate could not be rendered: %s",
                          key[1], key[0], rendered.error)
                self.failed[key] = job.json_text
                continue
            self.publish(job, rendered)

    def publish(self, job: CellJob, rendered: CellRendered) -> None:
        """Write and record a rendered cell, unless its rows changed while it was rendered
        (then it is a candidate again, and this render is dropped)."""
        key = job.key
        latest = self.ledger.decisions.latest(*key)
        if latest is None or latest.id != job.summary.decision.id:
            self.candidates[key] = None
            return
        faults.point("before_cell_publish")
        try:
            write_and_record(self.settings, self.ledger, job, rendered.pdf, self.clock())
        except BaseException:
            self.candidates[key] = None  # still to publish once the fault has passed
            raise
        self.failed.pop(key, None)
        if self.mail_wake is not None:
            self.mail_wake.set()  # a letter that names this certificate may be due now
        s = job.summary
        log.info("cell %s lot %s: cell certificate %s (decision %d, %s)", s.cell_id, s.lot,
                 s.certificate_name or s.json_name, s.decision.id, s.decision.verdict)
