"""The station: claim finished files from the inboxes, judge them in workers, record, publish, archive.

One main thread owns the ledger writes for inputs and results and applies every
effect in a fixed order (docs/station.md):

    claim (rename into work/) -> ledger claim -> worker judges and renders bytes
    -> ONE transaction: result, check rows, outbox rows -> write JSON and PDF
    atomically -> published -> move input to archive/YYYY-MM-DD/ -> archived

A crash anywhere leaves a state that :meth:`Station.recover` completes on the next
start. Events from the folder watcher only wake the loop; a scan of the folders is
the truth. Mail goes out from its own thread (mailer.py).
"""

from __future__ import annotations

import datetime
import hashlib
import json
import logging
import math
import multiprocessing
import os
import threading
import time
from collections import deque
from collections.abc import Callable
from concurrent.futures import FIRST_COMPLETED, Future, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from pathlib import Path

from pipeline import faults
from pipeline.errors import FormgateError
from pipeline.handoff import Seen, decide, file_looks_complete, is_temporary
from pipeline.ledger import CheckRowData, InputRow, Ledger
from pipeline.mail import (
    DigestRow,
    Letter,
    alert_letter,
    digest_letter,
    failure_letter,
    hold_letter,
)
from pipeline.mailer import MailThread
from pipeline.model import CellResult, VerdictKind
from pipeline.rulebook import (
    RuleBook,
    check_profiles_dir,
    check_rules_dir,
    load_rule_set,
    load_rules_dir,
)
from pipeline.runner import result_paths
from pipeline.settings import InboxSettings, Settings, choose_profile
from pipeline.smtp import SmtpSettings
from pipeline.worker import Output, Task, init_worker, run_task
from pipeline.writing import clean_temp_files, move_into, write_atomic

log = logging.getLogger("formgate.station")

MB = 2**20
WORKER_TASKS = 2000  # cells a worker process judges before a new one takes over
# With a backlog in an inbox, finished files are claimed from the last listing for up to
# this long before the folder is listed again: listing thousands of files on every turn
# of the loop cost more than judging them (and newer files wait behind the backlog anyway).
RELIST_S = 1.0


def utc_now() -> datetime.datetime:
    return datetime.datetime.now(datetime.UTC)


