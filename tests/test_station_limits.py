"""What one input may cost is bounded: lines, rows, memory, and a worker that dies is replaced.

Real worker processes: one is killed (SIGKILL, as the OOM killer would) each time it
judges the same file; the file is retried once, alone, then quarantined, and the file
judged beside it is not blamed. The memory limit is the real one of a worker process.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from pipeline.ledger.ledger import Ledger
from tests.station_kit import (
    REPO,
    cycle_file,
    drop,
    make_station,
    running,
    settled,
    station_toml,
    wait_until,
)

pytestmark = pytest.mark.slow


def test_files_past_a_limit_or_killing_their_worker_are_quarantined_and_others_are_judged(
    tmp_path: Path,
) -> None:
    s = make_station(tmp_path / "st", station_toml(extra="max_line_kB = 1\nmax_rows = 1000\n"))
    inbox = s.inboxes[0].folder
    long_line = cycle_file("LL-1").replace(b"# lot: LOT-A\n", b"# lot: LOT-A\n# note: " + b"x" * 1100 + b"\n")
    with running(s) as station:
        # input 1, within every limit, so that it is still being judged (and its certificate
        # drawn, a few hundred ms) when the test kills its worker; a file past max_rows would
        # be refused in a millisecond, before the kill, and the test would race the worker
        drop(inbox, "victim.csv", cycle_file("V-1", seed=1))
        wait_until(lambda: not (inbox / "victim.csv").exists(), what="victim claimed")
        drop(inbox, "beside.csv", cycle_file("B-1", seed=2))
        drop(inbox, "long-line.csv", long_line)
        drop(inbox, "many-rows.csv", cycle_file("MR-1", dt_s=20.0, seed=3))
        killed: set[int] = set()
        deadline = time.monotonic() + 120
        while len(killed) < 2 and time.monotonic() < deadline:
            board = station.judges.board
            entry = board.judging().get(1) if board is not None else None
            if entry is not None and entry[0] not in killed:
                os.kill(entry[0], signal.SIGKILL)  # the worker dies while judging input 1
                killed.add(entry[0])
            time.sleep(0.002)
        assert len(killed) == 2, "the victim was judged twice"
        wait_until(lambda: settled(s, 4), what="all four files final")
    reasons = {p.name.split("_", 1)[1]: p.read_text() for p in s.quarantine.glob("*.reason.txt")}
    assert sorted(reasons) == ["long-line.csv.reason.txt", "many-rows.csv.reason.txt", "victim.csv.reason.txt"]
    assert (
        "victim.csv: a worker process ended while judging it, on each of 2 tries; the file was not judged."
        in reasons["victim.csv.reason.txt"]
    )
    assert (
        "long-line.csv, line 3: the line is longer than the station's limit max_line_kB = 1 (1,024 bytes)."
        in reasons["long-line.csv.reason.txt"]
    )
    assert (
        "many-rows.csv: the file has more than 1,000 lines, the station's limit max_rows = 1000."
        in reasons["many-rows.csv.reason.txt"]
    )
    with Ledger(s.ledger) as ledger:
        assert [(r.cell_id, r.verdict) for r in ledger.results.recent(10)] == [("B-1", "pass")]


MEMORY_SCRIPT = """
import datetime, hashlib, sys
from pipeline.rulebook.book import RuleBook, load_rule_set
from pipeline.station.worker import Task, init_worker, prepare_process, run_task
from tests.station_kit import RULES, cycle_file

path = sys.argv[1]
data = cycle_file("MEM-1") + b"9e9,3.3,0.0,25.0\\n" * (3 * 2**20)  # about 50 MB
with open(path, "wb") as fh:
    fh.write(data)
digest = hashlib.sha256(data).hexdigest()
del data
prepare_process()
status = open("/proc/self/status").read().split("VmSize:")[1]
in_use = int(status.split()[0]) * 1024
init_worker(None, None, in_use + 24 * 2**20)  # 24 MiB more than the worker holds already
task = Task(1, path, "mem.csv", digest, RuleBook((load_rule_set(RULES, "t.toml"),)),
            datetime.datetime.now(datetime.UTC), certify="none", memory_note=" (worker_memory_MB = 7)")
print(run_task(task).error)
"""


def test_a_file_that_needs_more_memory_than_a_worker_may_use_is_refused_with_the_limit_named(
    tmp_path: Path,
) -> None:
    done = subprocess.run(
        [sys.executable, "-c", MEMORY_SCRIPT, str(tmp_path / "mem.csv")],
        cwd=REPO,
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )
    assert done.returncode == 0, done.stderr
    assert done.stdout.startswith(
        "mem.csv: judging the file needs more memory than a worker may use (worker_memory_MB = 7); "
        "it was not judged."
    ), done.stdout
