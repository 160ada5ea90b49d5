"""The station's certificate queue: a judged file's verdict at once, its certificate when a worker is free.

A burst of files (a rack finishing together) must not wait for PDFs to learn which cells
failed. So a station records a file's result, writes its result JSON and archives the
input as soon as the file is judged (publishing.py), and the certificate is *promised* in
the same ledger transaction: a row of the ledger's certificate queue
(ledger/certificates.py). This duty of the main loop renders the promised certificates in
the judge pool's worker processes, only when a worker has nothing to judge, failed cells
first, then held, then passed (the station's loop hands out the free workers:
station.py), and writes each PDF atomically, records it as published, and marks the row
rendered, which makes the letters that attach it due.

The judged result comes back from the worker with its verdict and is kept in memory for
its render (``KEEP`` failed and held cells' whole, ``KEEP_PASSED`` passed cells' without the
plots their one-page certificate never draws); a certificate whose result is not in memory
(after a restart, or past those in a long burst) is rendered by judging the archived input
again under the rules it was recorded with (the same bytes, checked by their SHA-256),
so a certificate promised is never lost. Either way the certificate carries the
verification code of the result JSON that was published.

A render that comes back with an error is given up: the ledger records why, and the
letters that would attach it go without it and say so. A render lost with its worker or
pool is asked for again, and given up after ``LOSSES_TO_GIVE_UP`` losses.
"""

from __future__ import annotations

import dataclasses
import datetime
import json
import logging
import threading
import time
from collections import OrderedDict
from collections.abc import Callable
from concurrent.futures import Future
from dataclasses import dataclass
from pathlib import Path

from pipeline.acceptance.results import CellResult
from pipeline.ledger.certificates import HELD, PASSED
from pipeline.ledger.ledger import Ledger
from pipeline.ledger.rows import InputRow
from pipeline.names import cell_file_stem
from pipeline.read.readings import ReadingFile
from pipeline.station import faults
from pipeline.station.channelwatch import suspect_notes
from pipeline.station.judges import JudgePool
from pipeline.station.published_files import Written, note_written
from pipeline.station.worker import Task, as_drawn, judge_task, render_certificate
from pipeline.writing import write_atomic

log = logging.getLogger("formgate.station")

KEEP = 256  # failed and held cells' judged results kept for their render (about 0.1 MB each)
# passed cells' results kept for theirs, without the plots a passed cell's certificate never
# draws (worker.as_drawn, about 20 kB each in memory): a rack's burst of passes is rendered
# from memory, not judged again from its archived input
KEEP_PASSED = 2048
LOSSES_TO_GIVE_UP = 3  # renders lost with their worker before the certificate is given up
LOST_AFTER_S = 600.0  # a render not back after this long counts as lost


@dataclass(frozen=True, slots=True)
class RecordJob:
    """One certificate to render in a worker: the judged result, or the task that judges it again.

    ``json_text`` is the result JSON as published (the certificate carries its code);
    ``cell_name`` the file name of the cell's own certificate, which the page names.
    """

    result_id: int
    json_text: str
    cell_name: str
    result: CellResult | None = None
    task: Task | None = None
    channel_note: str = ""  # its channel was suspect as it was judged (channelwatch.py)


@dataclass(frozen=True, slots=True)
class Rendered:
    """A rendered certificate's bytes, or why it could not be rendered."""

    pdf: bytes | None
    error: str | None = None


def render_record(job: RecordJob) -> Rendered:
    """Render one record's certificate in a worker process; never raises (a bug is an error)."""
    try:
        result = job.result
        if result is None:
            assert job.task is not None
            judged = judge_task(job.task)
            if isinstance(judged, ReadingFile):
                return Rendered(None, "the archived input now reads as aging readings")
            result = judged
        return Rendered(render_certificate(result, job.json_text, job.cell_name, job.channel_note))
    except Exception as exc:
        return Rendered(None, f"{type(exc).__name__}: {exc}")


