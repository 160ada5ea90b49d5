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


def _alive(pid: int) -> bool:
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
        # handed to each worker when it is started (the only way to share it)
        self._cells: Any = ctx.Array(ctypes.c_longlong, _FIELDS * rows)

    def take_row(self, pid: int) -> int:
        """A row for process ``pid``: a free one, or one whose process has ended; -1 if none."""
        cells = self._cells
        with cells.get_lock():
            for row in range(self.rows):
                owner = cells[_FIELDS * row]
                if owner == 0 or not _alive(owner):
                    cells[_FIELDS * row : _FIELDS * row + _FIELDS] = [pid, 0, 0]
                    return row
        return -1

    def note(self, row: int, input_id: int) -> None:
        """Row ``row`` is now judging ``input_id`` (0: nothing), from now on."""
        if row < 0:
            return
        cells = self._cells
        with cells.get_lock():
            cells[_FIELDS * row + 1] = input_id
            cells[_FIELDS * row + 2] = time.monotonic_ns()

    def judging(self) -> dict[int, tuple[int, float]]:
        """input id -> (process id, seconds since it started) for every input being judged."""
        now = time.monotonic_ns()
        cells = self._cells
        with cells.get_lock():
            values = list(cells[:])
        out: dict[int, tuple[int, float]] = {}
        for row in range(self.rows):
            pid, input_id, started = values[_FIELDS * row : _FIELDS * row + _FIELDS]
            if pid and input_id:
                out[int(input_id)] = (int(pid), (now - started) / 1e9)
        return out
