"""Measures how fast a regrade judges archived files on Dask: files/s with 1 and 2 workers, what a
task costs beyond its judging, and the parallel efficiency. Prints one table; writes nothing.

    .venv/bin/python benchmarks/regrade.py           # 2,000 invented files, 2 rounds: ~3 min on 2 cores
    .venv/bin/python benchmarks/regrade.py --quick   # 200 files, 2 rounds: under a minute

It writes two archives into a temporary folder, removed at the end: the demo lots' cycle
files as the demo writes them (30 files), and an invented archive of copies of those 30
records, each under a cell id and file name of its own, so that every file has bytes (and a
SHA-256) of its own. Two LocalClusters of one-thread worker processes on 127.0.0.1, one of 1
worker and one of 2, are started once and warmed (every worker has imported the judging stack
and parsed the rules), then each measured run goes through ``pipeline.regrade.grid.judge_many``
on one of them, with no cache. The runs take turns, in reversed order every other round, so
that a slow moment of the machine falls on all of them alike; each row gives the median and
the range of its rounds. Ratios (parallel efficiency, cluster cost) come from this one run.

Run it on a quiet machine: other processes on the same cores slow the 2-worker runs most.
The table records the load average at the start and at the end. Each run's "ms a file" is
the judging time measured on the workers: when it grows from 1 worker to 2, the two workers
shared the cores (with the scheduler, this process or other work), which Dask cannot help.

Only the standard library is imported at module level: the clusters' worker processes import
this file as their main module when they start.
"""

from __future__ import annotations

import argparse
import datetime
import gzip
import hashlib
import os
import platform
import re
import statistics
import sys
import tempfile
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

REPO = Path(__file__).resolve().parent.parent
if str(REPO) not in sys.path:
    sys.path.insert(0, str(REPO))

ANALYSED_AT = datetime.datetime(2026, 3, 10, 12, 0, tzinfo=datetime.UTC)
SMALL_TASKS_FILES = 400  # files judged one per task and as judge_many cuts them, for the cost of a task
NOOP_TASKS = 2000  # Dask's own round trip: tasks that do nothing


@dataclass(frozen=True, slots=True)
class Mode:
    name: str
    files: int  # the invented archive
    rounds: int
    in_process_files: int  # judged in this process, without Dask, for the reference rate


FULL = Mode("full", 2000, 2, 300)
QUICK = Mode("quick", 200, 2, 100)


@dataclass
class Runs:
    """The rounds of one measured run: wall seconds, files, and the run's counts."""

    files: int = 0
    seconds: list[float] = field(default_factory=list)
    tasks: list[int] = field(default_factory=list)
    largest: list[int] = field(default_factory=list)  # files in the largest task
    busy: list[float] = field(default_factory=list)  # worker-thread time spent judging / all of it
    file_s: list[float] = field(default_factory=list)  # judging seconds a file, on the workers

    def rates(self) -> list[float]:
        return [self.files / s for s in self.seconds]

    def rate(self) -> float:
        return statistics.median(self.rates())


def write_archives(folder: Path, files: int) -> tuple[list[Any], list[Any]]:
    """The demo archive (30 files) and the invented one (``files`` files), as regrade items."""
    from pipeline.demo.lots import ALL_DEMO_CELLS, demo_file_bytes
    from pipeline.regrade.items import RegradeItem

    demo_dir, big_dir = folder / "demo", folder / "invented"
    demo_dir.mkdir()
    big_dir.mkdir()
    demo, sources = [], []
    for cell in ALL_DEMO_CELLS:
        data = demo_file_bytes(cell)
        path = demo_dir / cell.file_name
        path.write_bytes(data)
        sha = hashlib.sha256(data).hexdigest()
        demo.append(RegradeItem(sha, cell.file_name, str(path), key=cell.file_name))
        text = gzip.decompress(data) if cell.compressed else data
        sources.append((cell, text))
    invented = []
    for n in range(files):
        cell, text = sources[n % len(sources)]
        cell_id = f"{cell.cell_id}-C{n:05d}"
        new = re.sub(rb"(?m)^# cell_id: .*$", f"# cell_id: {cell_id}".encode(), text, count=1)
        data = gzip.compress(new, compresslevel=6, mtime=0) if cell.compressed else new
        name = cell.file_name.replace(cell.cell_id, cell_id)
        path = big_dir / name
        path.write_bytes(data)
        invented.append(RegradeItem(hashlib.sha256(data).hexdigest(), name, str(path), key=name))
    return demo, invented


