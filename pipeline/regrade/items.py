"""What a regrade run takes and gives: the items to judge again, their judgements, its counts.

:func:`pipeline.regrade.grid.judge_many` takes items (:class:`RegradeItem`) and yields one
:class:`Judged` per item, filling a :class:`RunStats` as it goes; the command line, a
station's regrade (run.py) and the benchmarks build and read these records without the
cluster code.
"""

from __future__ import annotations

import datetime
from dataclasses import dataclass, field
from typing import Any

from pipeline.model import AccuracyClass


@dataclass(frozen=True, slots=True)
class RegradeItem:
    """One archived input to judge again.

    ``sha256`` is the recorded SHA-256 of its bytes and ``name`` the file name it was judged
    under (the result document names it; its ending says how to read it). ``path`` is where
    the archived bytes are, as the workers see it; ``data`` the bytes themselves (shipped to
    the workers whatever ``ship_bytes`` says). The import profile is ``profile_text`` (with
    ``profile_name`` for messages), or, with ``profile_name`` alone, the profile of that file
    name in the rules bundle's ``profiles/``. ``key`` is the caller's own id, given back in
    :attr:`Judged.item_key`.
    """

    sha256: str
    name: str
    path: str | None = None
    data: bytes | None = field(default=None, repr=False)
    profile_text: str | None = field(default=None, repr=False)
    profile_name: str | None = None
    key: Any = None
    # the analysis time its result document carries, when not the run's: a station's record
    # keeps the time it was first analysed, its place in its cell's history
    analysed_at: datetime.datetime | None = None
    # the channel's accuracy class it was judged with (None: the profile's, else the default)
    accuracy: AccuracyClass | None = None

    def __post_init__(self) -> None:
        if self.path is None and self.data is None:
            raise ValueError(f"{self.name}: a regrade item needs its archive path or its bytes")


@dataclass(frozen=True, slots=True)
class Judged:
    """What one item came to under the rules with digest ``rules_digest``.

    Exactly one of ``result_json`` (the result document's text, as ``report.result.to_json``
    writes it) and ``error`` (the located message of an "error" verdict, as a station
    records it) is set. ``judged`` is False when ``error`` says why the file was *not*
    judged (its archived copy cannot be read or has changed, its import profile is missing,
    or formgate failed on it): such an answer is not kept in the cache, and a later run
    tries again. ``from_cache`` is True for a judgement kept by an earlier run.
    """

    item_key: Any
    sha256: str
    rules_digest: str
    result_json: str | None
    error: str | None
    judged: bool = True
    from_cache: bool = False


@dataclass
class RunStats:
    """Counts of one run, filled in as it goes (pass one to ``judge_many`` to read them).

    ``files_judged`` counts the files whose answers came back from the workers, and
    ``judging_s`` the seconds the workers spent on them (reading, checking and judging);
    ``task_s`` sums each collected task's time on its worker, the batch's overhead
    inside the worker included.
    """

    workers: int = 0  # worker threads when the run began
    batch_files: int = 0  # files in the first task
    largest_batch: int = 0  # files in the largest task
    items: int = 0  # items taken from the caller
    from_cache: int = 0  # answered from the cache
    shared: int = 0  # given the answer of an item of this run with the same input and setting
    not_sent: int = 0  # answered without a worker (unreadable for shipping, profile missing)
    tasks: int = 0  # tasks submitted
    tasks_done: int = 0  # tasks collected
    files_sent: int = 0  # files in the tasks submitted
    files_judged: int = 0
    judging_s: float = 0.0
    task_s: float = 0.0
    cancelled_tasks: int = 0  # tasks cancelled when the run stopped early
