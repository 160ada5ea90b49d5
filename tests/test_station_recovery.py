"""Crash recovery: the station is killed at named fault points and at random; a restart completes
the work and the invariants hold (one final folder per input, ledger agrees, no temp files,
integrity ok, every mailed PDF parses). Also a burst of 500 files."""

from __future__ import annotations

import random
import time
from pathlib import Path

import pytest

from pipeline.ledger.ledger import Ledger
from pipeline.station import station, watcher
from pipeline.station.faults import POINTS
from tests.station_kit import (
    check_invariants,
    cycle_file,
    drop,
    make_station,
    running,
    settled,
    start_watch,
    station_toml,
    stop_watch,
    wait_until,
)

pytestmark = pytest.mark.slow


@pytest.mark.parametrize("point", POINTS)
def test_killed_at_a_fault_point_a_restart_completes_the_work(tmp_path: Path, point: str) -> None:
    s = make_station(tmp_path / "st")
    files = {"pass.csv": cycle_file("K-1"), "fail.csv": cycle_file("K-2", capacity_ah=1.5, seed=2)}
    for name, data in files.items():
        drop(s.inboxes[0].folder, name, data)
    proc = start_watch(s.root, {"FORMGATE_FAULT": point})
    try:
        proc.wait(120)
    finally:
        stop_watch(proc)
    assert proc.returncode == -9, f"the station did not reach fault point {point}"
    again = start_watch(s.root)
    try:
        wait_until(lambda: settled(s, 2), timeout_s=120, what=f"recovery after {point}")
        wait_until(lambda: _outbox_empty(s), timeout_s=60, what="outbox drained")
    finally:
        assert stop_watch(again) == 0
    check_invariants(s, set(files))
    with Ledger(s.ledger) as ledger:
        results = ledger.results.recent(100)
        assert sorted(r.cell_id for r in results) == ["K-1", "K-2"]  # each judged exactly once
        ids = [m.message_id for m in ledger.outbox.in_state("sent")]
        assert len(ids) == len(set(ids))


def _outbox_empty(s) -> bool:
    with Ledger(s.ledger) as ledger:
        return ledger.outbox.counts().get("pending", 0) == 0 and not ledger.digests.pending_lots()


def test_random_kills_never_lose_or_double_judge_a_file(tmp_path: Path) -> None:
    s = make_station(tmp_path / "st")
    rng = random.Random(20261201)
    dropped: set[str] = set()
    for round_no in range(6):
        for k in range(3):
            name = f"r{round_no}-{k}.csv"
            drop(
                s.inboxes[0].folder,
                name,
                cycle_file(
                    f"RK-{round_no}-{k}", seed=round_no * 10 + k, capacity_ah=1.5 if k == 2 else 2.0
                ),
            )
            dropped.add(name)
        proc = start_watch(s.root)
        time.sleep(rng.uniform(0.5, 4.0))
        proc.kill()
        stop_watch(proc)
    final = start_watch(s.root)
    try:
        wait_until(
            lambda: settled(s, len(dropped)), timeout_s=240, what="all files after the kills"
        )
        wait_until(lambda: _outbox_empty(s), timeout_s=60, what="outbox drained")
    finally:
        assert stop_watch(final) == 0
    check_invariants(s, dropped)
    with Ledger(s.ledger) as ledger:
        cells = [r.cell_id for r in ledger.results.recent(1000)]
        assert len(cells) == len(set(cells)) == len(dropped)


def test_outbox_survives_three_restarts_without_duplicates(tmp_path: Path) -> None:
    s = make_station(tmp_path / "st")
    for k in range(3):
        drop(s.inboxes[0].folder, f"f{k}.csv", cycle_file(f"O-{k}", capacity_ah=1.5, seed=k))
    for _ in range(3):
        proc = start_watch(s.root)
        time.sleep(3.0)
        stop_watch(proc)
    with running(s):
        wait_until(lambda: settled(s, 3) and _outbox_empty(s), timeout_s=120, what="all mail out")
    mails = sorted(p.name for p in s.mail.glob("*.eml"))
    with Ledger(s.ledger) as ledger:
        sent = ledger.outbox.in_state("sent")
    assert (
        len(sent) == len({m.message_id for m in sent}) == len(mails) == 3
    )  # three failure letters


def test_a_burst_of_500_files_all_reach_a_final_state_once(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    listings: list[int] = []
    real_list_entries = watcher.list_entries

    def counted(folder: Path) -> watcher.Listing:
        listing = real_list_entries(folder)
        listings.append(len(listing.files))
        return listing

    monkeypatch.setattr(station, "list_entries", counted)
    toml = station_toml(certificates='certify = "failed_and_held"\n')
    s = make_station(tmp_path / "st", toml)
    base = cycle_file("BURST", dt_s=300.0)
    names = set()
    for k in range(500):
        data = base.replace(b"# cell_id: BURST", f"# cell_id: B-{k:03d}".encode())
        drop(s.inboxes[0].folder, f"b{k:03d}.csv", data)
        names.add(f"b{k:03d}.csv")
    with running(s):
        wait_until(lambda: settled(s, 500), timeout_s=900, what="500 files")
    check_invariants(s, names)
    with Ledger(s.ledger) as ledger:
        results = ledger.results.recent(1000)
        assert len(results) == len({r.cell_id for r in results}) == 500
        assert {r.verdict for r in results} == {"pass"}
        assert all(r.pdf_path is None for r in results)  # certify = failed_and_held
    # the backlog is claimed from a listing at most a second old, not by listing the whole
    # inbox again for every file claimed
    assert listings and len([n for n in listings if n > 100]) < 100


def _descendants(pid: int) -> set[int]:
    """Every process below ``pid`` (children, their children, ...), from /proc."""
    parents: dict[int, int] = {}
    for entry in Path("/proc").iterdir():
        if entry.name.isdigit():
            try:
                stat = (entry / "stat").read_text()
            except OSError:  # gone while listing
                continue
            parents[int(entry.name)] = int(stat.rpartition(")")[2].split()[1])
    found: set[int] = set()
    todo = [pid]
    while todo:
        parent = todo.pop()
        children = {p for p, pp in parents.items() if pp == parent}
        todo.extend(children - found)
        found |= children
    return found


def _alive(pid: int) -> bool:
    try:
        state = (Path("/proc") / str(pid) / "stat").read_text().rpartition(")")[2].split()[0]
    except OSError:
        return False
    return state != "Z"  # a zombie has ended; only its parent's wait is missing


@pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="needs Linux /proc")
def test_a_killed_station_leaves_no_worker_processes_behind(tmp_path: Path) -> None:
    s = make_station(tmp_path / "st")
    drop(s.inboxes[0].folder, "w.csv", cycle_file("W-1"))
    proc = start_watch(s.root)
    try:
        wait_until(lambda: settled(s, 1), timeout_s=120, what="the file judged")
        below = _descendants(proc.pid)
        assert len(below) >= 2  # the pool's fork server and at least one worker
        proc.kill()  # as a crash or the OOM killer would: no chance to stop the pool
        proc.wait(30)
        wait_until(
            lambda: not any(_alive(p) for p in below), timeout_s=30, what="the workers to end"
        )
    finally:
        stop_watch(proc)
