"""Judging many archived files on Dask (pipeline.regrade.grid): on a LocalCluster and on a
separately started `dask scheduler` with two `dask worker` processes, reading the archive
or shipping the bytes, every result equals the one judged in this process; a changed
archive copy is an error, never judged; the cache makes a second run judge nothing, and a
run closed half-way (or stopped by Ctrl-C) resume without judging any file twice.

The cluster is real: processes on 127.0.0.1, free ports, stopped at the end whatever
happens. The archive is a few dozen demo cycle files written once for the module.
"""

from __future__ import annotations

import dataclasses
import datetime
import gzip
import hashlib
import io
import json
import os
import re
import signal
import socket
import subprocess
import sys
import textwrap
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import psutil
import pytest
from distributed import Client, default_client

from pipeline.demo.lots import ALL_DEMO_CELLS, DEMO_CELLS, DemoCell, demo_file_bytes
from pipeline.errors import FormgateError, RulesError
from pipeline.read.profile import load_profile
from pipeline.regrade.cache import RegradeCache
from pipeline.regrade.grid import judge_many
from pipeline.regrade.items import Judged, RegradeItem, RunStats
from pipeline.regrade.rules_bundle import Rules
from pipeline.regrade.tasks import batch_size, worker_state
from pipeline.report.result import to_json
from pipeline.rulebook.book import load_rules_dir
from pipeline.runner import judge
from tests.conftest import REPO, RULES_DIR

ANALYSED_AT = datetime.datetime(2026, 3, 10, 12, 0, tzinfo=datetime.UTC)
TAB_PROFILE = "tab_separated_ms.toml"
DASK = Path(sys.executable).with_name("dask")


@dataclasses.dataclass(frozen=True)
class Archive:
    """The archive's items (key = file name) and what judging each in this process gives."""

    folder: Path
    items: tuple[RegradeItem, ...]
    expected: dict[str, tuple[str | None, str | None]]  # (result JSON, error)


def _other_cell(cell: DemoCell, suffix: str) -> tuple[str, bytes]:
    """The cell's file as another cell's: its cell id line changed, so other bytes."""
    data = demo_file_bytes(cell)
    text = gzip.decompress(data) if cell.compressed else data
    text = text.replace(f"# cell_id: {cell.cell_id}\n".encode(), f"# cell_id: {cell.cell_id}{suffix}\n".encode(), 1)
    name = cell.file_name.replace(cell.cell_id, cell.cell_id + suffix)
    return name, gzip.compress(text, mtime=0) if cell.compressed else text


def _tab_layout(cell: DemoCell) -> bytes:
    """The cell's record in the shipped tab-separated layout (ms, mA, '//' metadata lines)."""
    head, _, body = demo_file_bytes(cell).decode("utf-8").rpartition("time_s,")
    rows = [line.split(",") for line in ("time_s," + body).strip().split("\n")]
    text = "".join("//" + line[1:] + "\n" for line in head.strip().split("\n"))
    text += "t_ms\tU_V\tI_mA\tT_degC\n"
    for t, v, i, temp, *_ in rows[1:]:
        text += f"{float(t) * 1000:.0f}\t{v}\t{float(i) * 1000:.2f}\t{temp}\n"
    return text.encode("utf-8")


@pytest.fixture(scope="module")
def archive(tmp_path_factory: pytest.TempPathFactory) -> Archive:
    folder = tmp_path_factory.mktemp("archive")
    profile_text = (RULES_DIR / "profiles" / TAB_PROFILE).read_text(encoding="utf-8")
    files: dict[str, tuple[bytes, str | None, str | None]] = {}  # name -> bytes, profile name, text
    for cell in ALL_DEMO_CELLS:
        files[cell.file_name] = (demo_file_bytes(cell), None, None)
    for cell in DEMO_CELLS[:6]:
        name, data = _other_cell(cell, "-B")
        files[name] = (data, None, None)
    # read through an import profile: one named from the rules folder, one given with its text
    files["tab-log-1.txt"] = (_tab_layout(DEMO_CELLS[0]), TAB_PROFILE, None)
    files["tab-log-2.txt"] = (_tab_layout(DEMO_CELLS[1]), TAB_PROFILE, profile_text)
    files["not-a-cycle-file.csv"] = (b"hello,world\n1,2\n", None, None)  # an "error" verdict
    book = load_rules_dir(RULES_DIR)
    items, expected = [], {}
    for name, (data, profile_name, text) in files.items():
        path = folder / name
        path.write_bytes(data)
        sha = hashlib.sha256(data).hexdigest()
        items.append(RegradeItem(sha, name, str(path), profile_text=text, profile_name=profile_name, key=name))
        profile = load_profile(profile_text, profile_name) if profile_name else None
        try:
            result = judge(data, name, book, analysed_at=ANALYSED_AT, profile=profile)
            expected[name] = (to_json(result), None)
        except FormgateError as exc:
            expected[name] = (None, str(exc))
    assert sum(error is not None for _, error in expected.values()) == 1
    return Archive(folder, tuple(items), expected)


