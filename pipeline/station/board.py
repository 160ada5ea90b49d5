"""Which input each worker process is judging, and since when: a small table in shared memory.

concurrent.futures does not say which process runs which task, and a dead worker
breaks the whole pool, failing every task in flight with it. To tell the input that
killed a worker (or ran past its time) from the inputs merely judged beside it, each
worker notes on this board, in shared memory, the input it starts and clears it when
done. One row per worker process: (process id, input id, start in monotonic ns).
"""

from __future__ import annotations

import ctypes
import os
import time
from multiprocessing.context import BaseContext
from typing import Any

_FIELDS = 3
TAKE_WAIT_S = 1.0


def process_exists(pid: int) -> bool:
    """Whether a process ``pid`` exists (a zombie counts; one we may not signal exists)."""
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


class Board:
    """``rows`` rows shared between the station and the worker processes it starts."""

    def __init__(self, ctx: BaseContext, rows: int) -> None:
        self.rows = rows
        # Handed to each worker when it is started (the only way to share it). No lock on
        # the cells: a worker killed while holding one would stop the station for good
        # (the lock would stay taken). Each worker writes only its own row, in an order
        # that never shows a reader a new input with an old start time (note()).
        self._cells: Any = ctx.Array(ctypes.c_longlong, _FIELDS * rows, lock=False)
        # only for taking a row, which two workers starting at once could do together
        self._take: Any = ctx.Lock()

    def take_row(self, pid: int) -> int:
        """A row for process ``pid``: a free one, or one whose process has ended; -1 if none.

        The lock is waited for at most TAKE_WAIT_S: one held by a worker that was killed
        while taking its row is then passed by (a clash with another starting worker costs
        at most a wrongly attributed row, never a stopped station).
        """
        cells = self._cells
        locked = self._take.acquire(timeout=TAKE_WAIT_S)
        try:
            for row in range(self.rows):
                owner = cells[_FIELDS * row]
                if owner == 0 or not process_exists(owner):
                    cells[_FIELDS * row + 1] = 0
                    cells[_FIELDS * row] = pid
                    return row
        finally:
            if locked:
                self._take.release()
        return -1

    def note(self, row: int, input_id: int) -> None:
        """Row ``row`` is now judging ``input_id`` (0: nothing), from now on.

        The input is cleared first and written last, so a reader sees either no input or
        the new input with its own start time (aligned 8-byte stores are not torn).
        """
        if row < 0:
            return
        cells = self._cells
        cells[_FIELDS * row + 1] = 0
        if input_id:
            cells[_FIELDS * row + 2] = time.monotonic_ns()
            cells[_FIELDS * row + 1] = input_id

    def pids(self) -> set[int]:
        """The process ids of every worker that took a row (ended ones among them)."""
        values = list(self._cells[:])
        return {int(values[_FIELDS * row]) for row in range(self.rows) if values[_FIELDS * row]}

    def judging(self) -> dict[int, tuple[int, float]]:
        """input id -> (process id, seconds since it started) for every input being judged."""
        now = time.monotonic_ns()
        values = list(self._cells[:])
        out: dict[int, tuple[int, float]] = {}
        for row in range(self.rows):
            pid, input_id, started = values[_FIELDS * row : _FIELDS * row + _FIELDS]
            if pid and input_id:
                out[int(input_id)] = (int(pid), (now - started) / 1e9)
        return out
