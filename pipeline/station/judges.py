"""The station's worker pool: judge claimed files in worker processes; replace a worker that dies
or runs over, and blame only the input that did it.

Workers are long-lived processes (worker.py), bounded in number. Each notes on a
shared board (board.py) which input it is judging and since when, so that:

- a worker still judging after ``task_timeout_s`` is killed (that process only) and
  its input counts one failure;
- when a worker dies by itself (a crash inside a library, the OOM killer), the input
  it was judging counts one failure if it was the only one being judged; if several
  were, each of them is judged again *alone*, so that a second death names the culprit;
- concurrent.futures then fails every task of the pool: a new pool is started, and the
  inputs that were only waiting, or judged beside the culprit, are submitted again
  without counting.

An input is quarantined (an error Output naming the limit) after its second failure;
so a file that kills or hangs a worker is retried once, then set aside, and the
station goes on.
"""

from __future__ import annotations

import contextlib
import logging
import multiprocessing
import os
import signal
from collections import deque
from concurrent.futures import FIRST_COMPLETED, Future, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool

from pipeline.ledger.rows import InputRow
from pipeline.station.board import Board
from pipeline.station.worker import Output, Task, init_worker, run_task

log = logging.getLogger("formgate.station")

WORKER_TASKS = 2000  # cells a worker process judges before a new one takes over
FAILURES_TO_QUARANTINE = 2
BREAK_WAIT_S = 60.0  # longest wait for the other tasks of a broken pool to be failed


class JudgePool:
    """Submit (row, task) pairs; :meth:`collect` returns (row, output) pairs as they finish."""

    def __init__(
        self, workers: int, *, timeout_s: float, memory_limit_bytes: int | None = None
    ) -> None:
        self.workers = workers
        self.timeout_s = timeout_s
        self.memory_limit_bytes = memory_limit_bytes
        self.ctx = multiprocessing.get_context("forkserver")
        self.ctx.set_forkserver_preload(["pipeline.station.worker", "pipeline.runner"])
        self.pool: ProcessPoolExecutor | None = None
        self.board: Board | None = None
        self.in_flight: dict[Future[Output], tuple[InputRow, Task]] = {}
        self.pending: deque[tuple[InputRow, Task]] = deque()
        self.failures: dict[int, int] = {}  # input id -> deaths and overruns so far
        self.alone: set[int] = set()  # inputs to judge with nothing beside them
        self.overdue: dict[int, str] = {}  # input id -> why its worker was killed
        self.finished: list[tuple[InputRow, Output]] = []
        self.restarts = 0

    # ---- pool ------------------------------------------------------------------------------

    def _new_pool(self) -> tuple[ProcessPoolExecutor, Board]:
        board = Board(self.ctx, 4 * self.workers + 8)
        # a fresh worker now and then bounds any slow growth of memory in the libraries
        pool = ProcessPoolExecutor(
            self.workers,
            mp_context=self.ctx,
            initializer=init_worker,
            initargs=(os.getpid(), board, self.memory_limit_bytes),
            max_tasks_per_child=WORKER_TASKS,
        )
        return pool, board

    def start(self) -> None:
        self.pool, self.board = self._new_pool()

    def shutdown(self) -> None:
        if self.pool is not None:
            self.pool.shutdown(wait=True, cancel_futures=True)
            self.pool = None

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

    def _dispatch(self) -> None:
        assert self.pool is not None
        while self.pending:
            row, task = self.pending[0]
            if any(r.id in self.alone for r, _ in self.in_flight.values()):
                return
            if (row.id in self.alone and self.in_flight) or len(self.in_flight) >= 2 * self.workers:
                return
            try:
                future = self.pool.submit(run_task, task)
            except BrokenProcessPool:
                self._restart()
                continue
            self.pending.popleft()
            self.in_flight[future] = (row, task)

    def collect(self, timeout: float) -> list[tuple[InputRow, Output]]:
        """Outputs of the tasks that finished within ``timeout`` s (after a break: all of them)."""
        self._stop_overdue()
        if self.in_flight:
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
            if broken:
                self._restart()
        self._dispatch()
        finished, self.finished = self.finished, []
        for row, _ in finished:
            self.failures.pop(row.id, None)
            self.alone.discard(row.id)
        return finished

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

    def _restart(self) -> None:
        """A worker died: start a new pool, and retry, blame or quarantine each task of the old."""
        assert self.pool is not None and self.board is not None
        judging = self.board.judging()  # read before anything else changes it
        wait(list(self.in_flight), timeout=BREAK_WAIT_S)
        old, self.in_flight = self.in_flight, {}
        self.pool.shutdown(wait=False, cancel_futures=True)
        self.pool, self.board = self._new_pool()
        self.restarts += 1
        killed = {row.id for row, _ in old.values() if row.id in self.overdue}
        suspects = {row.id for row, _ in old.values() if row.id in judging} - killed
        again: list[tuple[InputRow, Task]] = []
        for future, (row, task) in old.items():
            if future.done() and not future.cancelled() and future.exception() is None:
                self.finished.append((row, future.result()))  # finished before the break
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
                again.append((row, task))  # waiting, or judged beside the culprit: not its fault
        log.warning(
            "worker pool restarted (%d so far); %d file(s) to judge again", self.restarts, len(again)
        )
        self.pending.extendleft(reversed(again))

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


def _unrun(row: InputRow, exc: BaseException | None) -> Output:
    """The Output of a task that could not run in its worker at all (quarantined, as a bug)."""
    reason = (
        f"{row.name}: the worker could not judge this file ({type(exc).__name__}: {exc}); it was "
        "not judged.\n  The station log has the details; if it happens again, raise "
        "worker_memory_MB in station.toml or report it."
    )
    return Output(row.id, None, None, None, reason, 0.0, True, repr(exc))
