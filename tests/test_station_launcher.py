"""The judge pool outlives its worker launcher (Python's fork server) dying or cutting off.

Real processes throughout: the launcher is killed with SIGKILL, or its socket removed so
that it runs but can start no worker; the pool's workers are killed from the board. The
pool starts again without blaming any input, each input's output comes back exactly once,
and a launcher that keeps dying is shown and alerted once while the station goes on.
"""

from __future__ import annotations

import contextlib
import datetime
import email
import email.policy
import hashlib
import logging
import multiprocessing.forkserver
import os
import signal
import subprocess
import threading
import time
from collections.abc import Callable
from pathlib import Path

import pytest

from pipeline.ledger.ledger import Ledger
from pipeline.ledger.rows import InputRow
from pipeline.rulebook.book import RuleBook, load_rule_set
from pipeline.station.judges import JudgePool
from pipeline.station.launcher import Launcher, LauncherDeaths, current_launcher
from pipeline.station.settings import Settings
from pipeline.station.station import Station
from pipeline.station.status import status_text
from pipeline.station.worker import Output, Task
from tests.station_kit import (
    RULES,
    check_invariants,
    cycle_file,
    drop,
    heartbeat_troubles,
    make_station,
    running,
    settled,
    start_watch,
    stop_watch,
    wait_until,
)

NOW = datetime.datetime(2026, 3, 1, 8, 0, tzinfo=datetime.UTC)


# ---- the launcher's process, looked at without reaping it -----------------------------------


def test_a_process_is_running_until_it_ends_and_a_zombie_is_not_running() -> None:
    child = subprocess.Popen(["sleep", "60"])
    try:
        stat = (Path("/proc") / str(child.pid) / "stat").read_bytes()
        started = int(stat[stat.rindex(b")") + 2 :].split()[19])
        launcher = Launcher(child.pid, started)
        assert launcher.running()
        assert not Launcher(child.pid, started + 1).running(), "another process with the same pid"
        os.kill(child.pid, signal.SIGKILL)
        wait_until(lambda: not launcher.running(), 10, "the killed process seen ended")
        # not reaped: its parent may still wait for it (Python's own check does, for a launcher)
        assert (Path("/proc") / str(child.pid)).exists()
    finally:
        child.kill()
        child.wait()
    assert not launcher.running()


def test_three_launcher_deaths_within_ten_minutes_are_a_trouble_until_ten_quiet_minutes() -> None:
    deaths = LauncherDeaths()
    deaths.died(0.0)
    deaths.died(400.0)
    assert deaths.trouble(500.0) is None
    deaths.died(700.0)  # the first has left the window: two within ten minutes
    assert deaths.trouble(700.0) is None
    deaths.died(900.0)  # 400, 700, 900
    reason = deaths.trouble(900.0)
    assert reason is not None and reason.startswith("the worker launcher keeps dying (3 times so far")
    deaths.died(1000.0)
    assert "(4 times so far" in (deaths.trouble(1100.0) or "")
    assert deaths.trouble(1599.0) is not None, "not yet quiet for ten minutes"
    assert deaths.trouble(1600.0) is None
    deaths.died(1700.0)
    assert deaths.trouble(1700.0) is None, "one death after a quiet spell is no trouble"


# ---- the pool on its own ----------------------------------------------------------------------


def _tasks(folder: Path, first: int, count: int, certify: str = "none") -> list[tuple[InputRow, Task]]:
    book = RuleBook((load_rule_set(RULES, "test_cells.toml"),))
    out = []
    for input_id in range(first, first + count):
        data = cycle_file(f"P-{input_id}", seed=input_id)
        path = folder / f"p{input_id}.csv"
        path.write_bytes(data)
        sha = hashlib.sha256(data).hexdigest()
        row = InputRow(input_id, sha, path.name, len(data), NOW, "claimed", None, None, 1, None, None,
                       None, str(path), None)
        out.append((row, Task(input_id, str(path), path.name, sha, book, NOW, certify=certify)))
    return out


def _drain(pool: JudgePool, got: list[tuple[InputRow, Output]], timeout_s: float = 120.0) -> None:
    deadline = time.monotonic() + timeout_s
    while pool.busy():
        assert time.monotonic() < deadline, "the pool never finished"
        got += pool.collect(0.5)


def _launcher_pid() -> int | None:
    launcher = current_launcher()
    return launcher.pid if launcher is not None and launcher.running() else None


def _judged_once(got: list[tuple[InputRow, Output]], ids: range) -> None:
    assert sorted(row.id for row, _ in got) == list(ids), "each input's output once"
    assert [o.error for _, o in got if o.error] == []
    assert all(o.result is not None for _, o in got)


