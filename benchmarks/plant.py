"""The plant feed's cost: forwarded rows per second, and a station's throughput with and without it.

Run it with ``.venv/bin/python benchmarks/plant.py`` (about 3 minutes on 2 cores; ``--quick``
about 1 minute, ``--smoke`` about 30 s: checks that it runs, its figures mean nothing). It
starts a PostgreSQL server of its own in a temporary folder (the server binaries from the
operating system, as the tests do: pipeline/plant/localserver.py), then

1. runs a real 2-worker station on a pre-filled inbox (a burst of invented 72,000-row cycle
   files, one in 20 failing: benchmarks/run.py's files) three ways, taking turns: without a
   plant database, feeding one that is up, and with one that is down (nothing listens on its
   port). Each row gives the judged cells per second from the first verdict to the last, and
   the ratio to the station without a plant in the same round;
2. forwards the ledger of such a station to a new database with the feed alone, at several
   batch sizes: the ledger rows the plant took per second.

It prints one plain-text table; nothing is written to the docs. Speed is never asserted.
"""

from __future__ import annotations

import argparse
import datetime
import os
import shutil
import socket
import sqlite3
import statistics
import sys
import tempfile
import threading
import time
from dataclasses import dataclass
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
if str(REPO) not in sys.path:
    sys.path.insert(0, str(REPO))

from benchmarks.run import QUICK, SMOKE, Pool, make_records  # noqa: E402

STATION_TOML = """\
[station]
name = "bench-line-1"
workers = 2
certify = "failed_and_held"

[inbox.main]
folder = "inbox"
handover = "rename"

[mail]
failures_to = ["quality@example.com"]
alerts_to = ["maintenance@example.com"]
{plant}"""


@dataclass(frozen=True, slots=True)
class Mode:
    name: str
    files: int
    rounds: int
    batches: tuple[int, ...]


FULL = Mode("full", 200, 3, (100, 500, 2000))
QUICK_MODE = Mode("quick", 80, 2, (500,))
SMOKE_MODE = Mode("smoke", 12, 1, (500,))


def utc_now() -> datetime.datetime:
    return datetime.datetime.now(datetime.UTC)


def nobody_listens() -> str:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    return f"postgresql://nobody@127.0.0.1:{port}/plant"


def finals(ledger: Path) -> list[datetime.datetime]:
    if not ledger.exists():
        return []
    try:
        with sqlite3.connect(f"file:{ledger}?mode=ro", uri=True, timeout=1.0) as conn:
            return sorted(datetime.datetime.fromisoformat(r[0]) for r in conn.execute(
                "SELECT final_at FROM inputs WHERE final_path IS NOT NULL"))
    except sqlite3.Error:
        return []


def own_cpu_s() -> float:
    t = os.times()
    return t.user + t.system


def run_station(tmp: Path, pool: Pool, n: int, plant: str, label: str) -> tuple[float, float, Path]:
    """Judged cells/s of a station on a burst of ``n`` files, the CPU seconds per cell of the
    station's own process (its main loop, mail, lot and feed threads; not the workers'), and
    its ledger (kept)."""
    from pipeline.station.settings import load_settings, smtp_settings
    from pipeline.station.station import Station

    root = tmp / label
    root.mkdir()
    shutil.copytree(REPO / "rules", root / "rules")
    text = STATION_TOML.format(plant=plant)
    (root / "station.toml").write_text(text, encoding="utf-8")
    settings = load_settings(text, "station.toml", root)
    for folder in settings.all_folders():
        folder.mkdir(parents=True, exist_ok=True)
    for path, _ in pool.entries[:n]:
        os.link(path, settings.inboxes[0].folder / path.name)
    station = Station(settings, smtp_settings(settings, {}))
    stop = threading.Event()
    thread = threading.Thread(target=station.run, args=(stop,), name="bench-station")
    cpu0 = own_cpu_s()
    thread.start()
    deadline = time.monotonic() + 120 + 5 * n
    try:
        while len(finals(settings.ledger)) < n:
            if not thread.is_alive() or time.monotonic() > deadline:
                raise RuntimeError(f"the station ({label}) did not judge {n} files")
            time.sleep(0.05)
        cpu = (own_cpu_s() - cpu0) / n
    finally:
        stop.set()
        thread.join(300)
    done = finals(settings.ledger)
    span = (done[-1] - done[0]).total_seconds()
    return (n - 1) / span if span > 0 else float("nan"), cpu, settings.ledger