@pytest.fixture(scope="module")
def rules() -> Rules:
    return Rules.read(RULES_DIR)


def _by_key(answers: list[Judged]) -> dict[Any, Judged]:
    by_key: dict[Any, Judged] = {}
    for answer in answers:
        assert answer.item_key not in by_key, f"{answer.item_key} answered twice"
        by_key[answer.item_key] = answer
    return by_key


def _assert_in_process_results(answers: list[Judged], archive: Archive, rules: Rules) -> None:
    by_key = _by_key(answers)
    assert sorted(by_key) == sorted(archive.expected)
    for item in archive.items:
        answer = by_key[item.key]
        assert (answer.result_json, answer.error) == archive.expected[item.key], item.key
        assert answer.judged and answer.sha256 == item.sha256 and answer.rules_digest == rules.digest


# ---------------------------------------------------------------------------------------------
# A real scheduler and two real workers, started as a station's operator would start them


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


def _start(argv: list[str], log: Path) -> subprocess.Popen[bytes]:
    with log.open("wb") as out:  # the child keeps its own copy of the handle
        return subprocess.Popen(argv, stdout=out, stderr=subprocess.STDOUT, cwd=log.parent, process_group=0)


def _stop(process: subprocess.Popen[bytes]) -> None:
    """SIGTERM to the process's own group (a worker's nanny and its worker process), then SIGKILL."""
    for sig, wait_s in ((signal.SIGTERM, 15.0), (signal.SIGKILL, 5.0)):
        try:
            os.killpg(process.pid, sig)
        except ProcessLookupError:
            return
        try:
            process.wait(timeout=wait_s)
            return
        except subprocess.TimeoutExpired:
            continue