class Station:
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
        self.rules_fingerprint: tuple[tuple[str, int, int], ...] = ()
        self.rules_alerted: str = ""
        self.seen: dict[str, dict[str, Seen]] = {i.name: {} for i in settings.inboxes}
        # per inbox: when it was last listed, and the finished files found then but not yet
        # claimed (a backlog is claimed from this list, not by listing the folder every turn)
        self.ready: dict[str, tuple[float, deque[str]]] = {}
        self.queue: deque[InputRow] = deque()
        self.in_flight: dict[Future[Output], tuple[InputRow, Task]] = {}
        self.attempts: dict[int, int] = {}
        self.inbox_of: dict[str, str] = {}  # work path -> inbox name, for its import profile
        self.kill_reasons: dict[int, str] = {}  # input id -> why its worker was stopped
        self.running_since_s: dict[Future[Output], float] = {}  # monotonic start of each task
        self.pool: ProcessPoolExecutor | None = None
        self.started_at = clock()
        self.last_heartbeat = 0.0
        self.last_reconcile = 0.0
        self.judged = 0
        self.last_error: str = ""

    # ---- start and stop ------------------------------------------------------------------

    def load_rules(self, *, first: bool = False) -> None:
        """Load the rules folder if it changed; a broken edit keeps the last good rules in force."""
        folder = self.settings.rules_dir
        files = sorted([*folder.glob("*.toml"), *folder.glob("profiles/*.toml")])
        stats = [(str(p), p.stat()) for p in files]
        fingerprint = tuple((name, st.st_size, st.st_mtime_ns) for name, st in stats)
        if fingerprint == self.rules_fingerprint and not first:
            return
        self.rules_fingerprint = fingerprint
        problems: list[FormgateError] = [
            *check_rules_dir(folder),
            *check_profiles_dir(folder / "profiles"),
        ]
        if problems:
            text = "\n".join(str(p) for p in problems)
            if first or self.rulebook is None:
                raise problems[0]
            log.error("rules edit refused; the last good rules stay in force:\n%s", text)
            key = hashlib.sha256(text.encode()).hexdigest()
            if key != self.rules_alerted and self.settings.routing.alerts_to:
                self.rules_alerted = key
                letter = alert_letter(
                    "rules edit refused, last good rules still in force",
                    "A rule file was edited and is not valid. The station keeps judging with the "
                    f"last good rules until it is fixed.\n\n{text}\n\nFix the file, then check it "
                    "with `formgate rules check` before saving it into the rules folder.",
                    self.settings.routing.alerts_to,
                    station=self.settings.station_name,
                    key=f"rules:{key}",
                    domain=self.settings.routing.domain,
                )
                self.ledger.queue_mail(letter, now=self.clock())
            return
        self.rulebook = load_rules_dir(folder)
        for rs in self.rulebook.rule_sets:
            # keep the exact text in the ledger once per revision, so a restart can re-judge a
            # recorded cell with the rules that judged it; a file edited again since it was
            # loaded no longer matches its hash and is kept at the next reload instead
            data = Path(rs.source).read_bytes()
            if hashlib.sha256(data).hexdigest() == rs.sha256:
                self.ledger.remember_text(
                    kind="rule_set",
                    sha256=rs.sha256,
                    name=Path(rs.source).name,
                    text=data.decode("utf-8"),
                    now=self.clock(),
                )
            log.info(
                "rules in force: %s revision %s (%s, sha256 %s)",
                rs.name,
                rs.revision,
                Path(rs.source).name,
                rs.sha256[:12],
            )

    def _new_pool(self) -> ProcessPoolExecutor:
        ctx = multiprocessing.get_context("forkserver")
        ctx.set_forkserver_preload(["pipeline.worker", "pipeline.runner"])
        # a fresh worker now and then bounds any slow growth of memory in the libraries
        return ProcessPoolExecutor(
            self.settings.workers,
            mp_context=ctx,
            initializer=init_worker,
            initargs=(os.getpid(),),
            max_tasks_per_child=WORKER_TASKS,
        )

    def run(self, stop: threading.Event) -> int:
        """Recover, then watch and work until ``stop`` is set; finish the cells in hand; 0."""
        from pipeline.watcher import InboxWatcher

        # SQLite connections belong to the thread that opened them: open it here
        self.ledger = Ledger(self.settings.ledger, now=self.clock())
        try:
            self.load_rules(first=True)
        except BaseException:
            self.ledger.close()
            raise
        for inbox in self.settings.inboxes:
            inbox.folder.mkdir(parents=True, exist_ok=True)
        self.pool = self._new_pool()
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
        try:
            self.recover()
            for w in watchers:
                w.start()
            mail.start()
            log.info(
                "station %s watching %s",
                self.settings.station_name,
                ", ".join(str(i.folder) for i in self.settings.inboxes),
            )
            while not stop.is_set():
                self.step()
                for w in watchers:
                    w.supervise()
                if not self.in_flight and not self.queue:
                    self.wake.wait(min(self.settings.reconcile_s, 1.0))
                    self.wake.clear()
            log.info("stopping: finishing %d cell(s) in hand", len(self.in_flight))
            while self.in_flight:
                self.collect(timeout=1.0)
            self.write_heartbeat(state="stopped")
        finally:
            for w in watchers:
                w.stop()
            mail.stop()
            if self.pool is not None:
                self.pool.shutdown(wait=True, cancel_futures=True)
            self.ledger.close()
        return 0

    def step(self) -> None:
        """One turn of the loop: rules, inboxes, submissions, finished work, digests, heartbeat."""
        self.load_rules()
        now_s = time.monotonic()
        if now_s - self.last_reconcile >= self.settings.reconcile_s:
            self.last_reconcile = now_s
            self.reconcile_work()
        self.scan_inboxes(now_s)
        self.submit()
        self.collect(timeout=0.2 if self.in_flight else 0.0)
        self.queue_digests()
        if now_s - self.last_heartbeat >= self.settings.heartbeat_s:
            self.last_heartbeat = now_s
            self.write_heartbeat()

    # ---- claiming ------------------------------------------------------------------------

    def capacity(self) -> int:
        return 4 * self.settings.workers - len(self.queue) - len(self.in_flight)

    def scan_inboxes(self, now_s: float) -> None:
        if self.capacity() <= 0:
            return  # nothing could be claimed: listing a backlog again would only cost time
        for inbox in self.settings.inboxes:
            listed_at, pending = self.ready.get(inbox.name, (-math.inf, deque()))
            if not pending or now_s - listed_at >= RELIST_S:
                pending, listed_at = deque(self.list_inbox(inbox, now_s)), now_s
            while pending and self.capacity() > 0:
                self.claim(inbox, pending.popleft())
            self.ready[inbox.name] = (listed_at, pending)
            if self.capacity() <= 0:
                return

    def list_inbox(self, inbox: InboxSettings, now_s: float) -> tuple[str, ...]:
        """List one inbox and decide which files are finished; quarantine orphan markers."""
        from pipeline.watcher import list_folder

        decision = decide(
            inbox.handover,
            list_folder(inbox.folder),
            self.seen[inbox.name],
            now_s,
            settle_s=inbox.settle_s,
            marker_suffix=inbox.marker_suffix,
            orphan_marker_s=inbox.orphan_marker_s,
        )
        self.seen[inbox.name] = dict(decision.seen)
        for marker in decision.orphan_markers:
            self.quarantine_stray(
                inbox.folder / marker,
                f"marker file without its data file "
                f"(waited {inbox.orphan_marker_s:g} s for "
                f"{marker[: -len(inbox.marker_suffix)]})",
            )
        return decision.ready

    def claim(self, inbox: InboxSettings, name: str) -> None:
        """Move a finished file into work/ (atomic rename) and record it in the ledger."""
        source = inbox.folder / name
        if inbox.handover == "settle":
            try:
                with source.open("rb") as fh:
                    stat = os.fstat(fh.fileno())
                    seen = self.seen[inbox.name].get(name)
                    if seen is None or (seen.size, seen.mtime_ns) != (stat.st_size, stat.st_mtime_ns):
                        return  # written to since it was found settled: decide again next listing
                    # an oversized file is claimed as it is: it goes to quarantine unread
                    oversized = stat.st_size > self.settings.max_input_MB * MB
                    if not oversized and not file_looks_complete(fh):
                        return  # quiet but cut short: wait for the writer to finish
            except FileNotFoundError:
                return
        target = move_into(source, self.settings.work)
        if target is None:
            return
        if inbox.handover == "marker":
            marker = inbox.folder / (name + inbox.marker_suffix)
            move_into(marker, self.settings.work, name=target.name + inbox.marker_suffix)
        self.inbox_of[str(target)] = inbox.name
        faults.point("after_claim")
        self.register(target)

    def register(self, path: Path) -> None:
        """Ledger claim for a file in work/; duplicates are archived at once, the rest queued."""
        with path.open("rb") as fh:  # streamed: the file is not held in memory
            size = os.fstat(fh.fileno()).st_size
            sha = hashlib.file_digest(fh, "sha256").hexdigest()
        row, earlier = self.ledger.claim_input(
            sha256=sha,
            name=_original_name(path.name),
            size=size,
            arrived_at=self.clock(),
            work_path=str(path),
        )
        faults.point("after_record_claim")
        if row.state == "duplicate":
            assert earlier is not None
            log.info(
                "%s: same bytes as input %d (%s); archived as a duplicate, not judged again",
                row.name,
                earlier.id,
                earlier.name,
            )
            self.finish(row, "duplicate")
            return
        if size > self.settings.max_input_MB * MB:
            self.quarantine(
                row,
                f"{row.name}: the file is {size / MB:.1f} MB, above the station's "
                f"limit of {self.settings.max_input_MB:g} MB.\n  If such files are "
                "expected, raise max_input_MB in station.toml.",
            )
            return
        self.queue.append(row)

    def reconcile_work(self) -> None:
        """Files in work/ the ledger does not know (a crash right after the claim) are registered."""
        known = {str(r[1].work_path) for r in self.in_flight.values()} | {
            r.work_path for r in self.queue
        }
        for path in sorted(self.settings.work.iterdir()):
            if not path.is_file() or is_temporary(path.name) or str(path) in known:
                continue
            if any(
                path.name.endswith(i.marker_suffix)
                for i in self.settings.inboxes
                if i.handover == "marker"
            ):
                continue
            row = self.ledger.input_by_work_path(str(path))
            if row is None or row.final_path is not None:
                self.register(path)

    # ---- judging -------------------------------------------------------------------------

    def profile_for(self, row: InputRow) -> tuple[str | None, str | None]:
        """The import profile (name, text) for an input, by file-name glob or its inbox's default."""
        inbox_name = self.inbox_of.get(row.work_path)
        inbox = next(
            (i for i in self.settings.inboxes if i.name == inbox_name), self.settings.inboxes[0]
        )
        path = choose_profile(self.settings, inbox, row.name)
        if path is None:
            return None, None
        return path.name, path.read_text(encoding="utf-8")

    def submit(self) -> None:
        assert self.pool is not None and self.rulebook is not None
        while self.queue and len(self.in_flight) < 2 * self.settings.workers:
            row = self.queue.popleft()
            profile_name, profile_text = self.profile_for(row)
            task = Task(
                input_id=row.id,
                work_path=row.work_path,
                name=row.name,
                sha256=row.sha256,
                rulebook=self.rulebook,
                analysed_at=self.clock().replace(microsecond=0),
                profile_name=profile_name,
                profile_text=profile_text,
                max_uncompressed_bytes=int(self.settings.max_uncompressed_MB * MB),
                certify=self.settings.certify,
            )
            self.submit_task(row, task)

    def submit_task(self, row: InputRow, task: Task) -> None:
        assert self.pool is not None
        try:
            future = self.pool.submit(run_task, task)
        except BrokenProcessPool:
            self.pool = self._new_pool()
            future = self.pool.submit(run_task, task)
        self.in_flight[future] = (row, task)

    def collect(self, timeout: float) -> None:
        """Apply the effects of finished tasks; restart the pool after a worker died or hung."""
        if not self.in_flight:
            return
        done, _ = wait(list(self.in_flight), timeout=timeout, return_when=FIRST_COMPLETED)
        broken = []
        for future in done:
            row, task = self.in_flight.pop(future)
            try:
                output = future.result()
            except BrokenProcessPool:
                broken.append((row, task))
                continue
            self.apply(row, output)
        if broken:
            # one dead worker breaks the whole pool: start a new one once, then retry
            if self.pool is not None:
                self.pool.shutdown(wait=False, cancel_futures=True)
            self.pool = self._new_pool()
            for row, task in broken:
                self.retry_or_quarantine(
                    row,
                    task,
                    self.kill_reasons.pop(row.id, "a worker process died while judging it"),
                )
        self.kill_hung_workers()

    def retry_or_quarantine(self, row: InputRow, task: Task, why: str) -> None:
        self.attempts[row.id] = self.attempts.get(row.id, 0) + 1
        if self.attempts[row.id] >= 2:
            self.quarantine(
                row,
                f"{row.name}: {why}; the file was not judged.\n  It may be hostile "
                "or far too large to judge; check it by hand with `formgate check`, or "
                "raise task_timeout_s in station.toml if such files are expected.",
            )
        else:
            log.warning("%s: %s; trying once more", row.name, why)
            self.submit_task(row, task)

    def kill_hung_workers(self) -> None:
        """A task past task_timeout_s takes the pool down with it; the other tasks are retried."""
        # concurrent.futures cannot cancel a running task, so the timeout is enforced by
        # terminating the pool's processes; BrokenProcessPool then reaches every task.
        limit = self.settings.task_timeout_s
        now = time.monotonic()
        started = self.running_since_s
        for future in self.in_flight:
            if future.running():
                started.setdefault(future, now)
        for future, t0 in list(started.items()):
            if future not in self.in_flight:
                del started[future]
            elif now - t0 > limit and self.pool is not None:
                row, _ = self.in_flight[future]
                log.error(
                    "%s: judging took longer than %g s; stopping the workers", row.name, limit
                )
                self.attempts[row.id] = 1  # so this failure quarantines it at once
                self.kill_reasons[row.id] = f"judging took longer than task_timeout_s = {limit:g} s"
                for proc in list(getattr(self.pool, "_processes", {}).values()):
                    proc.kill()
                del started[future]

    # ---- effects, in order ---------------------------------------------------------------

    def apply(self, row: InputRow, output: Output) -> None:
        if output.error is not None:
            if output.bug:
                log.error("%s: internal error\n%s", row.name, output.detail)
            self.quarantine(row, output.error)
            return
        assert output.result is not None and output.json_text is not None
        pdf = output.pdf
        self.record(row, output.result, output.json_text, with_pdf=pdf is not None)
        self.publish(row, output.result, output.json_text, pdf)
        self.judged += 1
        r = output.result
        hazards = (
            f" hazard: {', '.join(h.value for h in r.verdict.hazards)}" if r.verdict.hazards else ""
        )
        log.info(
            "%s lot %s: %s (%.2f s)%s [%s]",
            r.cell_id,
            r.lot,
            r.verdict.kind.value,
            output.seconds,
            hazards,
            row.name,
        )

    def output_paths(self, result: CellResult) -> tuple[Path, Path]:
        return result_paths(self.settings.results, self.settings.certificates, result)

    def letters(self, result: CellResult, pdf_path: Path) -> list[Letter]:
        routing, station = self.settings.routing, self.settings.station_name
        kind = result.verdict.kind
        if kind is VerdictKind.FAIL and routing.failures_to:
            return [
                failure_letter(
                    result,
                    str(pdf_path),
                    routing.failures_to,
                    station=station,
                    domain=routing.domain,
                )
            ]
        if kind is VerdictKind.HOLD and routing.holds_to:
            return [
                hold_letter(
                    result, str(pdf_path), routing.holds_to, station=station, domain=routing.domain
                )
            ]
        return []

    def record(
        self, row: InputRow, result: CellResult, json_text: str, *, with_pdf: bool = True
    ) -> None:
        """ONE transaction: result, check rows, outbox rows (the rule text was kept at load)."""
        json_path, pdf_path = self.output_paths(result)
        self.ledger.record_result(
            row.id,
            cell_id=result.cell_id,
            lot=result.lot,
            verdict=result.verdict.kind.value,
            hazards=[h.value for h in result.verdict.hazards],
            result_json=json_text,
            checks=[CheckRowData.from_check(c) for c in result.verdict.checks],
            rule_set_name=result.rule_set.name,
            rule_set_revision=result.rule_set.revision,
            rule_set_sha256=result.rule_set.sha256,
            analysed_at=result.analysed_at,
            json_path=str(json_path),
            pdf_path=str(pdf_path) if with_pdf else None,
            mails=self.letters(result, pdf_path),
        )
        faults.point("after_commit")

    def publish(self, row: InputRow, result: CellResult, json_text: str, pdf: bytes | None) -> None:
        json_path, pdf_path = self.output_paths(result)
        write_atomic(json_text.encode("utf-8"), json_path)
        if pdf is not None:
            write_atomic(pdf, pdf_path, before_rename=lambda: faults.point("mid_render"))
        self.ledger.mark_published(row.id)
        faults.point("after_publish")
        self.finish(self.ledger.input(row.id) or row, "archived")

    def finish(self, row: InputRow, state: str) -> None:
        """Move the input (and its marker) from work/ to archive/YYYY-MM-DD/ and record it."""
        day = row.arrived_at.astimezone(datetime.UTC).strftime("%Y-%m-%d")
        target = self.settings.archive / day / _final_name(row)
        self._move_final(row, target)
        self.ledger.mark_final(row.id, state, str(target), now=self.clock())

    def quarantine(self, row: InputRow, reason: str) -> None:
        """Record why, move the input to quarantine/ with a .reason.txt beside it, record where."""
        letters = []
        if self.settings.routing.alerts_to:
            letters.append(
                alert_letter(
                    f"file quarantined: {row.name}",
                    reason,
                    self.settings.routing.alerts_to,
                    station=self.settings.station_name,
                    key=f"quarantine:{row.sha256}:{row.id}",
                    domain=self.settings.routing.domain,
                )
            )
        if not row.reason:
            self.ledger.record_error(row.id, reason, letters, now=self.clock())
        target = self.settings.quarantine / _final_name(row)
        write_atomic(
            _reason_text(row, reason).encode("utf-8"), target.with_name(target.name + ".reason.txt")
        )
        self._move_final(row, target)
        self.ledger.mark_final(row.id, "quarantined", str(target), reason, now=self.clock())
        self.last_error = reason.splitlines()[0]
        log.warning("%s: quarantined: %s", row.name, self.last_error)

    def quarantine_stray(self, path: Path, why: str) -> None:
        """A file that is not an input (a lone marker) goes to quarantine with its reason."""
        target = move_into(path, self.settings.quarantine)
        if target is not None:
            text = f"{path.name}: {why}.\n  Check the cycler's hand-over; the data file never arrived.\n"
            write_atomic(text.encode(), target.with_name(target.name + ".reason.txt"))
            log.warning("%s: quarantined: %s", path.name, why)

    def _move_final(self, row: InputRow, target: Path) -> None:
        work = Path(row.work_path)
        if work.exists():
            move_into(work, target.parent, name=target.name, exact=True)
        for inbox in self.settings.inboxes:
            marker = work.with_name(work.name + inbox.marker_suffix)
            if inbox.handover == "marker" and marker.exists():
                move_into(marker, target.parent, name=target.name + inbox.marker_suffix)
        faults.point("after_archive_move")

    # ---- recovery ------------------------------------------------------------------------

    def recover(self) -> None:
        """Complete whatever a crash interrupted; clean temp files; queue unjudged work."""
        for folder in (
            self.settings.results,
            self.settings.certificates,
            self.settings.archive,
            self.settings.quarantine,
            self.settings.mail,
        ):
            for path in clean_temp_files(folder):
                log.info("removed an unfinished temporary file: %s", path)
        for row in self.ledger.inputs_in_state("claimed", "judged", "published", "duplicate"):
            if row.final_path is not None:
                continue
            work = Path(row.work_path)
            if row.state == "duplicate":
                self.finish(row, "duplicate")
            elif row.state == "published":
                self.finish(row, "archived")
            elif row.state == "judged":
                self.republish(row)
            elif row.reason:
                self.quarantine(row, row.reason)
            elif work.exists():
                self.queue.append(row)
            else:
                quarantined = self.settings.quarantine / _final_name(row)
                if quarantined.exists():
                    self.ledger.mark_final(
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
        self.reconcile_work()

    def republish(self, row: InputRow) -> None:
        """A committed result whose files were not written: judge again with the recorded rules."""
        result_row = self.ledger.result_for_input(row.id)
        assert result_row is not None
        stored = self.ledger.text_by_sha(result_row.rule_set_sha256)
        if stored is None:
            rulebook = self.rulebook
        else:
            rulebook = RuleBook((load_rule_set(stored[1], stored[0]),))
        assert rulebook is not None
        profile_name, profile_text = self.profile_for(row)
        task = Task(
            row.id,
            row.work_path,
            row.name,
            row.sha256,
            rulebook,
            result_row.analysed_at,
            profile_name,
            profile_text,
            int(self.settings.max_uncompressed_MB * MB),
            certify="all" if result_row.pdf_path else "none",
        )
        output = run_task(task)
        if output.result is None or output.json_text is None:
            log.error("%s: re-judging a recorded cell failed: %s", row.name, output.error)
            return
        self.publish(row, output.result, output.json_text, output.pdf)

    # ---- digests and heartbeat ------------------------------------------------------------

    def queue_digests(self) -> None:
        routing = self.settings.routing
        if not routing.digests_to:
            return
        now = self.clock()
        for lot in self.ledger.pending_digest_lots():
            latest = self.ledger.latest_activity(lot)
            if latest is not None and (now - latest).total_seconds() < routing.digest_quiet_s:
                continue
            cells = self.ledger.passed_cells_for_digest(lot)
            if not cells:
                continue
            rows = [
                DigestRow(
                    c.cell_id,
                    c.verdict,
                    json.loads(c.result_json)["metrics"].get("grading_capacity_Ah"),
                    c.pdf_path or "",
                )
                for c in cells
            ]
            letter = digest_letter(
                lot,
                rows,
                routing.digests_to,
                station=self.settings.station_name,
                digest_no=self.ledger.digest_count(lot) + 1,
                domain=routing.domain,
            )
            self.ledger.queue_digest(letter, [c.id for c in cells], now=now)
            log.info("digest queued for lot %s: %d passed cell(s)", lot, len(cells))

    def write_heartbeat(self, state: str = "running") -> None:
        beat = {
            "state": state,
            "pid": os.getpid(),
            "station": self.settings.station_name,
            "updated_at": self.clock().isoformat(),
            "started_at": self.started_at.isoformat(),
            "judged_since_start": self.judged,
            "queued": len(self.queue),
            "in_flight": len(self.in_flight),
            "rules": [
                f"{rs.name} {rs.revision}"
                for rs in (self.rulebook.rule_sets if self.rulebook else ())
            ],
            "last_error": self.last_error,
        }
        write_atomic(
            (json.dumps(beat, indent=2) + "\n").encode(), self.settings.heartbeat, sync=False
        )


def _original_name(work_name: str) -> str:
    """The inbox name of a file in work/ (move_into appends ``~N`` on a clash)."""
    base, sep, tail = work_name.rpartition("~")
    return base if sep and tail.isdigit() else work_name


def _final_name(row: InputRow) -> str:
    """Ledger id first, so names never clash and each file leads to its ledger row."""
    return f"{row.id:06d}_{row.name}"


def _reason_text(row: InputRow, reason: str) -> str:
    return (
        f"{row.name} was quarantined by formgate.\n\n{reason}\n\n"
        f"ledger input id: {row.id}\nsha256: {row.sha256}\narrived: {row.arrived_at.isoformat()}\n\n"
        "Fix the cause, then drop a corrected file into the inbox (the station judges new bytes;\n"
        "the same bytes again are judged again only if they were quarantined before).\n"
    )


__all__ = ["FormgateError", "Station"]
