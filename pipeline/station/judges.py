"""The station's worker pool: judge claimed files in worker processes; replace a worker that dies
or runs over, and the launcher that starts them, and blame only the input that did it.

Workers are long-lived processes (worker.py), bounded in number, forked by Python's worker
launcher (the multiprocessing fork server, launcher.py). Each notes on a shared board
(board.py) which input it is judging and since when, so that:

- a worker still judging after ``task_timeout_s`` is killed (that process only) and
  its input counts one failure;
- when a worker dies by itself (a crash inside a library, the OOM killer), the input
  it was judging counts one failure if it was the only one being judged; if several
  were, each of them is judged again *alone*, so that a second death names the culprit;
- concurrent.futures then fails every task of the pool: a new pool is started, and the
  inputs that were only waiting, or judged beside the culprit, are submitted again
  without counting.

When the launcher dies, every worker loses its link to the pool and the pool breaks the
same way, but no input did it: nobody is blamed and every input in hand is judged again.
A worker that cannot be started (the launcher dead, dying or out of reach: the executor's
``submit`` raises, or its manager thread ends and would leave the futures unfinished)
retires the pool too; a launcher that still runs but cannot start workers is killed, so
that Python starts another. A new pool starts at the next :meth:`JudgePool.collect`, at
most one per call, after a wait that grows while pools end without judging anything.

An input is quarantined (an error Output naming the limit) after its second failure;
so a file that kills or hangs a worker is retried once, then set aside, and the
station goes on. Each input's output is returned once: a task the executor took before
its worker failed to start may still be judged by a live worker, but its future is
dropped with the pool and only the next pool's output counts (workers write nothing).
"""

from __future__ import annotations

import contextlib
import logging
import multiprocessing
import os
import signal
import threading
import time
from collections import deque
from collections.abc import Callable
from concurrent.futures import FIRST_COMPLETED, Future, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass
from typing import TypeVar

from pipeline.ledger.rows import InputRow
from pipeline.station.board import Board
from pipeline.station.launcher import (
    Launcher,
    LauncherDeaths,
    current_launcher,
    is_launcher_child,
    start_launcher,
)
from pipeline.station.worker import Output, Task, init_worker, run_task

log = logging.getLogger("formgate.station")
A = TypeVar("A")
R = TypeVar("R")

WORKER_TASKS = 2000  # cells a worker process judges before a new one takes over
FAILURES_TO_QUARANTINE = 2
BREAK_WAIT_S = 60.0  # longest wait for the other tasks of a broken pool to be failed
LAUNCHER_END_WAIT_S = 0.2  # look again this soon for a killed launcher to have ended
# What starting a worker raises when the launcher is dead, dying or out of reach (Python
# 3.11's forkserver): EOFError (it ended while answering), ConnectionRefusedError or
# FileNotFoundError (its socket), another OSError (no process or file left to start one).
SPAWN_FAILURES: tuple[type[BaseException], ...] = (OSError, EOFError)
# Waits before starting a pool again once pools keep ending without judging anything
# (capped exponential backoff, common practice): the first restart is at once, then 0.5 s,
# 1 s, 2 s ... up to 30 s, so a launcher that cannot start is tried twice a minute at most.
RESTART_FIRST_WAIT_S = 0.5
RESTART_MAX_WAIT_S = 30.0
# Workers that could not be started this many times in a row are shown as a trouble and
# alerted: one failure is a launcher killed at the wrong moment, three (about 1.5 s of
# tries) are a launcher or machine that cannot start processes.
SPAWN_FAILURES_TO_SHOW = 3


@dataclass(frozen=True, slots=True)
class PoolTrouble:
    """Why the pool is a trouble of the station: a line for `formgate status`, an alert."""

    reason: str
    subject: str
    advice: str