@pytest.fixture(scope="module")
def scheduler(tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    """The address of a `dask scheduler` with two `dask worker` processes of one thread each."""
    where = tmp_path_factory.mktemp("dask")
    port = _free_port()
    address = f"tcp://127.0.0.1:{port}"
    logs = [where / "scheduler.log", where / "worker-1.log", where / "worker-2.log"]
    processes = []
    try:
        processes.append(
            _start([str(DASK), "scheduler", "--host", "127.0.0.1", "--port", str(port), "--no-dashboard",
             "--dashboard-address", "127.0.0.1:0"], logs[0])
        )
        for n in (1, 2):
            processes.append(
                _start(
                    [str(DASK), "worker", address, "--nthreads", "1", "--nworkers", "1", "--host", "127.0.0.1",
                     "--no-dashboard", "--name", f"worker-{n}", "--death-timeout", "60",
                     "--local-directory", str(where / f"worker-{n}")],
                    logs[n],
                )
            )
        deadline = time.monotonic() + 90
        while _workers_connected(address) < 2:
            dead = [log for process, log in zip(processes, logs, strict=True) if process.poll() is not None]
            if dead or time.monotonic() > deadline:
                pytest.fail("the Dask processes did not start:\n" + "\n".join(log.read_text() for log in logs))
            time.sleep(0.2)
        yield address
    finally:
        for process in reversed(processes):
            _stop(process)


def _workers_connected(address: str) -> int:
    try:
        with Client(address, timeout=2) as client:
            return len(client.nthreads())
    except OSError:
        return 0


def _worker_states(address: str) -> dict[str, dict[str, int]]:
    with Client(address, timeout=30) as client:
        states: dict[str, dict[str, int]] = client.run(worker_state)
        return states


# ---------------------------------------------------------------------------------------------
# Pure parts


def test_the_rules_bundle_holds_rule_files_and_profiles_under_one_digest(tmp_path: Path) -> None:
    bundle = Rules.read(RULES_DIR)
    names = [name for name, _ in bundle.files]
    assert names == sorted(names)
    assert set(bundle.rule_files) == {p.name for p in RULES_DIR.glob("*.toml")}
    assert set(bundle.profile_files) == {f"profiles/{p.name}" for p in (RULES_DIR / "profiles").glob("*.toml")}
    assert bundle.profile_text(TAB_PROFILE) == (RULES_DIR / "profiles" / TAB_PROFILE).read_text(encoding="utf-8")
    assert bundle.profile_text("absent.toml") is None
    # the same rule sets as loading the folder, the same digest from the same texts
    assert bundle.rulebook() == load_rules_dir(RULES_DIR)
    assert Rules.from_texts(dict(bundle.files), folder=str(RULES_DIR)) == bundle
    # any edit, to a rule file or to a profile, is another digest
    for name in ("nmc_graphite.toml", f"profiles/{TAB_PROFILE}"):
        edited = {**dict(bundle.files), name: dict(bundle.files)[name] + "\n# edited\n"}
        assert Rules.from_texts(edited).digest != bundle.digest


def test_a_broken_rules_folder_is_refused_with_the_file_and_line(tmp_path: Path) -> None:
    (tmp_path / "profiles").mkdir()
    for path in RULES_DIR.glob("*.toml"):
        (tmp_path / path.name).write_bytes(path.read_bytes())
    text = (tmp_path / "nmc_graphite.toml").read_text(encoding="utf-8")
    (tmp_path / "nmc_graphite.toml").write_text(text + "\nnot valid toml = = 1\n", encoding="utf-8")
    with pytest.raises(RulesError) as refused:
        Rules.read(tmp_path)
    assert str(refused.value).startswith(f"{tmp_path / 'nmc_graphite.toml'}, line ")
    with pytest.raises(RulesError, match="rule folder not found"):
        Rules.read(tmp_path / "absent")


def test_a_task_aims_at_a_second_of_judging_and_the_files_left_at_four_tasks_per_worker_thread() -> None:
    assert batch_size(None, 2) == 20  # before a task has come back
    assert batch_size(10_000_000, 64, 0.020) == 50
    assert batch_size(10_000_000, 512, 0.020) == 128  # 2.56 s: the scheduler finishes 200 tasks a second
    assert batch_size(10_000_000, 512, 0.0001) == 500  # a task's answers stay a few MB
    assert batch_size(10_000_000, 64, 5.0) == 1
    assert batch_size(400, 2, 0.005) == 50  # 8 tasks for 2 threads
    assert batch_size(39, 2) == 5
    assert batch_size(5, 2, 0.005) == 1
    with pytest.raises(ValueError, match="path or its bytes"):
        RegradeItem("0" * 64, "a.csv")


# ---------------------------------------------------------------------------------------------
# On a LocalCluster, and on a scheduler with two workers


@pytest.mark.slow
@pytest.mark.parametrize("ship_bytes", [False, True], ids=["workers-read", "bytes-shipped"])
def test_a_local_cluster_gives_the_results_judged_in_process(
    archive: Archive, rules: Rules, ship_bytes: bool
) -> None:
    stats = RunStats()
    answers = list(
        judge_many(archive.items, rules, workers=2, ship_bytes=ship_bytes, analysed_at=ANALYSED_AT,
                   progress=False, stats=stats)
    )
    _assert_in_process_results(answers, archive, rules)
    assert (stats.workers, stats.batch_files) == (2, batch_size(len(archive.items), 2))
    assert stats.files_judged == stats.files_sent == len(archive.items)
    with pytest.raises(ValueError, match="No clients found"):
        default_client()  # the run's client was never the process's default, and is closed


@pytest.mark.slow
@pytest.mark.parametrize("ship_bytes", [False, True], ids=["workers-read", "bytes-shipped"])
def test_a_scheduler_and_two_workers_give_the_results_judged_in_process(
    scheduler: str, archive: Archive, rules: Rules, ship_bytes: bool
) -> None:
    stats = RunStats()
    answers = list(
        judge_many(archive.items, rules, scheduler=scheduler, workers=2, ship_bytes=ship_bytes,
                   analysed_at=ANALYSED_AT, progress=False, stats=stats)
    )
    _assert_in_process_results(answers, archive, rules)
    assert stats.tasks == stats.tasks_done >= 2 * 4 and stats.largest_batch <= batch_size(len(archive.items), 2)
    # both workers judged, each having parsed these rules once however many tasks it ran
    states = _worker_states(scheduler)
    assert len(states) == 2 and all(s["files_judged"] > 0 and s["rules_parsed"] == 1 for s in states.values())


@pytest.mark.slow
def test_each_worker_parses_a_rules_bundle_once_for_all_its_tasks_and_runs(
    scheduler: str, archive: Archive, rules: Rules
) -> None:
    edited = Rules.from_texts({**dict(rules.files), "nmc_graphite.toml": rules.rule_files["nmc_graphite.toml"] + "\n# edited\n"})
    before = _worker_states(scheduler)
    for _ in range(2):
        answers = list(judge_many(archive.items[:12], edited, scheduler=scheduler, batch_files=1,
                                  analysed_at=ANALYSED_AT, progress=False))
        assert len(answers) == 12 and all(a.rules_digest == edited.digest for a in answers)
    after = _worker_states(scheduler)
    assert sum(after[w]["tasks"] - before[w]["tasks"] for w in after) == 24
    assert {after[w]["rules_parsed"] - before[w]["rules_parsed"] for w in after if after[w]["tasks"] > before[w]["tasks"]} == {1}


def test_a_scheduler_out_of_reach_is_a_located_error(archive: Archive, rules: Rules) -> None:
    address = f"tcp://127.0.0.1:{_free_port()}"  # nothing listens there
    with pytest.raises(FormgateError, match=rf"^cannot reach the Dask scheduler at {address} "):
        next(judge_many(archive.items, rules, scheduler=address, analysed_at=ANALYSED_AT, wait_s=1))


@pytest.mark.slow
def test_a_run_waits_for_the_workers_it_asks_for_and_says_when_they_do_not_come(
    scheduler: str, archive: Archive, rules: Rules
) -> None:
    with pytest.raises(FormgateError, match=rf"^fewer than 3 Dask workers joined the scheduler at {scheduler} within 1 s"):
        next(judge_many(archive.items, rules, scheduler=scheduler, workers=3, analysed_at=ANALYSED_AT, wait_s=1))


class _Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


@pytest.mark.slow
def test_the_progress_bar_shows_files_per_second_on_a_terminal(
    scheduler: str, archive: Archive, rules: Rules, monkeypatch: pytest.MonkeyPatch
) -> None:
    screen = _Terminal()
    monkeypatch.setattr(sys, "stderr", screen)
    answers = list(judge_many(archive.items[:8], rules, scheduler=scheduler, analysed_at=ANALYSED_AT))
    assert len(answers) == 8
    shown = screen.getvalue()
    assert "regrade" in shown and "8/8" in shown and "file/s" in shown
    quiet = _Terminal()
    monkeypatch.setattr(sys, "stderr", quiet)
    list(judge_many(archive.items[:2], rules, scheduler=scheduler, analysed_at=ANALYSED_AT, progress=False))
    assert quiet.getvalue() == ""


@pytest.mark.slow
@pytest.mark.parametrize("ship_bytes", [False, True], ids=["workers-read", "bytes-shipped"])
def test_a_changed_or_missing_archive_copy_is_an_error_and_never_judged(
    scheduler: str, archive: Archive, rules: Rules, tmp_path: Path, ship_bytes: bool
) -> None:
    items = []
    for item in archive.items[:4]:
        assert item.path is not None
        copy = tmp_path / item.name
        copy.write_bytes(Path(item.path).read_bytes())
        items.append(dataclasses.replace(item, path=str(copy)))
    (tmp_path / items[0].name).write_bytes(b"# cell_id: X\n" + Path(archive.items[0].path or "").read_bytes())
    (tmp_path / items[1].name).unlink()
    lost = dataclasses.replace(archive.items[4], profile_name="absent.toml")  # not in the rules folder
    stats = RunStats()
    with RegradeCache(tmp_path / "regrade.sqlite") as cache:
        answers = _by_key(list(judge_many([*items, lost], rules, scheduler=scheduler, ship_bytes=ship_bytes,
                                          analysed_at=ANALYSED_AT, cache=cache, progress=False, stats=stats)))
        assert len(cache) == 2  # only judgements are kept: the next run tries the others again
    changed, missing, absent = answers[items[0].key], answers[items[1].key], answers[lost.key]
    assert not changed.judged and changed.result_json is None and changed.error is not None
    assert re.match(rf"{re.escape(items[0].name)}: the archived copy has changed: its SHA-256 is [0-9a-f]{{16}}\.\.\., "
                    rf"the input recorded had {items[0].sha256[:16]}\.\.\.; it was not judged\.", changed.error)
    assert not missing.judged and missing.error is not None
    assert missing.error.startswith(f"{items[1].name}: the archived copy cannot be read (No such file or directory)")
    assert not absent.judged and absent.error is not None
    assert absent.error.startswith(f"{lost.name}: its import profile 'absent.toml' is not in the rules folder")
    for item in items[2:]:
        assert (answers[item.key].result_json, answers[item.key].error) == archive.expected[item.key]
    # shipped, the missing copy is answered by this process and never sent
    assert (stats.not_sent, stats.files_sent) == ((2, 3) if ship_bytes else (1, 4))


@pytest.mark.slow
def test_with_the_cache_a_second_run_judges_nothing_and_one_input_twice_is_judged_once(
    scheduler: str, archive: Archive, rules: Rules, tmp_path: Path
) -> None:
    twice = dataclasses.replace(archive.items[0], key="the same input again")
    items = [archive.items[0], twice, *archive.items[1:]]  # in one batch: sent once
    first, second = RunStats(), RunStats()
    path = tmp_path / "regrade.sqlite"
    before = _worker_states(scheduler)
    answers = list(judge_many(items, rules, scheduler=scheduler, analysed_at=ANALYSED_AT, cache=path,
                              progress=False, stats=first))
    assert (first.files_sent, first.shared, first.from_cache) == (len(archive.items), 1, 0)
    assert _by_key(answers)[twice.key].result_json == archive.expected[archive.items[0].key][0]
    again = list(judge_many(items, rules, scheduler=scheduler, analysed_at=ANALYSED_AT, cache=path,
                            progress=False, stats=second))
    assert (second.tasks, second.files_sent, second.from_cache) == (0, 0, len(items))
    assert all(a.from_cache for a in again)
    assert {a.item_key: (a.result_json, a.error) for a in again} == {a.item_key: (a.result_json, a.error) for a in answers}
    after = _worker_states(scheduler)
    assert sum(after[w]["files_judged"] - before[w]["files_judged"] for w in after) == len(archive.items)
    with RegradeCache(path) as cache:
        assert len(cache) == len(archive.items) and cache.analysed_at(rules.digest) == ANALYSED_AT


@pytest.mark.slow
def test_a_run_closed_half_way_resumes_and_no_file_is_judged_twice(
    scheduler: str, archive: Archive, rules: Rules, tmp_path: Path
) -> None:
    path = tmp_path / "regrade.sqlite"
    first, second = RunStats(), RunStats()
    before = _worker_states(scheduler)
    run = judge_many(archive.items, rules, scheduler=scheduler, batch_files=2, analysed_at=ANALYSED_AT,
                     cache=path, progress=False, stats=first)
    taken = [next(run) for _ in range(10)]
    run.close()  # the tasks in flight finish and are kept; nothing more is sent
    with RegradeCache(path) as cache:
        kept = len(cache)
    assert first.cancelled_tasks == 0 and 10 <= kept == first.files_judged < len(archive.items)
    resumed = list(judge_many(archive.items, rules, scheduler=scheduler, batch_files=2, analysed_at=ANALYSED_AT,
                              cache=path, progress=False, stats=second))
    _assert_in_process_results(resumed, archive, rules)
    from_cache = {a.item_key for a in resumed if a.from_cache}
    assert {a.item_key for a in taken} <= from_cache and len(from_cache) == kept
    assert second.files_sent == len(archive.items) - kept
    after = _worker_states(scheduler)
    assert sum(after[w]["files_judged"] - before[w]["files_judged"] for w in after) == len(archive.items)


# ---------------------------------------------------------------------------------------------
# Ctrl-C at a terminal: the whole process group gets SIGINT

_RUN_SCRIPT = """
import datetime, json, sys
from pipeline.regrade.grid import judge_many
from pipeline.regrade.items import RegradeItem, RunStats
from pipeline.regrade.rules_bundle import Rules

def main():
    items = [RegradeItem(**fields) for fields in json.load(open(sys.argv[1]))]
    stats = RunStats()
    at = datetime.datetime.fromisoformat(sys.argv[3])
    try:
        for answer in judge_many(items, Rules.read(sys.argv[2]), workers=2, batch_files=2, analysed_at=at,
                                 cache=sys.argv[4], progress=False, stats=stats):
            print("answer", answer.item_key, answer.from_cache, flush=True)
    except KeyboardInterrupt:
        print("interrupted", json.dumps(stats.__dict__), flush=True)
        sys.exit(130)
    print("done", json.dumps(stats.__dict__), flush=True)

if __name__ == "__main__":
    main()
"""


@pytest.mark.slow
def test_ctrl_c_stops_the_run_and_its_cluster_cleanly_and_a_rerun_resumes(
    archive: Archive, rules: Rules, tmp_path: Path
) -> None:
    script = tmp_path / "run_regrade.py"
    script.write_text(textwrap.dedent(_RUN_SCRIPT), encoding="utf-8")
    listing = tmp_path / "items.json"
    listing.write_text(json.dumps([{"sha256": i.sha256, "name": i.name, "path": i.path, "key": i.key,
                                    "profile_name": i.profile_name, "profile_text": i.profile_text}
                                   for i in archive.items]), encoding="utf-8")
    cache = tmp_path / "regrade.sqlite"
    argv = [sys.executable, str(script), str(listing), str(RULES_DIR), ANALYSED_AT.isoformat(), str(cache)]
    run = subprocess.Popen(argv, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=REPO,
                           process_group=0)
    try:
        assert run.stdout is not None
        seen = [run.stdout.readline() for _ in range(3)]
        assert all(line.startswith("answer ") for line in seen), seen
        os.killpg(run.pid, signal.SIGINT)  # as a terminal's Ctrl-C: to the run and its workers
        out, err = run.communicate(timeout=120)
    finally:
        if run.poll() is None:
            os.killpg(run.pid, signal.SIGKILL)
            run.wait()
    assert run.returncode == 130, err
    assert "Traceback" not in err and "KeyboardInterrupt" not in err, err
    stats = json.loads(out.strip().splitlines()[-1].removeprefix("interrupted "))
    assert stats["cancelled_tasks"] == 0 and stats["files_judged"] < len(archive.items)
    # every process the run started has ended (a zombie awaits only its reaper)
    deadline = time.monotonic() + 30
    while (left := _living_in_group(run.pid)) and time.monotonic() < deadline:
        time.sleep(0.2)
    assert not left
    with RegradeCache(cache) as kept:
        assert len(kept) == stats["files_judged"]
    rerun = subprocess.run(argv, capture_output=True, text=True, cwd=REPO, timeout=180, check=True)
    lines = rerun.stdout.strip().splitlines()
    answered = [line.split()[1] for line in lines[:-1]]
    assert sorted(answered) == sorted(archive.expected)
    again = json.loads(lines[-1].removeprefix("done "))
    assert again["from_cache"] == stats["files_judged"]
    assert again["files_sent"] == len(archive.items) - stats["files_judged"]


def _living_in_group(group: int) -> list[int]:
    living = []
    for process in psutil.process_iter(["pid", "status"]):
        try:
            if os.getpgid(process.pid) == group and process.info["status"] != psutil.STATUS_ZOMBIE:
                living.append(process.pid)
        except (ProcessLookupError, psutil.Error):
            continue
    return living


def test_only_the_event_loops_record_of_an_interrupted_wait_is_left_out_of_the_log() -> None:
    import logging

    from pipeline.regrade.grid import _InterruptedWait

    def record(message: str) -> logging.LogRecord:
        return logging.LogRecord("tornado.application", logging.ERROR, __file__, 1, message, None, None)

    keep = _InterruptedWait()
    assert not keep.filter(record(
        "Exception in callback functools.partial(<function sync.<locals>.cancel at 0x7f>)"
    ))
    assert keep.filter(record("Exception in callback functools.partial(<function other at 0x7f>)"))
    assert keep.filter(record("Uncaught exception GET /status"))
