"""Judge many archived cycle files under one rules folder on a Dask cluster: in batches,
resumable, with a progress bar.

``judge_many(items, rules, analysed_at=...)`` yields one judgement per item (the records it
takes and gives are items.py's), in the order the cluster finishes them. Dask does all the
scheduling: a ``LocalCluster`` of processes on this machine by default, or the cluster behind
a scheduler address.

The rules travel once: the rules bundle (:class:`~pipeline.regrade.rules_bundle.Rules`) is
scattered to every worker once per run. A task is a batch of files, about a second of
judging, sized and judged on a worker by :mod:`pipeline.regrade.tasks`; this module is the
caller's side, which fills the batches, submits them and collects their answers.

Where the bytes come from: by default each worker reads ``item.path`` itself (the
archive is mounted where the workers run). With ``ship_bytes`` (or an item that carries
``data``) the caller's process reads the bytes and ships them with the task, a batch
scattered to the cluster as one piece of data. In both cases the worker checks the
SHA-256 of the bytes against ``item.sha256``: an archived copy that changed is an error
for that item, never judged as if it were the recorded input. The caller keeps a bounded
number of tasks in flight (two per worker thread; shipping, at most 256 MiB of bytes in all
and 64 MiB in one task), submitting the next batch as one finishes, so that memory stays
bounded however long the run.

With a :class:`~pipeline.regrade.cache.RegradeCache`, every judgement is kept as it
arrives (one short transaction per batch), and an item already kept under the same rules
and setting is yielded from the cache without being sent. Items of one run with the same
input and setting are judged once and the result given to each of them.

Stopping: when the consumer closes the iterator early, or Ctrl-C interrupts it, the tasks
in flight (two per worker thread at most, a second or two of judging) are let finish, for
``DRAIN_S`` seconds at most, and their judgements kept in the cache; nothing more is
submitted, the cluster (if this run started it) is closed, and a KeyboardInterrupt is
raised again. A second Ctrl-C cancels the tasks in flight at once. So a run stopped and
started again judges no file twice, unless it was stopped twice or a task outlived DRAIN_S.
"""

from __future__ import annotations

import contextlib
import dataclasses
import datetime
import logging
import os
import signal
import sys
import threading
import time
from collections import deque
from collections.abc import Iterable, Iterator, Sized
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from pipeline.errors import FormgateError, InputError
from pipeline.model import SourceRef
from pipeline.read.cyclehead import MAX_UNCOMPRESSED_BYTES
from pipeline.read.limits import TextLimits
from pipeline.regrade.cache import CachedResult, CacheKey, RegradeCache
from pipeline.regrade.items import Judged, RegradeItem, RunStats
from pipeline.regrade.rules_bundle import Rules, setting_digest
from pipeline.regrade.tasks import Batch, Done, TaskFile, batch_size, judge_batch

if TYPE_CHECKING:
    from distributed import Client

log = logging.getLogger("formgate.regrade")

# Much of distributed's Client and Future is untyped: inside a run they are held as Any.
_Client = Any
_Future = Any


def _distributed() -> Any:
    """The distributed package, imported when a run starts (its import takes a while)."""
    import distributed

    return distributed


SHIP_BYTES_PER_TASK = 64 * 2**20  # shipped bytes in one task, at most (once a file's size is known)
IN_FLIGHT_PER_THREAD = 2  # tasks submitted and not yet collected, per worker thread
SHIP_BYTES_IN_FLIGHT = 256 * 2**20  # shipped bytes submitted and not yet collected, at most
READY_MAX = 1024  # answers (from the cache) held before they are yielded
WORKER_WAIT_S = 60.0  # how long a run waits to reach a scheduler, and then for its workers
DRAIN_S = 30.0  # how long a stopped run lets its running tasks finish, to keep their results
THREADS_RECOUNT_S = 10.0  # how often a run counts the cluster's worker threads again


# ---------------------------------------------------------------------------------------------
# The caller side