def forward_rate(ledger: Path, url: str, batch: int, tmp: Path) -> tuple[float, int]:
    """(rows/s, rows) of the feed alone forwarding a copy of ``ledger`` to ``url``."""
    from pipeline.ledger.ledger import Ledger
    from pipeline.plant.connect import PlantTarget
    from pipeline.plant.feed import PlantFeed
    from pipeline.plant.forward import behind, start_log

    copy = tmp / f"feed-{batch}.sqlite"
    with sqlite3.connect(ledger) as a, sqlite3.connect(copy) as b:
        a.backup(b)
    with Ledger(copy) as kept:
        start_log(kept, now=utc_now())
        rows = behind(kept)
    stop = threading.Event()
    feed = PlantFeed(copy, PlantTarget(url, f"bench-{batch}"), stop=stop, clock=utc_now,
                     batch_rows=batch, poll_s=0.01)
    t0 = time.perf_counter()
    feed.start()
    try:
        with Ledger(copy) as kept:
            while behind(kept):
                if not feed.is_alive():
                    raise RuntimeError(f"the feed stopped: {feed.stopped_for}")
                time.sleep(0.01)
        seconds = time.perf_counter() - t0
    finally:
        stop.set()
        feed.join(60)
    return rows / seconds, rows


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0] if __doc__ else None)
    group = parser.add_mutually_exclusive_group()
    group.add_argument("--quick", action="store_true", help="fewer files and rounds")
    group.add_argument("--smoke", action="store_true", help="checks that it runs; figures mean nothing")
    args = parser.parse_args(argv)
    mode = SMOKE_MODE if args.smoke else QUICK_MODE if args.quick else FULL
    from tests.plant_server import remove, require_server, start_server

    try:
        require_server({"CI": "true"})
    except BaseException as exc:  # pytest's skip/fail outcome: say why and stop
        print(f"cannot run: {exc}", file=sys.stderr)
        return 2
    tmp = Path(tempfile.mkdtemp(prefix="formgate-plant-bench-"))
    server = start_server()
    try:
        print(f"writing {mode.files} input files ...", flush=True)
        passing, failing = make_records(SMOKE if args.smoke else QUICK)
        pool = Pool(tmp / "pool", passing, failing)
        pool.ensure(mode.files)
        rates: dict[str, list[float]] = {"no plant database": [], "feeding a database that is up": [],
                                         "with a database that is down": []}
        ratios: dict[str, list[float]] = {k: [] for k in rates}
        cpus: dict[str, list[float]] = {k: [] for k in rates}
        ledger = None
        for r in range(mode.rounds):
            order = list(rates) if r % 2 == 0 else list(reversed(rates))
            got = {}
            for label in order:
                if label.startswith("no"):
                    plant = ""
                elif "up" in label:
                    plant = f'\n[plant]\ndatabase = "{server.new_database()}"\n'
                else:
                    plant = f'\n[plant]\ndatabase = "{nobody_listens()}"\nalert_after_s = 3600\n'
                print(f"round {r + 1}: station, {label} ...", flush=True)
                got[label], cpu, kept = run_station(tmp, pool, mode.files, plant, f"r{r}-{len(got)}")
                cpus[label].append(cpu)
                if label.startswith("no"):
                    ledger = kept
            for label, rate in got.items():
                rates[label].append(rate)
                ratios[label].append(rate / got["no plant database"])
        assert ledger is not None
        forwarded = []
        for batch in mode.batches:
            print(f"forwarding a station's ledger, batches of {batch} ...", flush=True)
            forwarded.append((batch, *forward_rate(ledger, server.new_database(), batch, tmp)))
    finally:
        remove(server)
        shutil.rmtree(tmp, ignore_errors=True)
    print()
    print(f"plant feed benchmark ({mode.name}: {mode.files} files of about 72,000 rows per station "
          f"run, 2 workers, {mode.rounds} round(s), load average "
          f"{os.getloadavg()[0]:.2f} at the end)")
    print()
    print(f"{'station':<32}{'judged cells/s (median, range)':>32}{'÷ no plant, same round':>24}"
          f"{'station process CPU ms/cell':>30}")
    for label, values in rates.items():
        spread = f"{statistics.median(values):.1f} ({min(values):.1f}-{max(values):.1f})"
        ratio = statistics.median(ratios[label])
        print(f"{label:<32}{spread:>32}{ratio:>24.2f}{1000 * statistics.median(cpus[label]):>30.1f}")
    print("(the database server runs on this machine too: with the feed up, its CPU is taken from "
          "the station's workers; a plant database runs elsewhere)")
    print()
    print(f"{'feed alone, batch rows':<34}{'ledger rows':>14}{'rows/s':>12}")
    for batch, rate, rows in forwarded:
        print(f"{batch:<34}{rows:>14,}{rate:>12,.0f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
