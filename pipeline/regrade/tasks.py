"""A regrade's task: a batch of files, how many go into one, and how a Dask worker judges it.

A task is a batch of files (:func:`batch_size`). Dask costs a few milliseconds of a worker
thread's time a task (scheduling, messages, results; benchmarks/regrade.py measures it), and
judging one file takes 5-20 ms for a demo file and more for a long record, so a task of one
file would spend a large share on Dask. A task aims at TASK_SECONDS (1 s) of judging at the
time a file has taken so far in this run (20 files before the first task comes back), where
Dask's share is under one percent; on a cluster of more than 200 worker threads, longer, so
that the scheduler never has more than about TASKS_PER_S (200) tasks a second to finish.
A task holds 500 files at most (its answers stay a few MB), and the files left are always
cut into at least four tasks per worker thread, so that every thread has work to the end
and the last tasks are short.

What travels: a :class:`Batch` of :class:`TaskFile` (each with its bytes, or the path where
the worker reads them), with the analysis time and the size limits; what comes back: a
:class:`Done` with one :class:`Answer` a file. :func:`judge_batch` runs in the Dask worker
processes: it imports the judging stack once per process, parses the rules bundle once per
digest (:class:`~pipeline.regrade.rules_bundle.Rules`) and keeps the rule book, checks the
SHA-256 of each file's bytes against the recorded one, and never raises for one file's
sake. ``worker_state`` gives a worker process's counts, for ``Client.run``. Filling,
submitting and collecting the tasks is left to :mod:`pipeline.regrade.grid`.
"""

from __future__ import annotations

import datetime
import gc
import hashlib
import logging
import math
import os
import threading
import time
from collections import OrderedDict
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

from pipeline.errors import FormgateError, InputError
from pipeline.model import AccuracyClass, SourceRef
from pipeline.read.limits import TextLimits

if TYPE_CHECKING:
    from pipeline.read.profile import Profile
    from pipeline.regrade.rules_bundle import Rules
    from pipeline.rulebook.book import RuleBook

log = logging.getLogger("formgate.regrade")

TASK_SECONDS = 1.0  # the judging a task aims at: Dask's few ms a task are well under 1 % of it
TASKS_PER_S = 200  # and longer on a large cluster, so that its scheduler sees at most this many
FIRST_FILES_PER_TASK = 20  # before a task has come back to measure a file by: 0.1-2 s at 5-100 ms
MAX_FILES_PER_TASK = 500  # a task's answers (about 9 kB of JSON a file) stay a few MB
TASKS_PER_THREAD = 4  # the files left make this many tasks a worker thread at least: a short tail


def batch_size(files_left: int | None, threads: int, seconds_per_file: float | None = None) -> int:
    """Files for the next task: enough judging at the ``seconds_per_file`` measured so far
    (FIRST_FILES_PER_TASK before any) for TASK_SECONDS, or for ``threads / TASKS_PER_S``
    seconds when that is longer (a cluster of 512 threads: 2.6 s); MAX_FILES_PER_TASK at most;
    and no more than leaves TASKS_PER_THREAD tasks per worker thread for the files left (when
    known), so that every thread keeps working and the last tasks are short; one at least.

    >>> batch_size(None, 512), batch_size(10**7, 64, 0.020), batch_size(10**7, 512, 0.020)
    (20, 50, 128)
    >>> batch_size(10**7, 512, 0.002), batch_size(2000, 2, 0.005), batch_size(30, 2), batch_size(3, 8, 0.01)
    (500, 200, 4, 1)
    """
    size = float(FIRST_FILES_PER_TASK)
    if seconds_per_file is not None:
        task_s = max(TASK_SECONDS, threads / TASKS_PER_S)
        size = min(MAX_FILES_PER_TASK, task_s / max(seconds_per_file, 1e-6))
    if files_left is not None:
        size = min(size, math.ceil(files_left / (max(threads, 1) * TASKS_PER_THREAD)))
    return max(1, int(size))


# ---------------------------------------------------------------------------------------------
# What a task carries and what it gives back


@dataclass(frozen=True, slots=True)
class TaskFile:
    """One file of a task; ``data`` None: the worker reads ``path``."""

    index: int
    sha256: str
    name: str
    path: str | None
    data: bytes | None = field(repr=False)
    profile_name: str | None
    profile_text: str | None = field(repr=False)
    analysed_at: datetime.datetime | None = None
    accuracy: AccuracyClass | None = None


@dataclass(frozen=True, slots=True)
class Batch:
    """A task: its files, and the analysis time and size limits they are judged with."""

    files: tuple[TaskFile, ...]
    analysed_at: datetime.datetime
    max_uncompressed_bytes: int
    limits: TextLimits | None


@dataclass(frozen=True, slots=True)
class Answer:
    """What one file of a task came to (as a Judged holds it), and its seconds of judging."""

    index: int
    result_json: str | None
    error: str | None
    judged: bool
    seconds: float


@dataclass(frozen=True, slots=True)
class Done:
    """A task's answers, one a file, as its worker gives them back."""

    answers: tuple[Answer, ...]
    seconds: float  # the whole task on its worker
    pid: int


# ---------------------------------------------------------------------------------------------
# The worker side: runs in the Dask worker processes