class RecordCertificates:
    """Render the certificates promised in the ledger, most urgent first, when workers are free."""

    def __init__(
        self,
        ledger: Ledger,
        clock: Callable[[], datetime.datetime],
        judges: JudgePool,
        wake: threading.Event,
        mail_wake: threading.Event,
        task_for: Callable[[InputRow], Task | None],
    ) -> None:
        self.ledger = ledger
        self.clock = clock
        self.judges = judges
        self.wake = wake
        self.mail_wake = mail_wake
        self.task_for = task_for  # the task that judges a recorded input again (tasks.py)
        self.kept: OrderedDict[int, CellResult] = OrderedDict()  # failed and held: whole
        self.kept_passed: OrderedDict[int, CellResult] = OrderedDict()  # as their certificate draws them
        self.in_flight: dict[int, tuple[Future[Rendered], object, float]] = {}
        self.rendered = 0  # since the station started

    def keep(self, result_id: int, result: CellResult) -> None:
        """A result just judged and recorded: kept for its certificate's render."""
        drawn = as_drawn(result)
        kept, most = (self.kept, KEEP) if drawn is result else (self.kept_passed, KEEP_PASSED)
        kept[result_id] = drawn
        kept.move_to_end(result_id)
        while len(kept) > most:
            kept.popitem(last=False)  # rendered later by judging its input again

    def forget(self, result_id: int) -> None:
        """A certificate rendered or given up: its result is not needed any more."""
        self.kept.pop(result_id, None)
        self.kept_passed.pop(result_id, None)

    def in_hand(self) -> int:
        """Renders handed to the workers and not yet back."""
        return len(self.in_flight)

    # ---- handing out -----------------------------------------------------------------------

    def submit(self, slots: int, *, urgent: bool) -> int:
        """Hand up to ``slots`` waiting certificates to the workers (``urgent``: failed and
        held cells' only); how many were handed."""
        if slots <= 0:
            return 0
        most = HELD if urgent else PASSED
        used = 0
        for waiting in self.ledger.certificates.waiting(slots + len(self.in_flight), most_priority=most):
            if used >= slots:
                break
            if waiting.result_id in self.in_flight:
                continue
            job = self.job(waiting.result_id)
            if job is None:
                continue
            pool = self.judges.pool
            future = self.judges.run_aside(render_record, job)
            if future is None:  # no pool in service now: next turn
                break
            future.add_done_callback(lambda _: self.wake.set())
            self.in_flight[waiting.result_id] = (future, pool, time.monotonic())
            used += 1
        return used

    def job(self, result_id: int) -> RecordJob | None:
        """The render of ``result_id``'s certificate, or None (given up, or not possible yet)."""
        record = self.ledger.results.get(result_id)
        if record is None or record.pdf_path is None:
            self.give_up(result_id, "its result has no certificate path")
            return None
        cell_name = f"{cell_file_stem(record.cell_id)}.pdf"
        note = next(iter(suspect_notes(self.ledger, [record], [json.loads(record.result_json)],
                                       record_words=False)), "")
        result = self.kept.get(result_id) or self.kept_passed.get(result_id)
        if result is not None:
            return RecordJob(result_id, record.result_json, cell_name, result=result, channel_note=note)
        row = self.ledger.inputs.get(record.input_id)
        if row is None or row.state == "quarantined":
            self.give_up(result_id, "its input was quarantined after it was judged")
            return None
        if row.final_path is None:
            return None  # being judged again after a restart: kept once it is (``keep``)
        task = self.task_for(row)
        if task is None:  # its rules are not in the ledger and none are valid now: later
            return None
        task = dataclasses.replace(task, work_path=row.final_path)  # archived by now
        return RecordJob(result_id, record.result_json, cell_name, task=task, channel_note=note)

    # ---- what came back --------------------------------------------------------------------

    def collect(self) -> None:
        """Write what the workers rendered; ask again for what was lost."""
        now_s = time.monotonic()
        for result_id, (future, pool, since) in list(self.in_flight.items()):
            if not future.done():
                if self.judges.pool is not pool or now_s - since > LOST_AFTER_S:
                    del self.in_flight[result_id]  # its pool was replaced: ask again
                    self.lose(result_id)
                continue
            del self.in_flight[result_id]
            if future.cancelled() or future.exception() is not None:
                self.lose(result_id)
                continue
            rendered = future.result()
            if rendered.pdf is None:
                self.give_up(result_id, rendered.error or "the render returned nothing")
                continue
            self.publish(result_id, rendered.pdf)

    def lose(self, result_id: int) -> None:
        losses = self.ledger.certificates.lost(result_id)
        if losses >= LOSSES_TO_GIVE_UP:
            self.give_up(
                result_id,
                f"its render was lost {losses} times with its worker process (a worker died or "
                "the pool was replaced while it rendered)",
            )

    def give_up(self, result_id: int, error: str) -> None:
        log.error("result %d: its certificate could not be rendered: %s", result_id, error)
        self.ledger.certificates.give_up(result_id, error, now=self.clock())
        self.forget(result_id)
        self.mail_wake.set()  # its letters go without it

    def publish(self, result_id: int, pdf: bytes) -> None:
        """Write the certificate where its result says now (a retest may have moved it to a
        ``~record-N`` name meanwhile), record it as published, and mark it rendered."""
        record = self.ledger.results.get(result_id)
        if record is None or record.pdf_path is None:
            return
        path = Path(record.pdf_path)
        write_atomic(pdf, path, before_rename=lambda: faults.point("mid_render"), make_parents=False)
        note_written(
            self.ledger, [Written(path, pdf, "certificate")], now=self.clock(), lot=record.lot,
            cell_id=record.cell_id, result_id=result_id,
        )
        faults.point("after_certificate")
        self.ledger.certificates.rendered(result_id, now=self.clock())
        self.forget(result_id)
        self.rendered += 1
        self.mail_wake.set()  # the letters that attach it are due now
        log.info("%s lot %s: certificate %s (%s)", record.cell_id, record.lot, path.name,
                 record.verdict)