def judge_many(
    items: Iterable[RegradeItem],
    rules: Rules,
    *,
    scheduler: str | Client | None = None,
    workers: int | None = None,
    ship_bytes: bool = False,
    batch_files: int | None = None,
    analysed_at: datetime.datetime,
    cache: RegradeCache | str | os.PathLike[str] | None = None,
    progress: bool = True,
    max_uncompressed_bytes: int = MAX_UNCOMPRESSED_BYTES,
    limits: TextLimits | None = None,
    stats: RunStats | None = None,
    wait_s: float = WORKER_WAIT_S,
) -> Iterator[Judged]:
    """Judge every item under ``rules`` on a Dask cluster; yield a Judged per item as it comes
    back (in no set order). Nothing starts before the first item is asked for.

    ``scheduler``: None starts a LocalCluster on this machine (``workers`` processes of one
    thread each, default one per core, on 127.0.0.1) and closes it at the end; an address
    (``tcp://host:port``) connects to that cluster's scheduler, waiting for ``workers``
    workers (default 1) to be there; a Client is used as it is and left open.
    ``ship_bytes``: the caller's process reads the archived bytes and ships them, for
    workers that cannot see the archive. ``batch_files``: files per task (default
    :func:`batch_size`). ``analysed_at``: the analysis time every result document carries.
    ``cache``: a RegradeCache or the path of its file; ``stats``: a RunStats filled as the
    run goes. ``max_uncompressed_bytes`` and ``limits`` bound one input as a station's
    settings do. ``progress``: a bar on standard error (when it is a terminal). ``wait_s``:
    how long to wait to reach the scheduler, and then for the workers (FormgateError past it).
    """
    if batch_files is not None and batch_files < 1:
        raise ValueError("batch_files must be at least 1")
    if workers is not None and workers < 1:
        raise ValueError("workers must be at least 1")
    run = _Run(
        rules,
        scheduler=scheduler,
        workers=workers,
        ship_bytes=ship_bytes,
        batch_files=batch_files,
        analysed_at=analysed_at,
        cache=cache,
        progress=progress,
        max_uncompressed_bytes=max_uncompressed_bytes,
        limits=limits,
        stats=stats if stats is not None else RunStats(),
        wait_s=wait_s,
    )
    return run.answers(items)


@dataclass
class _Flight:
    """A submitted task: its items (each with those sharing its answer) and their keys."""

    groups: list[list[RegradeItem]]
    keys: list[CacheKey]
    shipment: _Future | None
    shipped_bytes: int