@pytest.mark.slow
def test_a_launcher_that_runs_but_cannot_start_workers_is_replaced_and_each_task_judged_once(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    caplog.set_level(logging.WARNING, "formgate.station")
    pool = JudgePool(1, timeout_s=60)
    pool.start()
    try:
        first = _launcher_pid()
        assert first is not None
        # its socket gone: it runs, and every start of a worker fails in submit
        os.unlink(multiprocessing.forkserver._forkserver._forkserver_address)  # type: ignore[attr-defined]
        tasks = _tasks(tmp_path, 1, 3)
        got: list[tuple[InputRow, Output]] = []
        for row, task in tasks:
            pool.submit(row, task)
        # on a busy machine the first worker may not have started before the launcher's
        # address went: the first replacement then meets the same fault, and a second one runs
        assert 1 <= pool.restarts <= 2 and pool.pool is None, "retired at once; the next starts at collect"
        _drain(pool, got)
        _judged_once(got, range(1, 4))
        assert _launcher_pid() not in (None, first), "a new launcher"
        assert "a worker could not be started (FileNotFoundError" in caplog.text
        assert f"the worker launcher (pid {first}) cannot start workers; stopping it" in caplog.text
        assert pool.failures == {} and pool.alone == set()
    finally:
        pool.shutdown()


@pytest.mark.slow
def test_a_launcher_killed_while_it_starts_a_worker_fails_the_submit_and_the_task_is_judged_once(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    caplog.set_level(logging.WARNING, "formgate.station")
    pool = JudgePool(1, timeout_s=60)
    pool.start()
    try:
        launcher = _launcher_pid()
        assert launcher is not None
        # stopped, it takes the request for a worker and never answers; killed a moment later,
        # the submit waiting for its answer meets the end of the pipe (EOFError)
        os.kill(launcher, signal.SIGSTOP)
        killer = threading.Timer(0.5, os.kill, (launcher, signal.SIGKILL))
        killer.start()
        tasks = _tasks(tmp_path, 1, 2)
        pool.submit(*tasks[0])  # a fresh pool has no worker: this one must be started
        killer.join()
        assert "a worker could not be started (EOFError" in caplog.text
        assert pool.pool is None and pool.restarts == 1 and pool.spawn_failures == 1
        pool.submit(*tasks[1])
        got: list[tuple[InputRow, Output]] = []
        _drain(pool, got)
        _judged_once(got, range(1, 3))
        assert _launcher_pid() not in (None, launcher)
        assert pool.failures == {} and pool.alone == set() and pool.spawn_failures == 0
    finally:
        pool.shutdown()


@pytest.mark.slow
def test_a_launcher_killed_just_before_each_submit_loses_no_task_and_judges_none_twice(
    tmp_path: Path,
) -> None:
    pool = JudgePool(2, timeout_s=60)
    pool.start()
    got: list[tuple[InputRow, Output]] = []
    try:
        for row, task in _tasks(tmp_path, 1, 8):
            pid = _launcher_pid()
            if pid is not None:
                os.kill(pid, signal.SIGKILL)  # then at once a submit, which may need a worker
            pool.submit(row, task)
            got += pool.collect(0.3)
        _drain(pool, got)
        _judged_once(got, range(1, 9))
        assert pool.failures == {} and pool.alone == set(), "a launcher's death counts against no input"
        assert pool.deaths.total >= 1
    finally:
        pool.shutdown()


@pytest.mark.slow
@pytest.mark.filterwarnings("ignore::pytest.PytestUnhandledThreadExceptionWarning")
def test_a_pool_whose_manager_thread_ended_is_replaced_and_its_tasks_judged_once(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    caplog.set_level(logging.WARNING, "formgate.station")
    # one worker, replaced after every task: the executor's manager thread starts each successor
    pool = JudgePool(1, timeout_s=60, worker_tasks=1)
    pool.start()
    try:
        got: list[tuple[InputRow, Output]] = []
        for row, task in _tasks(tmp_path, 1, 2):
            pool.submit(row, task)  # the first starts the worker; the second waits in the pool
        executor = pool.pool
        assert executor is not None and not pool.pending
        # the successor of the first task's worker cannot be started: the thread ends with it
        os.unlink(multiprocessing.forkserver._forkserver._forkserver_address)  # type: ignore[attr-defined]
        _drain(pool, got)
        _judged_once(got, range(1, 3))
        thread = executor._executor_manager_thread  # type: ignore[attr-defined]
        assert thread is None or not thread.is_alive()
        assert "its manager thread ended (a worker could not be started)" in caplog.text
        # on a busy machine the first worker may not have started before the launcher's
        # address went: the first replacement then meets the same fault, and a second one runs
        assert 1 <= pool.restarts <= 2
    finally:
        pool.shutdown()


def _collect_until(
    pool: JudgePool, got: list[tuple[InputRow, Output]], done: Callable[[], bool], what: str
) -> None:
    deadline = time.monotonic() + 60
    while not done():
        assert time.monotonic() < deadline, f"timed out waiting for {what}"
        got += pool.collect(0.05)


@pytest.mark.slow
def test_a_launcher_death_blames_no_input_and_a_worker_death_does(tmp_path: Path) -> None:
    pool = JudgePool(1, timeout_s=60)
    pool.start()
    try:
        got: list[tuple[InputRow, Output]] = []
        (row, task), = _tasks(tmp_path, 1, 1, certify="all")  # a certificate: long enough to kill

        def worker_judging() -> int | None:
            entry = pool.board.judging().get(1) if pool.board is not None else None
            return entry[0] if entry is not None else None

        pool.submit(row, task)
        for _ in range(3):  # more deaths than it takes to quarantine a file
            _collect_until(pool, got, lambda: worker_judging() is not None, "input 1 being judged")
            launcher = _launcher_pid()
            assert launcher is not None
            restarts = pool.restarts
            os.kill(launcher, signal.SIGKILL)
            _collect_until(pool, got, lambda r=restarts: pool.restarts > r, "the broken pool retired")
            assert pool.failures == {} and pool.alone == set(), "nobody is blamed"
        _collect_until(pool, got, lambda: worker_judging() is not None, "input 1 being judged")
        worker = worker_judging()
        assert worker is not None
        restarts = pool.restarts
        os.kill(worker, signal.SIGKILL)  # a worker dies while judging it: that counts
        _collect_until(pool, got, lambda: pool.restarts > restarts, "the broken pool retired")
        assert pool.failures == {1: 1} and pool.alone == {1}
        _drain(pool, got)
        assert [(r.id, o.error) for r, o in got] == [(1, None)], "judged once, after all"
        assert pool.deaths.total >= 3
    finally:
        pool.shutdown()


# ---- a running station ------------------------------------------------------------------------


def _alerts(s: Settings, words: str) -> list[str]:
    out = []
    for p in s.mail.glob("*.eml"):
        msg = email.message_from_bytes(p.read_bytes(), policy=email.policy.default)
        if words in str(msg["Subject"]):
            out.append(str(msg["Subject"]))
    return out


@pytest.mark.slow
def test_the_station_outlives_its_launcher_killed_ten_times_among_worker_kills(tmp_path: Path) -> None:
    s = make_station(tmp_path / "st")
    inbox = s.inboxes[0].folder
    names: set[str] = set()
    killed: list[int] = []  # launchers
    # inputs judged when a worker was killed, or blamed for it (a worker may take up another
    # input in the moment before the pool sees its neighbour dead): never killed again
    involved: set[int] = set()

    def arrive() -> None:
        name = f"cell-{len(names) + 1:03d}.csv"
        drop(inbox, name, cycle_file(f"C-{len(names) + 1:03d}", seed=len(names) + 1))
        names.add(name)

    def wait_for(ready: Callable[[], bool], what: str) -> None:
        """Wait, a file arriving every 2 s meanwhile (a launcher starts when a worker must)."""
        deadline = time.monotonic() + 90
        last = time.monotonic()
        while not ready():
            assert time.monotonic() < deadline, f"timed out waiting for {what}"
            if time.monotonic() - last > 2.0:
                arrive()
                last = time.monotonic()
            time.sleep(0.005)

    def new_launcher() -> int | None:
        pid = _launcher_pid()
        return pid if pid is not None and pid not in killed else None

    def judging(station: Station) -> dict[int, tuple[int, float]]:
        board = station.judges.board
        return board.judging() if board is not None else {}

    def innocent(station: Station) -> list[int]:
        """Inputs being judged that never counted a failure (a suspect goes alone)."""
        suspects = involved | set(station.judges.failures) | station.judges.alone
        return [i for i in judging(station) if i not in suspects]

    worker_deaths = 0
    with running(s) as station:
        for round_ in range(10):
            arrive()
            arrive()
            how = round_ % 3
            if how == 0:  # while workers judge
                wait_for(lambda: new_launcher() is not None and bool(judging(station)), "judging")
            elif how == 1:  # at once, as it starts: the launcher dies twice in a row
                wait_for(lambda: new_launcher() is not None, "a new launcher")
            else:  # once it has served a while
                wait_for(lambda: new_launcher() is not None, "a new launcher")
                time.sleep(1.0)
            pid = new_launcher()
            assert pid is not None
            board = station.judges.board
            os.kill(pid, signal.SIGKILL)
            killed.append(pid)
            if round_ % 3 == 2:  # and a worker of the next pool dies while judging a file
                wait_for(
                    lambda b=board: station.judges.board not in (None, b) and bool(innocent(station)),
                    "a worker judging",
                )
                now = judging(station)
                victim = innocent(station)[0]
                involved.update(now)
                restarts = station.judges.restarts
                with contextlib.suppress(ProcessLookupError):
                    os.kill(now[victim][0], signal.SIGKILL)
                involved.update(judging(station))
                # its pool retired (blaming the file) before the next launcher dies
                wait_for(lambda r=restarts: station.judges.restarts > r, "the worker's death seen")
                involved.update(station.judges.failures)
                worker_deaths += 1
            if round_ == 4:
                wait_until(lambda: any("worker launcher keeps dying" in t for t in heartbeat_troubles(s)), 30,
                           "the trouble in the heartbeat")
                report = status_text(s, datetime.datetime.now(datetime.UTC))
                assert "  trouble: the worker launcher keeps dying (" in report, report
        wait_until(lambda: settled(s, len(names)), 180, "every file final")
        wait_until(lambda: bool(_alerts(s, "worker launcher keeps dying")), 30, "the alert sent")
    check_invariants(s, names)
    assert not list(s.quarantine.iterdir()), "no input is quarantined"
    with Ledger(s.ledger) as ledger:
        archived = ledger.inputs.in_state("archived")
        assert sorted(Path(r.final_path or "").name.split("_", 1)[1] for r in archived) == sorted(names)
        results = ledger.results.recent(10_000)
        assert sorted(r.cell_id for r in results) == sorted(f"C-{i:03d}" for i in range(1, len(names) + 1)), (
            "each input judged and recorded exactly once"
        )
    assert worker_deaths == 3
    assert len(_alerts(s, "worker launcher keeps dying")) == 1
    assert len(_alerts(s, "ALERT")) == 1, _alerts(s, "ALERT")


def _launcher_of(station_pid: int) -> int | None:
    """The worker launcher of process ``station_pid``: its child running the fork server."""
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            stat = (entry / "stat").read_bytes()
            cmdline = (entry / "cmdline").read_bytes()
        except OSError:
            continue
        fields = stat[stat.rindex(b")") + 2 :].split()
        if int(fields[1]) == station_pid and fields[0] not in (b"Z", b"X") and (
            b"multiprocessing.forkserver" in cmdline
        ):
            return int(entry.name)
    return None


def _running(proc: subprocess.Popen[bytes]) -> bool:
    code = proc.poll()
    if code is not None:
        tail = proc.stderr.read().decode(errors="replace")[-3000:] if proc.stderr is not None else ""
        raise AssertionError(f"the station ended with exit code {code}:\n{tail}")
    return True


@pytest.mark.slow
def test_formgate_watch_keeps_running_when_its_launcher_is_killed_twice_in_a_row(tmp_path: Path) -> None:
    s = make_station(tmp_path / "st")
    inbox = s.inboxes[0].folder
    names = [f"w-{i}.csv" for i in range(1, 9)]
    proc = start_watch(s.root)
    killed: list[int] = []
    try:
        for pair_ in range(3):
            for name in names[pair_ * 2 : pair_ * 2 + 2]:
                drop(inbox, name, cycle_file(name[:-4].upper(), seed=len(name) + pair_))
            for _ in range(2):  # the launcher, then the one started in its place, at once
                wait_until(lambda: _running(proc) and _launcher_of(proc.pid) not in (None, *killed), 90,
                           "a launcher")
                pid = _launcher_of(proc.pid)
                assert pid is not None
                os.kill(pid, signal.SIGKILL)
                killed.append(pid)
                assert proc.poll() is None, "the station is still running"
        for name in names[6:]:
            drop(inbox, name, cycle_file(name[:-4].upper(), seed=9))
        wait_until(lambda: settled(s, len(names)), 120, "every file final")
        assert proc.poll() is None, "the station is still running"
    finally:
        code = stop_watch(proc)
    assert code == 0
    check_invariants(s, set(names))
    assert not list(s.quarantine.iterdir())
    with Ledger(s.ledger) as ledger:
        assert sorted(r.cell_id for r in ledger.results.recent(100)) == sorted(n[:-4].upper() for n in names)