def start_cluster(workers: int) -> tuple[Any, Any, float]:
    """A LocalCluster as judge_many starts one, its client, and the seconds until it was warm."""
    import logging

    from distributed import Client, LocalCluster

    started = time.perf_counter()
    cluster = LocalCluster(
        n_workers=workers, threads_per_worker=1, processes=True, host="127.0.0.1",
        dashboard_address="127.0.0.1:0", scheduler_kwargs={"dashboard": False}, silence_logs=logging.ERROR,
    )
    # closing one of two clusters in a process gives the log its level back: keep it quiet
    logging.getLogger("distributed").setLevel(logging.ERROR)
    client = Client(cluster)
    return cluster, client, time.perf_counter() - started


def warm(client: Any, rules: Any, items: list[Any]) -> float:
    """Judge a few files until every worker has imported the stack and parsed the rules."""
    from pipeline.regrade.grid import judge_many
    from pipeline.regrade.tasks import worker_state

    started = time.perf_counter()
    for _ in range(20):
        for _answer in judge_many(items[:8], rules, scheduler=client, batch_files=1,
                                  analysed_at=ANALYSED_AT, progress=False):
            pass
        if all(s["stack_ready"] and s["rules_parsed"] for s in client.run(worker_state).values()):
            return time.perf_counter() - started
    raise SystemExit("the workers did not all take part in the warm-up")


def timed_run(client: Any, rules: Any, items: list[Any], runs: Runs, **options: Any) -> None:
    from pipeline.regrade.grid import judge_many
    from pipeline.regrade.items import RunStats

    stats = RunStats()
    started = time.perf_counter()
    answered = sum(1 for _ in judge_many(items, rules, scheduler=client, analysed_at=ANALYSED_AT,
                                         progress=False, stats=stats, **options))
    seconds = time.perf_counter() - started
    if answered != len(items) or stats.files_judged != len(items):
        raise SystemExit(f"a run answered {answered} of {len(items)} files")
    runs.files = len(items)
    runs.seconds.append(seconds)
    runs.tasks.append(stats.tasks)
    runs.largest.append(stats.largest_batch)
    runs.busy.append(stats.judging_s / (stats.workers * seconds))
    runs.file_s.append(stats.judging_s / stats.files_judged)


def noop_round_trip(client: Any, tasks: int) -> float:
    """Seconds per task for tasks that do nothing, submitted at once and gathered."""
    started = time.perf_counter()
    futures = client.map(abs, range(-tasks, 0))
    client.gather(futures)
    seconds = time.perf_counter() - started
    del futures
    return seconds / tasks


def in_process(items: list[Any], rules: Any) -> Callable[[Runs], None]:
    """A run judging ``items`` in this process, one after the other, as a warm worker does
    (the same code: the worker's task function, here with no Dask around it)."""
    from pipeline.regrade.tasks import Batch, TaskFile, judge_batch

    files = tuple(TaskFile(n, i.sha256, i.name, i.path, None, None, None) for n, i in enumerate(items))
    judge_batch(rules, Batch(files[:3], ANALYSED_AT, 1 << 30, None))  # stack imported, rules parsed

    def run(runs: Runs) -> None:
        started = time.perf_counter()
        done = judge_batch(rules, Batch(files, ANALYSED_AT, 1 << 30, None))
        seconds = time.perf_counter() - started
        if not all(a.judged for a in done.answers):
            raise SystemExit("a file was not judged in this process")
        runs.files = len(files)
        runs.seconds.append(seconds)
        runs.tasks.append(1)
        runs.largest.append(len(files))
        runs.busy.append(sum(a.seconds for a in done.answers) / seconds)
        runs.file_s.append(sum(a.seconds for a in done.answers) / len(files))

    return run


def interleave(runs: dict[str, Callable[[], None]], rounds: int) -> None:
    for n in range(rounds):
        order = list(runs) if n % 2 == 0 else list(reversed(runs))
        for name in order:
            print(f"  round {n + 1}/{rounds}: {name}", file=sys.stderr, flush=True)
            runs[name]()