class JudgePool:
    """Submit (row, task) pairs; :meth:`collect` returns (row, output) pairs as they finish."""

    def __init__(
        self,
        workers: int,
        *,
        timeout_s: float,
        memory_limit_bytes: int | None = None,
        worker_tasks: int = WORKER_TASKS,
    ) -> None:
        self.workers = workers
        self.timeout_s = timeout_s
        self.memory_limit_bytes = memory_limit_bytes
        self.worker_tasks = worker_tasks
        self.ctx = multiprocessing.get_context("forkserver")
        self.ctx.set_forkserver_preload(["pipeline.station.worker", "pipeline.runner"])
        self.pool: ProcessPoolExecutor | None = None  # None between a retired pool and the next
        self.board: Board | None = None
        self.launcher: Launcher | None = None  # the launcher this pool's workers come from
        self.deaths = LauncherDeaths()
        self.in_flight: dict[Future[Output], tuple[InputRow, Task]] = {}
        self.pending: deque[tuple[InputRow, Task]] = deque()
        self.failures: dict[int, int] = {}  # input id -> deaths and overruns so far
        self.alone: set[int] = set()  # inputs to judge with nothing beside them
        self.overdue: dict[int, str] = {}  # input id -> why its worker was killed
        self.finished: list[tuple[InputRow, Output]] = []
        self.restarts = 0
        self.fruitless = 0  # pools ended in a row without a task judged: the next waits longer
        self.start_at_s = 0.0  # (monotonic) no new pool before this
        self.spawn_failures = 0  # workers that could not be started, in a row
        self.spawn_error = ""  # the latest of them

    # ---- pool ------------------------------------------------------------------------------

    def _new_pool(self) -> tuple[ProcessPoolExecutor, Board]:
        board = Board(self.ctx, 4 * self.workers + 8)
        # a fresh worker now and then bounds any slow growth of memory in the libraries
        pool = ProcessPoolExecutor(
            self.workers,
            mp_context=self.ctx,
            initializer=init_worker,
            initargs=(os.getpid(), board, self.memory_limit_bytes),
            max_tasks_per_child=self.worker_tasks,
        )
        return pool, board

    def start(self) -> None:
        """Start the pool; if no worker can be started now, :meth:`collect` tries again."""
        self._start_pool(time.monotonic())

    def _start_pool(self, now_s: float) -> None:
        try:
            launcher = start_launcher()  # now, so that the launcher of this pool is known
            if launcher is not None and not launcher.running():
                # the last one is still ending (a loaded machine): Python would start the
                # workers' launcher at their first spawn, and this pool would take a death
                # of its workers for the death of that old launcher, blaming nobody
                log.info("the worker launcher (pid %d) is still ending; the pool starts after it",
                         launcher.pid)
                self.start_at_s = now_s + LAUNCHER_END_WAIT_S
                return
            pool, board = self._new_pool()
        except SPAWN_FAILURES as exc:
            self._spawn_failed(exc)
            self._schedule_start(now_s)
            log.error("the worker pool cannot be started (%s); next try in %g s",
                      self.spawn_error, self.start_at_s - now_s)
            return
        self.pool, self.board, self.launcher = pool, board, launcher
        self.deaths.look(now_s)

    def shutdown(self) -> None:
        if self.pool is not None:
            if self._manager_gone():  # its workers would wait for work for ever
                assert self.board is not None
                self._discard(self.pool, self.board)
            else:
                self.pool.shutdown(wait=True, cancel_futures=True)
            self.pool = None
            self.board = None

    def trouble(self, now_s: float) -> PoolTrouble | None:
        """What `formgate status` should show about the workers now, if anything."""
        if self.spawn_failures >= SPAWN_FAILURES_TO_SHOW:
            return PoolTrouble(
                f"no worker process can be started ({self.spawn_failures} tries in a row, the "
                f"last: {self.spawn_error}); claimed files wait",
                "worker processes cannot be started",
                "The station goes on trying (every 30 s at the longest) and judges the files "
                "that wait once a worker starts. Check the machine's memory, its limit on "
                "processes and open files, and that the temporary folder is writable.",
            )
        reason = self.deaths.trouble(now_s)
        if reason is None:
            return None
        return PoolTrouble(
            reason,
            "the worker launcher keeps dying",
            "The worker launcher is the process that starts the station's worker processes. "
            "Something on the machine keeps killing it: check the kernel log for the OOM "
            "killer, and any watchdog or clean-up job that ends processes. The station goes "
            "on: it starts the launcher again, and the files that were being judged are "
            "judged again without counting against them.",
        )

    # ---- work ------------------------------------------------------------------------------

    def busy(self) -> int:
        """Tasks in hand: being judged, or waiting to be submitted."""
        return len(self.in_flight) + len(self.pending)

    def tasks(self) -> list[tuple[InputRow, Task]]:
        """Every task in hand."""
        return [*self.in_flight.values(), *self.pending]

    def room(self) -> int:
        """How many more tasks the station may hand over now."""
        if self.alone & {row.id for row, _ in (*self.in_flight.values(), *self.pending)}:
            return 0  # a suspect is to be judged alone
        return max(0, 2 * self.workers - self.busy())

    def submit(self, row: InputRow, task: Task) -> None:
        self.pending.append((row, task))
        self._dispatch()

    def run_aside(self, fn: Callable[[A], R], arg: A) -> Future[R] | None:
        """Run ``fn(arg)`` in a worker beside the judging (a cell certificate's render), or
        None when no pool is in service. Such work is no input's: nothing here times it,
        blames or retries it; a pool retired takes its future with it (cancelled, failed,
        or never done: the caller gives up on it and asks again, see cellcerts.py)."""
        if self.pool is None:
            return None
        try:
            return self.pool.submit(fn, arg)
        except BrokenProcessPool:
            return None  # the judging side finds the pool broken and retires it
        except SPAWN_FAILURES:
            return None  # (as it finds a worker that cannot be started)

    def _dispatch(self) -> None:
        while self.pending and self.pool is not None:
            row, task = self.pending[0]
            if any(r.id in self.alone for r, _ in self.in_flight.values()):
                return
            if (row.id in self.alone and self.in_flight) or len(self.in_flight) >= 2 * self.workers:
                return
            try:
                future = self.pool.submit(run_task, task)
            except BrokenProcessPool:
                self._retire(broken=True)
                return
            except SPAWN_FAILURES as exc:
                # The executor took the task before its worker failed to start: a live worker
                # may judge it still, but its future is dropped with the pool, and only the
                # next pool's output of it is returned.
                self._spawn_failed(exc)
                self._retire(
                    broken=False, why=f"a worker could not be started ({self.spawn_error})",
                    failed_start=True,
                )
                return
            self.pending.popleft()
            self.in_flight[future] = (row, task)
            self.spawn_failures = 0

    def collect(self, timeout: float) -> list[tuple[InputRow, Output]]:
        """Outputs of the tasks that finished within ``timeout`` s (after a break: all of them).

        Starts a new pool when the last one was retired and its wait is over (waiting up
        to ``timeout`` s for that while tasks wait).
        """
        now_s = time.monotonic()
        if self.deaths.look(now_s):
            log.info("the worker launcher has died; Python starts another at the next spawn")
        if self.pool is None:
            self._start_when_due(now_s, timeout)
        self._stop_overdue()
        if self.pool is not None and self.in_flight:
            # look at the clock often enough to hold a short task_timeout_s to its value
            timeout = min(timeout, self.timeout_s / 4)
            done, _ = wait(list(self.in_flight), timeout=timeout, return_when=FIRST_COMPLETED)
            broken = False
            for future in done:
                try:
                    output = future.result()
                except BrokenProcessPool:
                    broken = True
                    continue
                except Exception as exc:  # the task never ran: e.g. no memory left to start it
                    row = self.in_flight[future][0]
                    output = _unrun(row, exc)
                self.finished.append((self.in_flight.pop(future)[0], output))
                self.fruitless = 0
            if broken:
                self._retire(broken=True)
        if self.pool is not None and self._manager_gone():
            self._retire(broken=False, why="its manager thread ended (a worker could not be started)")
        self._dispatch()
        self.deaths.look(time.monotonic())
        finished, self.finished = self.finished, []
        for row, _ in finished:
            self.failures.pop(row.id, None)
            self.alone.discard(row.id)
            self.overdue.pop(row.id, None)
        return finished

    def _start_when_due(self, now_s: float, timeout: float) -> None:
        if now_s < self.start_at_s:
            if not self.pending:
                return  # nothing waits for workers: the station's loop sleeps by itself
            time.sleep(max(0.0, min(timeout, self.start_at_s - now_s)))  # no busy loop
            now_s = time.monotonic()
            if now_s < self.start_at_s:
                return
        self._start_pool(now_s)

    # ---- failures --------------------------------------------------------------------------

    def _stop_overdue(self) -> None:
        """Kill the worker of each input judged for longer than task_timeout_s."""
        if self.board is None or not self.in_flight:
            return
        ours = {row.id for row, _ in self.in_flight.values()}
        for input_id, (pid, age_s) in self.board.judging().items():
            if input_id in ours and input_id not in self.overdue and age_s > self.timeout_s:
                self.overdue[input_id] = (
                    f"judging took longer than task_timeout_s = {self.timeout_s:g} s"
                )
                log.error(
                    "input %d: judging took longer than %g s; stopping its worker (pid %d)",
                    input_id, self.timeout_s, pid,
                )
                with contextlib.suppress(ProcessLookupError):
                    os.kill(pid, signal.SIGKILL)

    def _manager_gone(self) -> bool:
        """True if the executor's manager thread has ended while its pool is in service.

        That thread hands tasks to the workers and their results back; in Python 3.11 it
        also starts a worker's successor (max_tasks_per_child), and a worker that cannot be
        started ends it with the exception: the pool's futures would then never finish. The
        thread is private to the executor; nothing public tells that it has ended.
        """
        thread = getattr(self.pool, "_executor_manager_thread", None)
        return isinstance(thread, threading.Thread) and not thread.is_alive()

    def _spawn_failed(self, exc: BaseException) -> None:
        self.spawn_failures += 1
        self.spawn_error = f"{type(exc).__name__}: {exc}"

    def _schedule_start(self, now_s: float, *, fruitless: bool = True) -> None:
        """The next pool starts after a wait that grows while pools end without judging."""
        if fruitless:
            self.fruitless += 1
        wait_s = 0.0
        if self.fruitless > 1:
            wait_s = min(RESTART_FIRST_WAIT_S * 2 ** (self.fruitless - 2), RESTART_MAX_WAIT_S)
        self.start_at_s = now_s + wait_s

    def _retire(self, *, broken: bool, why: str = "", failed_start: bool = False) -> None:
        """Take the pool out of service: keep what it finished, retry, blame or quarantine each
        of its other tasks, and stop its workers; the next pool starts at a later collect.

        ``broken``: the executor failed its tasks (a worker or the launcher died). Otherwise
        it is retired for ``why`` (a worker could not be started: ``failed_start``; its manager
        thread ended), and nobody is blamed. The next pool waits longer each time pools end
        without judging anything, and not at all after the launcher was killed under workers
        that had started, or a culprit was named.
        """
        assert self.pool is not None and self.board is not None
        judging = self.board.judging()  # read before anything else changes it
        started = bool(self.board.pids())  # a worker had started and taken its row
        old, self.in_flight = self.in_flight, {}
        # the executor marks itself broken (privately) before it fails the tasks and ends its
        # thread: a pool found with its thread ended may have broken all the same
        broken = broken or bool(getattr(self.pool, "_broken", False)) or any(_broke(f) for f in old)
        if broken:
            wait(list(old), timeout=BREAK_WAIT_S)  # the executor fails them all: let it finish
        launcher = self.launcher
        launcher_died = launcher is not None and not launcher.running()
        if not broken and launcher is not None and not launcher_died:
            # it runs but could not start a worker (out of reach, stuck): Python starts
            # another once it finds this one dead
            log.warning("the worker launcher (pid %d) cannot start workers; stopping it", launcher.pid)
            launcher.stop()
        self._discard(self.pool, self.board)
        self.pool = self.board = None
        self.restarts += 1
        again, named = self._sort_out(old, set(judging) if broken and not launcher_died else set())
        from_outside = launcher_died and started and not failed_start
        if from_outside:
            self.fruitless = 0
        self._schedule_start(
            time.monotonic(), fruitless=failed_start or (bool(old) and not named and not from_outside)
        )
        causes = [why] if why and (failed_start or not broken) else []
        if launcher is not None and launcher_died:
            causes.append(f"the worker launcher (pid {launcher.pid}) died, so nobody is blamed")
        elif broken:
            causes.append("a worker process ended")
        log.warning(
            "worker pool restarted (%d so far): %s; %d file(s) to judge again, the next pool in %g s",
            self.restarts, "; ".join(causes), len(again), max(0.0, self.start_at_s - time.monotonic()),
        )
        self.pending.extendleft(reversed(again))

    def _sort_out(
        self, old: dict[Future[Output], tuple[InputRow, Task]], judging: set[int]
    ) -> tuple[list[tuple[InputRow, Task]], bool]:
        """What becomes of a retired pool's tasks: kept if finished; blamed, retried or
        quarantined if killed for running over or judged by a worker that died (``judging``:
        the inputs to suspect, none after a launcher's death); otherwise judged again.

        Returns the tasks to judge again, and whether a culprit was named.
        """
        killed = {row.id for row, _ in old.values() if row.id in self.overdue}
        suspects = {row.id for row, _ in old.values() if row.id in judging} - killed
        again: list[tuple[InputRow, Task]] = []
        for future, (row, task) in old.items():
            if future.done() and not future.cancelled() and future.exception() is None:
                self.finished.append((row, future.result()))  # finished before the break
                self.fruitless = 0
            elif (
                future.done()
                and not future.cancelled()
                and not isinstance(future.exception(), BrokenProcessPool)
            ):
                self.finished.append((row, _unrun(row, future.exception())))
            elif row.id in killed:
                self._failed(row, task, self.overdue.pop(row.id), again)
            elif row.id in suspects and not killed and len(suspects) == 1:
                self._failed(row, task, "a worker process ended while judging it", again)
            elif row.id in suspects and not killed:
                self.failures[row.id] = self.failures.get(row.id, 0) + 1
                self.alone.add(row.id)  # several were judged: each goes again on its own
                again.append((row, task))
            else:
                again.append((row, task))  # waiting, judged beside the culprit, or no culprit
        return again, bool(killed or suspects)

    def _discard(self, pool: ProcessPoolExecutor, board: Board) -> None:
        """Shut a retired pool down and kill every worker of it.

        Also the worker whose start failed halfway (forked, but its process id never reached
        the executor) yet took a row on the board: it would wait for work for ever. The
        executor's own list of workers is private (Python 3.11 has no public way to stop
        them); a pid read from the board is killed only while it is still a launcher's child.
        """
        processes = dict(getattr(pool, "_processes", None) or {})
        with contextlib.suppress(OSError):  # its pipes may have gone with its launcher
            pool.shutdown(wait=False, cancel_futures=True)
        launcher = current_launcher()
        for pid in set(processes) | board.pids():
            if (launcher is None or pid != launcher.pid) and is_launcher_child(pid):
                with contextlib.suppress(ProcessLookupError):
                    os.kill(pid, signal.SIGKILL)

    def _failed(
        self, row: InputRow, task: Task, why: str, again: list[tuple[InputRow, Task]]
    ) -> None:
        count = self.failures[row.id] = self.failures.get(row.id, 0) + 1
        if count < FAILURES_TO_QUARANTINE:
            log.warning("%s: %s; trying once more, alone", row.name, why)
            self.alone.add(row.id)
            again.append((row, task))
            return
        self.alone.discard(row.id)
        self.failures.pop(row.id, None)
        reason = (
            f"{row.name}: {why}, on each of {count} tries; the file was not judged.\n  It may be hostile "
            "or far too large to judge; check it by hand with `formgate check`. If such files "
            "are expected, raise task_timeout_s or worker_memory_MB in station.toml."
        )
        self.finished.append((row, Output(row.id, None, None, None, reason, 0.0)))


def _broke(future: Future[Output]) -> bool:
    """True if ``future`` was failed because its pool broke."""
    return (
        future.done()
        and not future.cancelled()
        and isinstance(future.exception(), BrokenProcessPool)
    )


def _unrun(row: InputRow, exc: BaseException | None) -> Output:
    """The Output of a task that could not run in its worker at all (quarantined, as a bug)."""
    reason = (
        f"{row.name}: the worker could not judge this file ({type(exc).__name__}: {exc}); it was "
        "not judged.\n  The station log has the details; if it happens again, raise "
        "worker_memory_MB in station.toml or report it."
    )
    return Output(row.id, None, None, None, reason, 0.0, True, repr(exc))
