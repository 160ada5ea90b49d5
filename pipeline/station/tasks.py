"""The worker side of the station: tasks for the judge pool, handed over and collected.

A claimed input waits in the queue until the pool has room; its task names the rules,
import profile and limits it is judged under (and renders no certificate: those come
from the certificate queue, certqueue.py). A finished task's output is applied in
the main thread (publishing.py); a result committed but not written is judged again
under the rules it was recorded with. The pool itself, its processes, timeouts and
deaths, is judges.py's; what a worker does with a task is worker.py's.
"""

from __future__ import annotations

import datetime
import logging
import time
from collections import deque
from collections.abc import Callable
from functools import partial

from pipeline.ledger.ledger import Ledger
from pipeline.ledger.rows import InputRow
from pipeline.read.limits import TextLimits
from pipeline.rulebook.book import RuleBook, load_rule_set
from pipeline.station.guard import Guard
from pipeline.station.inhand import input_key
from pipeline.station.judges import JudgePool
from pipeline.station.publishing import Publisher
from pipeline.station.rules_in_force import RulesInForce
from pipeline.station.settings import InboxSettings, Settings, channel_classes, choose_profile
from pipeline.station.worker import Task

log = logging.getLogger("formgate.station")

MB = 2**20
WORKERS_TROUBLE = "workers"  # the key of the trouble a failing worker launcher shows


class Tasks:
    """The claimed inputs waiting for a worker, handed to the judge pool and collected."""

    def __init__(
        self,
        settings: Settings,
        ledger: Ledger,
        clock: Callable[[], datetime.datetime],
        judges: JudgePool,
        rules: RulesInForce,
        publisher: Publisher,
        guard: Guard,
    ) -> None:
        self.settings = settings
        self.ledger = ledger
        self.clock = clock
        self.judges = judges
        self.rules = rules
        self.publisher = publisher
        self.guard = guard
        self.queue: deque[tuple[InputRow, Task | None]] = deque()  # a task given: judge again
        self.inbox_of: dict[str, str] = {}  # work path -> inbox name, for its import profile

    def note_inbox(self, work_path: str, inbox: str) -> None:
        """Remember which inbox a file taken into work/ came from (its import profile)."""
        self.inbox_of[work_path] = inbox

    def inbox_for(self, work_path: str) -> str:
        """The inbox a file in work/ came from; 'work' for one found there after a restart."""
        return self.inbox_of.get(work_path, "work")

    def add(self, row: InputRow, task: Task | None = None) -> None:
        """Queue a claimed input (with ``task``: judge it again under that task's rules)."""
        self.queue.append((row, task))

    def room(self) -> int:
        """How many more inputs the station should claim now: four per worker in all."""
        return 4 * self.settings.workers - len(self.queue) - self.judges.busy()

    def in_hand(self) -> set[str]:
        """The work paths queued or being judged."""
        return {task.work_path for _, task in self.judges.tasks()} | {
            r.work_path for r, _ in self.queue
        }

    def inbox_settings(self, row: InputRow) -> InboxSettings:
        """The inbox an input came from (the first inbox for one found in work/ at a restart)."""
        inbox_name = self.inbox_of.get(row.work_path)
        return next(
            (i for i in self.settings.inboxes if i.name == inbox_name), self.settings.inboxes[0]
        )

    def profile_for(self, row: InputRow) -> tuple[str | None, str | None]:
        """The import profile (name, text) for an input, by file-name glob or its inbox's default."""
        inbox = self.inbox_settings(row)
        path = choose_profile(self.settings, inbox, row.name)
        if path is None:
            return None, None
        return path.name, path.read_text(encoding="utf-8")

    def task_for(
        self,
        row: InputRow,
        rulebook: RuleBook,
        analysed_at: datetime.datetime,
        certify: str = "none",
    ) -> Task:
        """The task that judges ``row``; a station's renders no certificate (certqueue.py)."""
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
            ledger_path=str(s.ledger),
            accuracy=channel_classes(s, self.inbox_settings(row).name),
        )

    def submit(self) -> None:
        while self.queue and self.judges.room() > 0 and self.rules.rulebook is not None:
            row, task = self.queue[0]
            if task is None:
                now = self.clock().replace(microsecond=0)
                task = self.task_for(row, self.rules.rulebook, now)
            self.queue.popleft()
            self.judges.submit(row, task)

    def collect(self, timeout: float) -> None:
        """Apply the effects of the tasks that finished (the pool replaces dead workers)."""
        for row, output in self.judges.collect(timeout):
            self.guard.handle(input_key(row.id), "recording", partial(self.publisher.apply, row, output))
        self.show_workers_trouble()

    def show_workers_trouble(self) -> None:
        """A worker launcher that keeps dying, or workers that cannot be started, is a trouble
        shown in status (it pauses nothing) and alerted once, until it has been quiet."""
        guard, now_s = self.guard, time.monotonic()
        trouble = self.judges.trouble(now_s)
        if trouble is None:
            ended = guard.troubles.clear(WORKERS_TROUBLE, now=self.clock())
            if ended is not None:
                log.warning("the worker processes are well again (%s)", ended.shown())
            return
        begun = guard.troubles.report(
            WORKERS_TROUBLE, trouble.reason, now=self.clock(), now_s=now_s, blocking=False
        )
        if begun is None:
            guard.troubles.reword(WORKERS_TROUBLE, trouble.reason)  # (a count that went up)
            return
        log.error("%s", trouble.reason)
        if not begun.repeated:
            guard.alert(
                trouble.subject, f"{trouble.reason[0].upper()}{trouble.reason[1:]}.\n\n{trouble.advice}",
                key=f"workers:{begun.since.isoformat()}",
            )

    def judge_again(self, row: InputRow) -> Task | None:
        """A committed result whose files were not written, or whose certificate is to be
        rendered and no longer in memory: the same bytes, the recorded rules and time."""
        result_row = self.ledger.results.of_input(row.id)
        assert result_row is not None
        stored = self.ledger.facts.text_by_sha(result_row.rule_set_sha256)
        if stored is None:
            rulebook = self.rules.rulebook
        else:
            rulebook = RuleBook((load_rule_set(stored[1], stored[0]),))
        if rulebook is None:  # its rules were never kept and none are valid now: next start
            log.error("%s: its recorded rules are not in the ledger; it waits for valid rules",
                      row.name)
            return None
        return self.task_for(row, rulebook, result_row.analysed_at)