def spread(values: list[float], fmt: str = "{:.1f}") -> str:
    if len(values) == 1:
        return "1 run"
    return f"{fmt.format(min(values))}-{fmt.format(max(values))} over {len(values)} runs"


INVENTED_1, INVENTED_2 = "invented, 1 worker", "invented, 2 workers"
SHIPPED_2 = "invented, 2 workers, shipped"
DEMO_1, DEMO_2 = "demo, 1 worker", "demo, 2 workers"
IN_PROCESS = "judging in this process, no Dask"
ONE_A_TASK, AS_CUT = "1 file a task, 2 workers", "files cut by judge_many, 2 workers"


def measure(tmp: Path, files: int, mode: Mode, rounds: int) -> tuple[list[tuple[str, str, str]], float]:
    """Every measurement, as table rows (name, value, note); and the seconds it took."""
    from pipeline.regrade.cache import RegradeCache
    from pipeline.regrade.grid import judge_many
    from pipeline.regrade.rules_bundle import Rules
    from pipeline.regrade.tasks import TASK_SECONDS
    from pipeline.shipped import RULES_DIR

    rules = Rules.read(RULES_DIR)
    print(f"writing the archives ({files} invented files) ...", file=sys.stderr, flush=True)
    began = time.perf_counter()
    demo, invented = write_archives(tmp, files)
    size_mb = sum(Path(i.path).stat().st_size for i in invented) / 2**20
    write_s = time.perf_counter() - began

    here = in_process(invented[: mode.in_process_files], rules)
    print("starting the clusters ...", file=sys.stderr, flush=True)
    one, client1, start1 = start_cluster(1)
    two, client2, start2 = start_cluster(2)
    try:
        warm1, warm2 = warm(client1, rules, demo), warm(client2, rules, demo)
        small = invented[: min(SMALL_TASKS_FILES, len(invented))]
        names = (IN_PROCESS, INVENTED_1, INVENTED_2, SHIPPED_2, DEMO_1, DEMO_2, ONE_A_TASK, AS_CUT)
        m = {name: Runs() for name in names}
        plan: dict[str, Callable[[], None]] = {
            IN_PROCESS: lambda: here(m[IN_PROCESS]),
            INVENTED_1: lambda: timed_run(client1, rules, invented, m[INVENTED_1]),
            INVENTED_2: lambda: timed_run(client2, rules, invented, m[INVENTED_2]),
            SHIPPED_2: lambda: timed_run(client2, rules, invented, m[SHIPPED_2], ship_bytes=True),
            DEMO_1: lambda: timed_run(client1, rules, demo, m[DEMO_1]),
            DEMO_2: lambda: timed_run(client2, rules, demo, m[DEMO_2]),
            ONE_A_TASK: lambda: timed_run(client2, rules, small, m[ONE_A_TASK], batch_files=1),
            AS_CUT: lambda: timed_run(client2, rules, small, m[AS_CUT]),
        }
        interleave(plan, rounds)
        noop = [noop_round_trip(client2, NOOP_TASKS) for _ in range(rounds)]

        # a resumed run with every file already kept in the cache
        cache_path = tmp / "regrade.sqlite"
        for _answer in judge_many(invented, rules, scheduler=client2, analysed_at=ANALYSED_AT,
                                  cache=cache_path, progress=False):
            pass
        with RegradeCache(cache_path) as cache:
            began = time.perf_counter()
            answers = judge_many(invented, rules, scheduler=client2, analysed_at=ANALYSED_AT,
                                 cache=cache, progress=False)
            cached_rate = sum(1 for _ in answers) / (time.perf_counter() - began)
    finally:
        client1.close()
        one.close()
        client2.close()
        two.close()

    reference, rate1, rate2 = m[IN_PROCESS].rate(), m[INVENTED_1].rate(), m[INVENTED_2].rate()
    tiny, cut = m[ONE_A_TASK], m[AS_CUT]
    # worker-thread seconds a task costs beyond its files: the same files in many tasks or few
    per_task = [
        (t1 - t2) * 2 / (n1 - n2)
        for t1, t2, n1, n2 in zip(tiny.seconds, cut.seconds, tiny.tasks, cut.tasks, strict=True)
    ]
    task_ms = 1000 * statistics.median(per_task)

    rows: list[tuple[str, str, str]] = []
    rows.append(("archive", f"{files} files, {size_mb:.0f} MB",
                 f"and the demo archive, {len(demo)} files; written in {write_s:.0f} s"))
    rows.append((IN_PROCESS, f"{reference:.1f} files/s",
                 f"{spread(m[IN_PROCESS].rates())}; {m[IN_PROCESS].files} files, "
                 f"{1000 / reference:.1f} ms a file"))
    for name in (INVENTED_1, INVENTED_2, SHIPPED_2, DEMO_1, DEMO_2):
        runs = m[name]
        rows.append((name, f"{runs.rate():.1f} files/s",
                     f"{spread(runs.rates())}; {statistics.median(runs.tasks):.0f} tasks of up to "
                     f"{max(runs.largest)} files; workers judging {100 * statistics.median(runs.busy):.0f} %"
                     f" of the time, {1000 * statistics.median(runs.file_s):.1f} ms a file"))
    rows.append(("parallel efficiency, invented", f"{rate2 / (2 * rate1):.2f}",
                 "2-worker rate / (2 x 1-worker rate)"))
    rows.append(("parallel efficiency, demo", f"{m[DEMO_2].rate() / (2 * m[DEMO_1].rate()):.2f}",
                 "30 files: the start and the tail weigh more"))
    rows.append(("1 worker / judging in this process", f"{rate1 / reference:.2f}",
                 "what a 1-worker cluster keeps"))
    rows.append(("shipped / read by the workers", f"{m[SHIPPED_2].rate() / rate2:.2f}", "2 workers"))
    rows.append((ONE_A_TASK, f"{tiny.rate():.1f} files/s", f"{spread(tiny.rates())}; {tiny.files} files"))
    rows.append((AS_CUT, f"{cut.rate():.1f} files/s",
                 f"{spread(cut.rates())}; the same files in {statistics.median(cut.tasks):.0f} tasks"))
    rows.append(("cost of a task beyond its files", f"{task_ms:.1f} ms",
                 f"{spread([1000 * p for p in per_task])}; worker-thread time, from the two rows above"))
    share = 100 * task_ms / (task_ms + 1000 * TASK_SECONDS)
    rows.append(("  share of a task of 1 s of judging", f"{share:.2f} %", "judge_many aims a task at 1 s"))
    rows.append(("Dask's round trip, empty task", f"{1000 * statistics.median(noop):.2f} ms",
                 f"{spread([1000 * n for n in noop], '{:.2f}')}; {NOOP_TASKS} tasks at once, 2 workers"))
    rows.append(("resumed run, all from the cache", f"{cached_rate:.0f} files/s", f"{files} files"))
    rows.append(("cluster start, 1 / 2 workers", f"{start1:.1f} / {start2:.1f} s",
                 f"then warm (stack imported, rules parsed) in {warm1:.1f} / {warm2:.1f} s"))
    return rows, time.perf_counter() - began