class _Run:
    def __init__(
        self,
        rules: Rules,
        *,
        scheduler: str | Client | None,
        workers: int | None,
        ship_bytes: bool,
        batch_files: int | None,
        analysed_at: datetime.datetime,
        cache: RegradeCache | str | os.PathLike[str] | None,
        progress: bool,
        max_uncompressed_bytes: int,
        limits: TextLimits | None,
        stats: RunStats,
        wait_s: float,
    ) -> None:
        self.rules = rules
        self.wait_s = wait_s
        self.scheduler = scheduler
        self.workers = workers
        self.ship_bytes = ship_bytes
        self.batch_files = batch_files
        self.analysed_at = analysed_at
        self.cache_arg = cache
        self.progress = progress
        self.max_uncompressed_bytes = max_uncompressed_bytes
        self.limits = limits
        self.stats = stats
        self.ready: deque[Judged] = deque()
        self.waiting: dict[CacheKey, list[RegradeItem]] = {}  # keys in flight or in the open batch
        self.open: list[tuple[CacheKey, RegradeItem]] = []  # the batch being filled
        self.flights: dict[str, tuple[_Future, _Flight]] = {}
        self.shipped_in_flight = 0
        self.shipped_files = self.shipped_total = 0  # files shipped so far and their bytes
        self.exhausted = False

    # -- the run --------------------------------------------------------------------------------

    def answers(self, items: Iterable[RegradeItem]) -> Iterator[Judged]:
        total = len(items) if isinstance(items, Sized) else None
        with contextlib.ExitStack() as stack:
            stack.enter_context(_quiet_interrupted_waits())
            self.cache = self._open_cache(stack)
            self.bar = stack.enter_context(self._bar(total))
            self.client = self._connect(stack)
            self.total = total
            self._count_threads()
            self.stats.workers = self.threads
            self.rules_future = self.client.scatter(self.rules, broadcast=True, hash=False)
            self.done: Any = _distributed().as_completed(loop=self.client.loop)
            source = iter(items)
            try:
                while True:
                    while not self.exhausted and self._room() and len(self.ready) < READY_MAX:
                        self._take(source)
                    while self.ready:
                        answer = self.ready.popleft()
                        self._count(answer)
                        yield answer
                    if not self.flights:
                        if self.exhausted:
                            break
                        continue
                    future = next(self.done)
                    self._collect(future)
            except BaseException:  # GeneratorExit (closed early), KeyboardInterrupt, a failure
                self._stop()
                raise
            finally:
                self.rules_future.release()

    def _open_cache(self, stack: contextlib.ExitStack) -> RegradeCache | None:
        if self.cache_arg is None or isinstance(self.cache_arg, RegradeCache):
            return self.cache_arg
        return stack.enter_context(RegradeCache(self.cache_arg))

    def _bar(self, total: int | None) -> Any:
        from tqdm import tqdm

        shown = self.progress and sys.stderr.isatty()
        return tqdm(
            total=total,
            unit="file",
            desc="regrade",
            file=sys.stderr,
            disable=not shown,
            dynamic_ncols=True,
            smoothing=0.05,
        )

    def _connect(self, stack: contextlib.ExitStack) -> _Client:
        dd = _distributed()
        if self.scheduler is None:
            # Ctrl-C at a terminal goes to every process of its group: the worker processes
            # ignore it (they inherit an ignored SIGINT), so that this process stops them
            with _ctrl_c_ignored():
                cluster = dd.LocalCluster(
                    n_workers=self.workers or os.cpu_count() or 1,
                    threads_per_worker=1,
                    processes=True,
                    host="127.0.0.1",
                    # no dashboard; the scheduler's HTTP routes (health, metrics) on a free
                    # loopback port, never a fixed one that another cluster may hold
                    dashboard_address="127.0.0.1:0",
                    scheduler_kwargs={"dashboard": False},
                    silence_logs=logging.ERROR,
                )
            stack.callback(cluster.close)
            local: _Client = dd.Client(cluster, set_as_default=False)
            stack.callback(local.close)
            return local
        client: _Client = self.scheduler
        if isinstance(self.scheduler, str):
            try:
                client = dd.Client(self.scheduler, timeout=self.wait_s, set_as_default=False)
            except OSError as exc:
                raise FormgateError(
                    f"cannot reach the Dask scheduler at {self.scheduler} ({exc})",
                    hint="Start it (dask scheduler) or give the address it prints, tcp://host:port.",
                ) from None
            stack.callback(client.close)
        wanted = self.workers or 1
        try:
            client.wait_for_workers(wanted, timeout=self.wait_s)
        except TimeoutError:
            raise FormgateError(
                f"{'no Dask worker' if wanted == 1 else f'fewer than {wanted} Dask workers'} joined the "
                f"scheduler at {client.scheduler_info()['address']} within {self.wait_s:g} s",
                hint="Start workers with: dask worker <scheduler address>",
            ) from None
        return client

    # -- taking items and submitting batches ------------------------------------------------------

    def _count_threads(self) -> None:
        """The cluster's worker threads, counted again every THREADS_RECOUNT_S (workers come
        and go on a cluster that scales)."""
        self.threads = max(1, sum(self.client.nthreads().values()))
        self.threads_counted = time.monotonic()

    def _room(self) -> bool:
        if time.monotonic() - self.threads_counted > THREADS_RECOUNT_S:
            self._count_threads()
        if len(self.flights) >= IN_FLIGHT_PER_THREAD * self.threads:
            return False
        return not self.flights or self.shipped_in_flight < SHIP_BYTES_IN_FLIGHT

    def _take(self, source: Iterator[RegradeItem]) -> None:
        """Fill the open batch from ``source`` (answering what needs no worker) and submit it
        once full or once ``source`` is done."""
        size = self._next_size()
        while len(self.open) < size and len(self.ready) < READY_MAX:
            try:
                item = next(source)
            except StopIteration:
                self.exhausted = True
                break
            self.stats.items += 1
            self._place(item)
        if self.open and (len(self.open) >= size or self.exhausted):
            self._submit()

    def _next_size(self) -> int:
        """Files for the task being filled: ``batch_files``, or batch_size() at the judging time
        measured so far (and, shipping, no more than SHIP_BYTES_PER_TASK at the sizes seen)."""
        if self.batch_files is not None:
            return self.batch_files
        s = self.stats
        seconds_per_file = s.judging_s / s.files_judged if s.files_judged else None
        left = None if self.total is None else self.total - s.items + len(self.open)
        size = batch_size(left, self.threads, seconds_per_file)
        if self.shipped_files:
            size = min(size, max(1, SHIP_BYTES_PER_TASK * self.shipped_files // max(self.shipped_total, 1)))
        return size

    def _place(self, item: RegradeItem) -> None:
        profile_text = item.profile_text
        if profile_text is None and item.profile_name is not None:
            profile_text = self.rules.profile_text(item.profile_name)
            if profile_text is None:
                missing = InputError(
                    f"its import profile '{item.profile_name}' is not in the rules folder "
                    f"{self.rules.folder}; it was not judged",
                    SourceRef(item.name),
                    "Put the profile into the rules folder's profiles/, or give its text.",
                )
                self._not_sent(item, str(missing))
                return
        setting = setting_digest(
            item.name, item.profile_name, profile_text, self.max_uncompressed_bytes, self.limits,
            item.accuracy,
        )
        key = CacheKey(item.sha256, self.rules.digest, setting)
        sharing = self.waiting.get(key)
        if sharing is not None:
            sharing.append(item)
            self.stats.shared += 1
            return
        kept = self.cache.get(key) if self.cache is not None else None
        if kept is not None:
            self.stats.from_cache += 1
            self.ready.append(
                Judged(item.key, item.sha256, self.rules.digest, kept.result_json, kept.error,
                       judged=True, from_cache=True)
            )
            return
        if profile_text is not item.profile_text:
            item = dataclasses.replace(item, profile_text=profile_text)
        self.waiting[key] = [item]
        self.open.append((key, item))

    def _not_sent(self, item: RegradeItem, error: str) -> None:
        self.stats.not_sent += 1
        self.ready.append(Judged(item.key, item.sha256, self.rules.digest, None, error, judged=False))

    def _submit(self) -> None:
        files: list[TaskFile] = []
        groups: list[list[RegradeItem]] = []
        keys: list[CacheKey] = []
        shipped = 0
        for key, item in self.open:
            data = item.data
            if data is None and self.ship_bytes:
                assert item.path is not None
                try:
                    data = Path(item.path).read_bytes()
                except OSError as exc:
                    unreadable = InputError(
                        f"the archived copy cannot be read ({exc.strerror or exc}); it was not judged",
                        SourceRef(item.name),
                        "Let this process read the archive, then regrade it again.",
                    )
                    for sharer in self.waiting.pop(key):
                        self._not_sent(sharer, str(unreadable))
                    continue
            shipped += len(data) if data is not None else 0
            files.append(
                TaskFile(len(files), item.sha256, item.name, item.path, data, item.profile_name,
                      item.profile_text, item.analysed_at, item.accuracy)
            )
            groups.append(self.waiting[key])
            keys.append(key)
        self.open = []
        if not files:
            return
        batch = Batch(tuple(files), self.analysed_at, self.max_uncompressed_bytes, self.limits)
        shipment = None
        if shipped:
            # scattered as data, not put into the task graph: Dask warns about (and the
            # scheduler would hold) a graph of many megabytes
            shipment = self.client.scatter(batch, hash=False)
            future = self.client.submit(judge_batch, self.rules_future, shipment, pure=False)
        else:
            future = self.client.submit(judge_batch, self.rules_future, batch, pure=False)
        self.flights[future.key] = (future, _Flight(groups, keys, shipment, shipped))
        self.shipped_in_flight += shipped
        self.done.add(future)
        self.stats.tasks += 1
        self.stats.files_sent += len(files)
        self.stats.batch_files = self.stats.batch_files or len(files)
        self.stats.largest_batch = max(self.stats.largest_batch, len(files))
        if shipped:
            self.shipped_files += sum(f.data is not None for f in files)
            self.shipped_total += shipped

    # -- collecting --------------------------------------------------------------------------------

    def _land(self, future: _Future) -> _Flight:
        _, flight = self.flights.pop(future.key)
        self.shipped_in_flight -= flight.shipped_bytes
        if flight.shipment is not None:
            flight.shipment.release()
        for key in flight.keys:
            self.waiting.pop(key, None)
        return flight

    def _collect(self, future: _Future) -> None:
        """Keep and queue the answers of a finished task."""
        flight = self._land(future)
        if future.status == "finished":
            done: Done = future.result()
            self._keep(flight, done)
            answers = {a.index: a for a in done.answers}
            for index, group in enumerate(flight.groups):
                a = answers[index]
                for item in group:
                    self.ready.append(
                        Judged(item.key, item.sha256, self.rules.digest, a.result_json, a.error, a.judged)
                    )
        else:
            # a task that failed as a whole (its worker died again and again, say): every file
            # of it is answered as not judged, and a later run tries them again
            try:
                reason = f"{type(future.exception()).__name__}: {future.exception()}"
            except Exception as exc:  # cancelled under us (the scheduler went away)
                reason = f"{type(exc).__name__}: {exc}"
            for group in flight.groups:
                for item in group:
                    failed = f"{item.name}: the cluster could not judge it ({reason}); it was not judged."
                    self.ready.append(Judged(item.key, item.sha256, self.rules.digest, None, failed, False))
        future.release()

    def _keep(self, flight: _Flight, done: Done) -> None:
        self.stats.tasks_done += 1
        self.stats.files_judged += len(done.answers)
        self.stats.judging_s += sum(a.seconds for a in done.answers)
        self.stats.task_s += done.seconds
        if self.cache is not None:
            self.cache.put_many(
                (flight.keys[a.index], CachedResult(a.result_json, a.error, self.analysed_at))
                for a in done.answers
                if a.judged
            )

    def _count(self, answer: Judged) -> None:
        """The bar counts the files answered now, so that its rate and time left are theirs."""
        if not answer.from_cache:
            self.bar.update(1)
            return
        if self.bar.total is not None:
            self.bar.total -= 1
        self.bar.set_postfix(cached=self.stats.from_cache, refresh=False)
        self.bar.update(0)  # shown at the bar's own pace, not once a file

    # -- stopping early ------------------------------------------------------------------------------

    def _stop(self) -> None:
        """Let the tasks in flight finish (DRAIN_S at most) and keep their judgements, so that
        no file is judged again by the next run; a second Ctrl-C cancels them at once."""
        if not self.flights:
            return
        futures = [future for future, _ in self.flights.values()]
        try:
            deadline = time.monotonic() + DRAIN_S
            for future in futures:
                wait_s = deadline - time.monotonic()
                if wait_s <= 0:
                    break
                try:
                    future.result(timeout=wait_s)
                except TimeoutError:
                    break
                except Exception:  # a task that failed: nothing of it to keep
                    continue
            for future in futures:
                if future.status == "finished":
                    self._keep(self._land(future), future.result())
                    future.release()
        except KeyboardInterrupt:
            log.warning("regrade stopped at once: the judgements of the tasks in flight are lost")
        except Exception as exc:  # the cluster went away: nothing more to keep
            log.warning("regrade stopped: the tasks in flight are lost (%s)", exc)
        finally:
            left = [future for future, _ in self.flights.values()]
            self.stats.cancelled_tasks += len(left)
            with contextlib.suppress(Exception):
                self.client.cancel(left)
            for future, flight in self.flights.values():
                if flight.shipment is not None:
                    flight.shipment.release()
                future.release()
            self.flights.clear()


class _InterruptedWait(logging.Filter):
    """Drops the one log record Dask's event loop writes when a Ctrl-C interrupts a call that
    waits on it: the loop's callback that would cancel the wait finds no future yet, fails
    with a NameError and logs its traceback, though nothing is wrong (the run stops as it
    should). Every other record passes."""

    def filter(self, record: logging.LogRecord) -> bool:
        text = record.getMessage()
        return not ("Exception in callback" in text and "sync.<locals>.cancel" in text)


@contextlib.contextmanager
def _quiet_interrupted_waits() -> Iterator[None]:
    """The event loop's log leaves out :class:`_InterruptedWait`'s record from the first run
    on (the loop's thread may log it a moment after the run has stopped, so it stays)."""
    logger = logging.getLogger("tornado.application")
    if not any(isinstance(f, _InterruptedWait) for f in logger.filters):
        logger.addFilter(_InterruptedWait())
    yield


@contextlib.contextmanager
def _ctrl_c_ignored() -> Iterator[None]:
    """SIGINT ignored while the block runs (from the main thread; elsewhere nothing changes).

    A process started meanwhile inherits the ignored SIGINT, and Python leaves it so. A
    Ctrl-C pressed during the block (the cluster's start, a second or two) is not seen.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    before = signal.signal(signal.SIGINT, signal.SIG_IGN)
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, before)
