"""A gzip bomb is refused by the uncompressed-size limit, while it unpacks, with its memory measured.

The bomb is 10 GiB of zero lines (a cycle file's head, then lines of 1,023 zeros) in a
22 MB .csv.gz, written by streaming (tests/hostile.py), never held in memory. It is read
for real in a child process by ``formgate check`` and by a station worker under the
default station settings (its address space limited by the default worker_memory_MB, as
a station limits it), and dropped into a real station. Each child reports its peak memory
(``resource.getrusage`` ``ru_maxrss``) before and after; the assertion messages give the
figures. A small process stands between pytest and each measured child: Linux carries a
process's ru_maxrss over fork and exec, so a child started by pytest directly would
report pytest's own peak.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from pipeline.ledger.ledger import Ledger
from tests.hostile import write_gzip_bomb
from tests.station_kit import (
    REPO,
    RULES,
    cycle_file,
    drop,
    make_station,
    running,
    settled,
    station_toml,
    wait_until,
)

pytestmark = pytest.mark.slow

MIB = 2**20
LAUNCHER = "import subprocess, sys; sys.exit(subprocess.run(sys.argv[1:]).returncode)"

CHECK_SCRIPT = """
import contextlib, io, json, resource, sys
import pipeline.runner  # what the command imports before it reads: not the bomb's cost
from pipeline.cli.main import main

def peak():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024

before = peak()
out, err = io.StringIO(), io.StringIO()
with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
    code = main(["check", sys.argv[1], "--rules", sys.argv[2], "--no-pdf"])
print(json.dumps({"before": before, "peak": peak(), "code": code, "out": out.getvalue()}))
"""

WORKER_SCRIPT = """
import datetime, hashlib, json, resource, sys
from pathlib import Path
from pipeline.ledger.rows import InputRow
from pipeline.rulebook.book import RuleBook, load_rule_set
from pipeline.station.settings import read_settings
from pipeline.station.tasks import Tasks
from pipeline.station.worker import init_worker, prepare_process, run_task

path, station, rules = Path(sys.argv[1]), Path(sys.argv[2]), sys.argv[3]
settings = read_settings(station)
at = datetime.datetime(2026, 3, 2, tzinfo=datetime.UTC)
digest = hashlib.sha256(path.read_bytes()).hexdigest()
row = InputRow(1, digest, path.name, path.stat().st_size, at, "claimed", None, None, 1, None,
               None, work_path=str(path))
rulebook = RuleBook((load_rule_set(Path(rules).read_text(), "test.toml"),))
task = Tasks(settings, *[None] * 6).task_for(row, rulebook, at, "none")  # reads only the settings
prepare_process()
init_worker(None, None, int(settings.worker_memory_MB * 2**20))  # the station's memory limit
before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
output = run_task(task)
print(json.dumps({
    "before": before,
    "peak": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024,
    "error": output.error,
    "worker_memory_MB": settings.worker_memory_MB,
    "max_uncompressed_MB": settings.max_uncompressed_MB,
}))
"""


@pytest.fixture(scope="module")
def bomb(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("bomb") / "bomb.csv.gz"
    write_gzip_bomb(path, text_gib=10)
    return path


def measured(script: str, *args: str) -> dict[str, object]:
    run = subprocess.run(
        [sys.executable, "-c", LAUNCHER, sys.executable, "-c", script, *args],
        cwd=REPO, capture_output=True, text=True, timeout=600, check=False,
    )
    assert run.returncode == 0, run.stderr[-3000:]
    found: dict[str, object] = json.loads(run.stdout.splitlines()[-1])
    return found


def figures(found: dict[str, object], compressed: int) -> str:
    before, peak = int(str(found["before"])), int(str(found["peak"]))
    return (
        f"peak memory (ru_maxrss) {peak / MIB:.0f} MiB: {before / MIB:.0f} MiB before reading, "
        f"{(peak - before) / MIB:.0f} MiB for a 10 GiB bomb of {compressed / 1e6:.0f} MB"
    )


def test_formgate_check_refuses_a_10_gib_bomb_at_its_cap_holding_no_more_than_the_cap(
    bomb: Path, tmp_path: Path
) -> None:
    from pipeline.read.cyclehead import MAX_UNCOMPRESSED_BYTES

    (tmp_path / "rules").mkdir()
    (tmp_path / "rules" / "test.toml").write_text(RULES, encoding="utf-8")
    found = measured(CHECK_SCRIPT, str(bomb), str(tmp_path / "rules"))
    report = figures(found, bomb.stat().st_size)
    assert found["code"] == 2, report
    assert "the file holds more than 256 MiB of text, the most formgate reads" in str(found["out"]), (
        report
    )
    grown = int(str(found["peak"])) - int(str(found["before"]))
    # the compressed bytes, the text up to the cap, one block: never a multiple of the cap
    assert grown < bomb.stat().st_size + MAX_UNCOMPRESSED_BYTES + 64 * MIB, report
    print(report)


def test_a_station_worker_refuses_a_10_gib_bomb_by_max_uncompressed_mb_in_a_few_blocks(
    bomb: Path, tmp_path: Path
) -> None:
    station = tmp_path / "station"
    station.mkdir()
    (station / "station.toml").write_text(
        '[station]\nname = "t"\n\n[inbox.main]\nfolder = "inbox"\nhandover = "rename"\n',
        encoding="utf-8",
    )
    (tmp_path / "test.toml").write_text(RULES, encoding="utf-8")
    found = measured(WORKER_SCRIPT, str(bomb), str(station), str(tmp_path / "test.toml"))
    report = figures(found, bomb.stat().st_size) + (
        f" (worker_memory_MB = {found['worker_memory_MB']}, "
        f"max_uncompressed_MB = {found['max_uncompressed_MB']})"
    )
    assert str(found["error"]).startswith(
        "bomb.csv.gz: the file holds more than 256 MB of text (unpacked), the station's limit "
        "max_uncompressed_MB = 256."
    ), report
    grown = int(str(found["peak"])) - int(str(found["before"]))
    # the text is counted block by block and thrown away: the compressed bytes and a few blocks
    assert grown < bomb.stat().st_size + 64 * MIB, report
    print(report)


def test_a_station_with_default_limits_quarantines_a_bomb_naming_max_uncompressed_mb(
    bomb: Path, tmp_path: Path
) -> None:
    s = make_station(tmp_path / "st", station_toml())
    with running(s):
        drop(s.inboxes[0].folder, "good.csv", cycle_file("G-1"))
        drop(s.inboxes[0].folder, "bomb.csv.gz", bomb.read_bytes())
        wait_until(lambda: settled(s, 2), timeout_s=120, what="both files final")
    reasons = [p.read_text() for p in s.quarantine.glob("*.reason.txt")]
    assert len(reasons) == 1
    assert "bomb.csv.gz: the file holds more than 256 MB of text (unpacked), the station's limit " \
           "max_uncompressed_MB = 256." in reasons[0]
    assert "worker_memory_MB" not in reasons[0].splitlines()[0]
    with Ledger(s.ledger) as ledger:
        assert [(r.cell_id, r.verdict) for r in ledger.results.recent(10)] == [("G-1", "pass")]