def main() -> int:
    parser = argparse.ArgumentParser(description=(__doc__ or "").split("\n\n")[0])
    parser.add_argument("--quick", action="store_true", help="200 invented files instead of 2,000")
    parser.add_argument("--files", type=int, help="invented files (2,000 in a full run)")
    parser.add_argument("--rounds", type=int, help="rounds of every measured run (2)")
    args = parser.parse_args()
    mode = QUICK if args.quick else FULL
    files = args.files or mode.files
    rounds = args.rounds or mode.rounds

    import dask
    import distributed

    from pipeline import __version__

    load_before = os.getloadavg()
    began = time.perf_counter()
    with tempfile.TemporaryDirectory(prefix="formgate-regrade-bench-") as tmp:
        rows, _ = measure(Path(tmp), files, mode, rounds)
    load_after = os.getloadavg()

    print(f"formgate {__version__} regrade benchmark, {mode.name} mode, {rounds} rounds, "
          f"{time.perf_counter() - began:.0f} s")
    print(f"{platform.python_implementation()} {platform.python_version()}, dask {dask.__version__}, "
          f"distributed {distributed.__version__}, {os.cpu_count()} cores, load average "
          f"{load_before[0]:.2f} at the start, {load_after[0]:.2f} at the end")
    width = max(len(r[0]) for r in rows)
    value_width = max(len(r[1]) for r in rows)
    for name, value, note in rows:
        print(f"{name:<{width}}  {value:>{value_width}}  {note}".rstrip())
    return 0


if __name__ == "__main__":
    sys.exit(main())
