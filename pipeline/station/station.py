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
"""

from __future__ import annotations

import datetime
import hashlib
import logging
import math
import os
import threading
import time
from collections import deque
from collections.abc import Callable
from functools import partial
from pathlib import Path
from typing import BinaryIO

from pipeline.errors import FormgateError
from pipeline.inputnames import fit, is_text, to_text
from pipeline.judge.evaluate import decision_line
from pipeline.mail.letters import Letter, alert_letter, failure_letter, hold_letter
from pipeline.mail.smtp import SmtpSettings
from pipeline.model import CellResult, VerdictKind
from pipeline.read.limits import TextLimits
from pipeline.rulebook.book import RuleBook, load_rule_set
from pipeline.runner import result_paths
from pipeline.station import faults
from pipeline.station.duties import Duties
from pipeline.station.handoff import Seen, decide, file_looks_complete, is_temporary
from pipeline.station.inhand import DEATHS_TO_QUARANTINE, Death, InHand, input_key, path_key
from pipeline.station.judges import JudgePool
from pipeline.station.ledger import CheckRowData, InputRow, Ledger
from pipeline.station.mailer import MailThread
from pipeline.station.rules_in_force import RulesKeeper
from pipeline.station.setaside import (
    NAME_RESERVE_BYTES,
    SetAside,
    entry_reason,
    move_failed_by_itself,
    unreadable_reason,
    writable,
)
from pipeline.station.settings import InboxSettings, Settings, choose_profile
from pipeline.station.settle_wait import cut_reason
from pipeline.station.taken import UnreadableSource, take_copy
from pipeline.station.troubles import Troubles, describe
from pipeline.station.watcher import list_entries
from pipeline.station.worker import Output, Task
from pipeline.writing import clean_temp_files, move_into, require_folder, write_atomic

log = logging.getLogger("formgate.station")

MB = 2**20
# With a backlog in an inbox, finished files are claimed from the last listing for up to
# this long before the folder is listed again: listing thousands of files on every turn
# of the loop cost more than judging them (and newer files wait behind the backlog anyway).
RELIST_S = 1.0


def utc_now() -> datetime.datetime:
    return datetime.datetime.now(datetime.UTC)


class Station(RulesKeeper, Duties):
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
        try:
            self.duty(lambda: self.after_death(death))
            self.recover()
            for w in watchers:
                w.start()
            mail.start()
            self.mail_wake = mail.wake
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
            row = self.ledger.input(death.input_id)
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

    # ---- claiming ------------------------------------------------------------------------

    def capacity(self) -> int:
        return 4 * self.settings.workers - len(self.queue) - self.judges.busy()

    def scan_inboxes(self, now_s: float) -> None:
        if self.capacity() <= 0 or self.rulebook is None:
            return  # nothing could be claimed: listing a backlog again would only cost time
        for inbox in self.settings.inboxes:
            listed_at, pending = self.ready.get(inbox.name, (-math.inf, deque()))
            if not pending or now_s - listed_at >= RELIST_S:
                pending, listed_at = deque(self.list_inbox(inbox, now_s)), now_s
            while pending and self.capacity() > 0 and not self.troubles.paused:
                name = pending.popleft()
                self.handle(path_key(inbox.folder / name), "claiming",
                            partial(self.claim, inbox, name), retry=False)
            self.ready[inbox.name] = (listed_at, pending)
            if self.capacity() <= 0 or self.troubles.paused:
                return

    def list_inbox(self, inbox: InboxSettings, now_s: float) -> tuple[str, ...]:
        """List one inbox and decide which files are finished; set aside what is no input."""
        try:
            listing = list_entries(inbox.folder)
        except OSError as exc:  # the folder itself: a share gone, no permission
            self.inbox_trouble(inbox, exc)
            return ()
        self.inbox_trouble(inbox, None)
        decision = decide(
            inbox.handover,
            listing.files,
            self.seen[inbox.name],
            now_s,
            settle_s=inbox.settle_s,
            marker_suffix=inbox.marker_suffix,
            orphan_marker_s=inbox.orphan_marker_s,
        )
        self.seen[inbox.name] = dict(decision.seen)
        for marker in decision.orphan_markers:
            data = to_text(marker[: -len(inbox.marker_suffix)])
            self.set_aside(
                inbox, marker, "marker",
                f"{to_text(marker)}: a marker file without its data file (waited "
                f"{inbox.orphan_marker_s:g} s for {data}).\n  Check the cycler's hand-over; "
                "the data file never arrived.",
            )
        for name, other in listing.others.items():
            if not is_temporary(name):
                self.set_aside(inbox, name, other.kind,
                               entry_reason(to_text(name), other.kind, other.points_to))
        ready = tuple(n for n in decision.ready if not self.still_left(inbox, n, listing.files[n]))
        self.alert_overdue(inbox, listing, ready)
        return ready

    def set_aside(self, inbox: InboxSettings, name: str, kind: str, reason: str) -> None:
        path = inbox.folder / name

        def effect() -> None:
            self.aside.entry(self.ledger, path, inbox=inbox.name, kind=kind, reason=reason,
                             now=self.clock())
            self.note_left(inbox, name, path)

        self.handle(path_key(path), "setting aside", effect, retry=False)

    def record_waits(self, inbox: InboxSettings, name: str, fh: BinaryIO, seen: Seen) -> bool:
        """True while a settled file whose record looks cut short still has time to grow.

        A writer that pauses leaves a quiet file ending on a whole line; only its program
        can tell it is not finished (record_end.py). Such a file waits up to
        ``cut_wait_factor`` x ``settle_s``, then is taken (and held as incomplete).
        """
        if self.rulebook is None:
            return False
        text = to_text(name)
        key = path_key(inbox.folder / name)
        why = cut_reason(fh, text, self.rulebook, choose_profile(self.settings, inbox, text))
        if why is None:
            self.cut_noted.pop(key, None)
            return False
        waited_s = time.monotonic() - seen.since_s
        if waited_s < inbox.settle_s * inbox.cut_wait_factor:
            if self.cut_noted.get(key) != seen.since_s:  # said once per quiet spell
                self.cut_noted[key] = seen.since_s
                log.info("%s: %s; waiting up to %g s for the rest of it", text, why,
                         inbox.settle_s * inbox.cut_wait_factor)
            return True
        self.cut_noted.pop(key, None)
        log.warning("%s: %s; taken after %.0f s without change", text, why, waited_s)
        return False

    def claim(self, inbox: InboxSettings, name: str) -> None:
        """Move a finished file into work/ (atomic rename) and record it in the ledger."""
        source = inbox.folder / name
        text = to_text(name)
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
                    if not oversized and self.record_waits(inbox, name, fh, seen):
                        return  # its record ends before its program does: give it longer
                    if oversized:
                        copy = None
                    else:  # judge a copy of its own; the writer's original is watched
                        copy = take_copy(fh, source, self.settings.work, inbox=inbox.name,
                                         name=fit(text, reserve_bytes=NAME_RESERVE_BYTES))
            except FileNotFoundError as exc:
                if exc.filename not in (None, str(source)):
                    raise  # a station folder has gone: the surroundings' fault
                return  # the file has gone: someone took it
            except UnreadableSource as exc:  # moved aside, then it could not be read
                self.aside.entry(self.ledger, exc.path, inbox=inbox.name, kind="file",
                                 reason=unreadable_reason(text, exc.error), now=self.clock())
                return
            except OSError as exc:
                if exc.filename is not None and Path(exc.filename) == source:
                    self.cannot_take(inbox, name, source, exc)  # opening or moving it failed
                    return
                raise  # not the file's fault: writing the copy failed
            if copy is not None:
                self.inbox_of[str(copy.path)] = inbox.name
                faults.point("after_claim")
                self.register(copy.path, text, known=(copy.sha256, copy.size))
                return
        require_folder(self.settings.work)
        try:
            target = move_into(
                source,
                self.settings.work,
                name=fit(text, reserve_bytes=NAME_RESERVE_BYTES),
                make_parents=False,
            )
        except OSError as exc:
            self.cannot_take(inbox, name, source, exc)
            return
        if target is None:
            return
        if inbox.handover == "marker":
            marker = inbox.folder / (name + inbox.marker_suffix)
            try:
                move_into(marker, self.settings.work, name=target.name + inbox.marker_suffix,
                          make_parents=False)
            except OSError as exc:  # the marker is not the input: it is set aside later
                log.warning("%s: its marker stays in the inbox (%s)", text, describe(exc))
        self.inbox_of[str(target)] = inbox.name
        faults.point("after_claim")
        self.register(target, text)

    def cannot_take(self, inbox: InboxSettings, name: str, source: Path, exc: OSError) -> None:
        """Opening or moving an inbox file failed: set it aside, leave it in place, or pause."""
        text = to_text(name)
        if exc.filename2 is None:  # opening it failed (a rename names both paths)
            self.set_aside(inbox, name, "file", unreadable_reason(text, exc))
            return
        if not move_failed_by_itself(exc, source, self.settings.work):
            raise exc
        self.aside.left_in_place(self.ledger, source, inbox=inbox.name, kind="file",
                                 reason=f"{text} was not judged", exc=exc, now=self.clock())
        self.note_left(inbox, name, source)

    def register(
        self, path: Path, name: str | None = None, *, known: tuple[str, int] | None = None
    ) -> None:
        """Ledger claim for a file in work/; duplicates are archived at once, the rest queued.

        ``known``: the SHA-256 and size of a copy the station has just made (not read again).
        """
        name = name or _work_name_text(path.name)
        try:
            if known is None:
                with path.open("rb") as fh:  # streamed: the file is not held in memory
                    size = os.fstat(fh.fileno()).st_size
                    sha = hashlib.file_digest(fh, "sha256").hexdigest()
            else:
                sha, size = known
        except FileNotFoundError:
            return
        except OSError as exc:  # the file's own fault: the station may not read it
            inbox = self.inbox_of.get(str(path), "work")
            self.aside.entry(self.ledger, path, inbox=inbox, kind="file",
                             reason=unreadable_reason(name, exc), now=self.clock())
            return
        row, earlier = self.ledger.claim_input(
            sha256=sha,
            name=name,
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
        self.queue.append((row, None))

    def reconcile_work(self) -> None:
        """Files in work/ the ledger does not know (a crash right after the claim) are registered."""
        known = {task.work_path for _, task in self.judges.tasks()} | {
            r.work_path for r, _ in self.queue
        }
        for name in sorted(list_entries(self.settings.work).files):
            path = self.settings.work / name
            if is_temporary(name) or str(path) in known:
                continue
            if any(
                name.endswith(i.marker_suffix)
                for i in self.settings.inboxes
                if i.handover == "marker"
            ):
                continue
            row = self.ledger.input_by_work_path(str(path))
            if row is None or row.final_path is not None:
                self.handle(path_key(path), "registering", partial(self.register, path),
                            retry=False)

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

    def task_for(
        self,
        row: InputRow,
        rulebook: RuleBook,
        analysed_at: datetime.datetime,
        certify: str,
    ) -> Task:
        profile_name, profile_text = self.profile_for(row)
        s = self.settings
        return Task(
            input_id=row.id,
            work_path=row.work_path,
            name=row.name,
            sha256=row.sha256,
            rulebook=rulebook,
            analysed_at=analysed_at,
            profile_name=profile_name,
            profile_text=profile_text,
            max_uncompressed_bytes=int(s.max_uncompressed_MB * MB),
            certify=certify,
            limits=TextLimits(
                int(s.max_line_kB * 1024), s.max_rows, int(s.max_uncompressed_MB * MB)
            ),
            memory_note=f" (worker_memory_MB = {s.worker_memory_MB:g})",
        )

    def submit(self) -> None:
        while self.queue and self.judges.room() > 0 and self.rulebook is not None:
            row, task = self.queue[0]
            if task is None:
                now = self.clock().replace(microsecond=0)
                task = self.task_for(row, self.rulebook, now, self.settings.certify)
            self.queue.popleft()
            self.judges.submit(row, task)

    def collect(self, timeout: float) -> None:
        """Apply the effects of the tasks that finished (the pool replaces dead workers)."""
        for row, output in self.judges.collect(timeout):
            self.handle(input_key(row.id), "recording", partial(self.apply, row, output))

    # ---- effects, in order ---------------------------------------------------------------

    def apply(self, row: InputRow, output: Output) -> None:
        row = self.ledger.input(row.id) or row  # applied again after a pause: where it stands now
        if row.final_path is not None:
            return
        if output.error is not None:
            if output.bug:
                log.error("%s: internal error\n%s", row.name, output.detail)
            self.quarantine(row, output.error)
            return
        assert output.result is not None and output.json_text is not None
        pdf = output.pdf
        if row.state == "claimed":
            self.record(row, output.result, output.json_text, with_pdf=pdf is not None)
        self.publish(row, output.result, output.json_text, pdf)
        self.judged += 1
        self.mail_wake.set()  # a failure or hold letter is due now that its certificate is there
        r = output.result
        hazards = (
            f" hazard: {', '.join(h.value for h in r.verdict.hazards)}" if r.verdict.hazards else ""
        )
        # a fail or hold names what decided it, as its mail and status do
        decided = "" if r.verdict.passed else f": {decision_line(r.verdict, r.notes)}"
        log.info(
            "%s lot %s: %s%s (%.2f s)%s [%s]",
            r.cell_id,
            r.lot,
            r.verdict.kind.value,
            decided,
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
        # the results and certificates folders must be there; a lot's folder is made in them
        write_atomic(json_text.encode("utf-8"), json_path, make_parents=False)
        if pdf is not None:
            write_atomic(
                pdf, pdf_path, before_rename=lambda: faults.point("mid_render"), make_parents=False
            )
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
        if not row.reason:
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
            self.ledger.record_error(row.id, reason, letters, now=self.clock())
        target = self.settings.quarantine / _final_name(row)
        require_folder(self.settings.quarantine)
        write_atomic(
            _reason_text(row, reason).encode("utf-8"),
            target.with_name(target.name + ".reason.txt"),
            make_parents=False,
        )
        self._move_final(row, target)
        self.ledger.mark_final(row.id, "quarantined", str(target), reason, now=self.clock())
        self.last_error = reason.splitlines()[0]
        log.warning("%s: quarantined: %s", row.name, self.last_error)

    def _move_final(self, row: InputRow, target: Path) -> None:
        work = Path(row.work_path)
        if work.exists():
            move_into(work, target.parent, name=target.name, exact=True, make_parents=False)
        for inbox in self.settings.inboxes:
            marker = work.with_name(work.name + inbox.marker_suffix)
            if inbox.handover == "marker" and marker.exists():
                move_into(marker, target.parent, name=target.name + inbox.marker_suffix,
                          make_parents=False)
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
            self.settings.work,  # a settle-mode copy cut short
        ):

            def clean(folder: Path = folder) -> None:
                for path in clean_temp_files(folder):
                    log.info("removed an unfinished temporary file: %s", path)

            self.duty(clean)
        for row in self.ledger.inputs_in_state("claimed", "judged", "published", "duplicate"):
            if row.final_path is None:
                self.handle(input_key(row.id), "recovering", partial(self.recover_row, row))
        self.duty(self.reconcile_work)

    def recover_row(self, row: InputRow) -> None:
        work = Path(row.work_path)
        if row.state == "duplicate":
            self.finish(row, "duplicate")
        elif row.state == "published":
            self.finish(row, "archived")
        elif row.state == "judged":
            task = self.judge_again(row)
            if task is not None:
                self.queue.append((row, task))
        elif row.reason:
            self.quarantine(row, row.reason)
        elif work.exists():
            self.queue.append((row, None))
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

    def judge_again(self, row: InputRow) -> Task | None:
        """A committed result whose files were not written: the same bytes, the recorded rules."""
        result_row = self.ledger.result_for_input(row.id)
        assert result_row is not None
        stored = self.ledger.text_by_sha(result_row.rule_set_sha256)
        if stored is None:
            rulebook = self.rulebook
        else:
            rulebook = RuleBook((load_rule_set(stored[1], stored[0]),))
        if rulebook is None:  # its rules were never kept and none are valid now: next start
            log.error("%s: its recorded rules are not in the ledger; it waits for valid rules",
                      row.name)
            return None
        return self.task_for(
            row, rulebook, result_row.analysed_at, "all" if result_row.pdf_path else "none"
        )


def _original_name(work_name: str) -> str:
    """The inbox name of a file in work/ (move_into appends ``~N`` on a clash)."""
    base, sep, tail = work_name.rpartition("~")
    return base if sep and tail.isdigit() else work_name


def _work_name_text(work_name: str) -> str:
    """The ledger's text name of a file found in work/ (the station names them as text)."""
    name = _original_name(work_name)
    return name if is_text(name) else to_text(name)


def _final_name(row: InputRow) -> str:
    """Ledger id first, so names never clash and each file leads to its ledger row."""
    return fit(f"{row.id:06d}_{row.name}", reserve_bytes=NAME_RESERVE_BYTES)


def _reason_text(row: InputRow, reason: str) -> str:
    return (
        f"{row.name} was quarantined by formgate.\n\n{reason}\n\n"
        f"ledger input id: {row.id}\nsha256: {row.sha256}\narrived: {row.arrived_at.isoformat()}\n\n"
        "Fix the cause, then drop a corrected file into the inbox (the station judges new bytes;\n"
        "the same bytes again are judged again only if they were quarantined before).\n"
    )


__all__ = ["FormgateError", "Station", "writable"]