_lock = threading.Lock()
_stack_ready = False
_books: OrderedDict[str, RuleBook] = OrderedDict()  # rules digest -> parsed rule book
_profiles: OrderedDict[tuple[str, str], Profile] = OrderedDict()
_counts = {"rules_parsed": 0, "files_judged": 0, "tasks": 0}
_KEEP_BOOKS, _KEEP_PROFILES = 4, 64


def worker_state() -> dict[str, int]:
    """This worker process's counts (rule books parsed, files judged, tasks run); for
    ``Client.run``."""
    with _lock:
        return {**_counts, "stack_ready": int(_stack_ready), "pid": os.getpid()}


def _prepare_stack() -> None:
    """Import the judging stack once per process, then take its long-lived objects out of the
    garbage collector's sight (as a station's worker does, pipeline.station.worker)."""
    global _stack_ready
    if _stack_ready:
        return
    import pipeline.judge.evaluate
    import pipeline.judge.metrics
    import pipeline.judge.segmentation
    import pipeline.read.profile
    import pipeline.report.result
    import pipeline.runner  # noqa: F401

    gc.collect()
    gc.freeze()
    _stack_ready = True


def _rule_book(rules: Rules) -> RuleBook:
    """The rule book of a bundle, parsed once per worker process and digest."""
    book = _books.get(rules.digest)
    if book is None:
        book = rules.rulebook()
        _books[rules.digest] = book
        _counts["rules_parsed"] += 1
        while len(_books) > _KEEP_BOOKS:
            _books.popitem(last=False)
    return book


def _profile(name: str | None, text: str) -> Profile:
    from pipeline.read.profile import load_profile

    key = (name or "", hashlib.sha256(text.encode("utf-8")).hexdigest())
    with _lock:
        found = _profiles.get(key)
    if found is None:
        found = load_profile(text, name or "import profile")  # raises ProfileError
        with _lock:
            _profiles[key] = found
            while len(_profiles) > _KEEP_PROFILES:
                _profiles.popitem(last=False)
    return found


def judge_batch(rules: Rules, batch: Batch) -> Done:
    """A task: judge every file of the batch; never raises for one file's sake."""
    started = time.perf_counter()
    with _lock:
        _prepare_stack()
        book = _rule_book(rules)
        _counts["tasks"] += 1
    answers = []
    for file in batch.files:
        begun = time.perf_counter()
        result_json, error, judged = _judge_file(book, file, batch)
        answers.append(Answer(file.index, result_json, error, judged, time.perf_counter() - begun))
    with _lock:
        _counts["files_judged"] += len(batch.files)
    return Done(tuple(answers), time.perf_counter() - started, os.getpid())


def _judge_file(book: RuleBook, file: TaskFile, batch: Batch) -> tuple[str | None, str | None, bool]:
    """(result document, None, True), (None, error verdict, True), or (None, why not judged, False)."""
    from pipeline.read.limits import check_text
    from pipeline.read.readings import looks_like_readings
    from pipeline.report.result import to_json
    from pipeline.runner import judge

    where = SourceRef(file.name)
    if file.data is not None:
        data = file.data
    else:
        assert file.path is not None
        try:
            data = Path(file.path).read_bytes()
        except OSError as exc:
            unreadable = InputError(
                f"the archived copy cannot be read ({exc.strerror or exc}); it was not judged",
                where,
                "Let the workers read the archive (or ship the bytes), then regrade it again.",
            )
            return None, str(unreadable), False
    digest = hashlib.sha256(data).hexdigest()
    if digest != file.sha256:
        changed = InputError(
            f"the archived copy has changed: its SHA-256 is {digest[:16]}..., the input recorded "
            f"had {file.sha256[:16]}...; it was not judged",
            where,
            "Restore the archived copy from a backup; a regrade judges only the recorded bytes.",
        )
        return None, str(changed), False
    try:
        profile = None if file.profile_text is None else _profile(file.profile_name, file.profile_text)
        # a workbook's or Parquet file's lines mean nothing: its reader bounds what it unpacks
        if batch.limits is not None and (profile is None or profile.file_format == "text"):
            check_text(data, file.name, batch.limits)
        if looks_like_readings(data):
            raise InputError(
                "an OCV reading file, not a cycle file: a regrade judges cycle files",
                where,
                "Leave reading files out of a regrade; their cells' aging stage is judged with "
                "the cells' cycle files.",
            )
        result = judge(
            data,
            file.name,
            book,
            analysed_at=file.analysed_at or batch.analysed_at,
            profile=profile,
            max_uncompressed_bytes=batch.max_uncompressed_bytes,
            input_sha256=digest,
            accuracy=file.accuracy,
        )
        return to_json(result), None, True
    except FormgateError as exc:
        return None, str(exc), True
    except MemoryError:
        short = f"{file.name}: judging the file needs more memory than the worker has; it was not judged."
        return None, short, False
    except Exception as exc:
        log.exception("%s: internal error while judging", file.name)
        bug = (
            f"{file.name}: formgate could not judge this file because of an internal error "
            f"({type(exc).__name__}: {exc}); it was not judged.\n  Please report it."
        )
        return None, bug, False
