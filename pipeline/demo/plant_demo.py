"""`formgate plant demo`: two stations on one plant database of the demo's own.

A PostgreSQL server is started in a temporary folder on loopback (pipeline.plant.localserver;
its binaries come from the operating system), its schema set up, and two stations run side
by side on the invented demo lot DEMO-LOT-04, each forwarding its ledger to that database:
hall A forms every cell, reads the lot's aging tester file and grades the first cells; hall B
grades the rest. Each station alone waits for ever for the stage the other ran; the plant
decides those cells once, over both. The demo then runs the plant commands as a person would
(`plant lot show`, `plant cell show`), with a quality desk's mail settings, so the plant's
letters are written as .eml files into the desk's mail folder, and stops the server.
Demo only: nothing here is used by the station or the plant.
"""

from __future__ import annotations

import email.parser
import email.policy
import os
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Callable
from pathlib import Path

import psycopg

from pipeline.demo.lots import DEMO_STAGED_CELLS, DemoCell, demo_aging_file, demo_stage_files
from pipeline.ledger.ledger import Ledger
from pipeline.plant.feed import read_state
from pipeline.plant.forward import behind
from pipeline.plant.localserver import INSTALL, NO_SERVER, LocalServerError, remove, server_bin, start_server
from pipeline.plant.schema import migrate
from pipeline.shipped import RULES_DIR
from pipeline.station.handoff import is_temporary
from pipeline.station.settings import Settings, init_station, read_settings, smtp_settings
from pipeline.station.station import Station

LOT = "DEMO-LOT-04"
GRADED_AT_A = 8  # hall A grades the first cells of the lot itself; hall B the others
HALLS = ("hall-a", "hall-b")

HALL_TOML = """\
# Demo station written by `formgate plant demo`: one of two halls on one plant database.
[station]
name = "{name}"
workers = 1
reconcile_s = 2.0
heartbeat_s = 2.0
certify = "failed_and_held"

[inbox.cyclers]            # cyclers that write NAME.part and rename it when done
folder = "inbox"
handover = "rename"

[mail]                     # no [smtp] host: every mail is written into mail/ as .eml
failures_to = ["quality@example.com"]
holds_to = ["quality@example.com"]
digests_to = ["production@example.com"]
alerts_to = ["maintenance@example.com"]
digest_quiet_s = 5.0

[plant]
database = "{url}"
station_id = "{name}"
"""

DESK_TOML = """\
# The quality desk's mail settings for the plant's letters (formgate plant ... --letters
# FOLDER): only [smtp] and [mail] are used; no station runs from this folder.
[station]
name = "quality-desk"

[inbox.unused]
folder = "inbox"
handover = "rename"

[mail]                     # no [smtp] host: the plant's letters are written into mail/ as .eml
failures_to = ["quality@example.com"]
holds_to = ["quality@example.com"]
"""


def hall_files(cells: tuple[DemoCell, ...], graded_at_a: int) -> dict[str, list[tuple[str, bytes]]]:
    """The files each hall's cyclers hand over: hall A forms every cell, reads the aging tester
    file and grades the first ``graded_at_a`` cells; hall B grades the rest."""
    a: list[tuple[str, bytes]] = []
    b: list[tuple[str, bytes]] = []
    for n, cell in enumerate(cells):
        stages = demo_stage_files(cell)
        a.append((f"{cell.cell_id}-formation.csv", stages["formation"]))
        (a if n < graded_at_a else b).append((f"{cell.cell_id}-grading.csv", stages["grading"]))
    a.append((f"{cells[0].lot}-aging.csv", demo_aging_file(cells)))
    return {HALLS[0]: a, HALLS[1]: b}


def make_hall(root: Path, name: str, url: str) -> Settings:
    """A station folder for one hall, forwarding to ``url`` under its own name."""
    init_station(root, rules_from=RULES_DIR)
    (root / "station.toml").write_text(HALL_TOML.format(name=name, url=url), encoding="utf-8")
    settings = read_settings(root)
    for folder in settings.all_folders():
        folder.mkdir(parents=True, exist_ok=True)
    return settings


def make_desk(root: Path) -> Path:
    """The quality desk's folder: a station.toml whose [mail] the plant's letters use."""
    root.mkdir(parents=True, exist_ok=True)
    (root / "station.toml").write_text(DESK_TOML, encoding="utf-8")
    (root / "mail").mkdir(exist_ok=True)
    return root


def hand_over(folder: Path, name: str, data: bytes) -> None:
    """Write-then-rename, as a cycler of a rename inbox does."""
    part = folder / f".{name}.part"
    part.write_bytes(data)
    os.rename(part, folder / name)


def drained_and_fed(settings: Settings, expected: int) -> bool:
    """Every handed-over file judged and final, every certificate rendered, and every row
    forwarded to the plant."""
    inbox = settings.inboxes[0].folder
    if any(not is_temporary(p.name) for p in inbox.iterdir()):
        return False
    if not settings.ledger.exists():
        return False
    with Ledger(settings.ledger) as ledger:
        if ledger.inputs.in_state("claimed", "judged", "published"):
            return False
        if ledger.certificates.backlog().waiting:
            return False
        finals = ledger.inputs.in_state("archived", "quarantined", "duplicate")
        if len([r for r in finals if r.final_path]) < expected:
            return False
        started = ledger.db.one("SELECT 1 FROM plant_feed") is not None
        return started and behind(ledger) == 0 and read_state(ledger).since is None


def run_halls(halls: dict[str, Settings], files: dict[str, list[tuple[str, bytes]]],
              timeout_s: float = 900.0) -> bool:
    """Run every hall's station in a thread of its own while its cyclers hand their files
    over; stop them once all are judged and forwarded (True) or at ``timeout_s`` (False)."""
    stop = threading.Event()
    errors: list[BaseException] = []

    def station(settings: Settings) -> Callable[[], None]:
        def run() -> None:
            try:
                Station(settings, smtp_settings(settings, {})).run(stop)
            except BaseException as exc:  # shown below
                errors.append(exc)
                stop.set()
        return run

    threads = [threading.Thread(target=station(s), name=f"demo-{name}") for name, s in halls.items()]
    for t in threads:
        t.start()
    done = False
    try:
        for name, settings in halls.items():
            for file_name, data in files[name]:
                hand_over(settings.inboxes[0].folder, file_name, data)
        deadline = time.monotonic() + timeout_s
        while not stop.is_set() and time.monotonic() < deadline:
            if all(drained_and_fed(s, len(files[n])) for n, s in halls.items()):
                done = True
                break
            time.sleep(1.0)
    finally:
        stop.set()
        for t in threads:
            t.join()
    if errors:
        raise errors[0]
    return done


def _command(*argv: str) -> subprocess.CompletedProcess[str]:
    """Run a formgate command as a person would, and show it with what it printed."""
    shown = " ".join(a if " " not in a else f"'{a}'" for a in argv)
    print(f"\n$ formgate {shown}")
    done = subprocess.run([sys.executable, "-m", "pipeline", *argv], capture_output=True,
                          text=True, timeout=300)
    for line in (done.stdout + done.stderr).splitlines():
        print(f"  {line}")
    return done


def plant_decisions(url: str, cell_id: str) -> int:
    with psycopg.connect(url) as conn:
        row = conn.execute("SELECT count(*) FROM formgate.plant_decisions WHERE lot = %s AND "
                           "cell_id = %s", (LOT, cell_id)).fetchone()
    return int(row[0]) if row else 0


def run_plant_demo(folder: Path | None = None, cells: tuple[DemoCell, ...] = DEMO_STAGED_CELLS,
                   graded_at_a: int = GRADED_AT_A) -> int:
    """The whole demo; 0 when the lot shows both halls' cells with one yield and a cell formed
    at hall A and graded at hall B has one plant decision, 2 when no server can start."""
    if server_bin() is None:
        print(f"the plant demo cannot run: it starts a PostgreSQL server of its own, and there "
              f"are {NO_SERVER}. {INSTALL}", file=sys.stderr)
        return 2
    root = folder or Path(tempfile.mkdtemp(prefix="formgate-plant-demo-"))
    root.mkdir(parents=True, exist_ok=True)
    try:
        server = start_server()
    except LocalServerError as exc:
        print(f"the plant demo cannot run: {exc}", file=sys.stderr)
        return 2
    try:
        url = server.new_database("formgate")
        with psycopg.connect(url) as conn:
            migrate(conn, where="of the demo")
        files = hall_files(cells, graded_at_a)
        halls = {name: make_hall(root / name, name, url) for name in HALLS}
        desk = make_desk(root / "quality-desk")
        shared = cells[graded_at_a]
        print(f"plant demo in {root}: a PostgreSQL server of its own on 127.0.0.1:{server.port}, "
              f"two stations forwarding to it.\n  hall-a forms all {len(cells)} cells of {LOT}, "
              f"reads its aging tester file and grades {graded_at_a} of them "
              f"({len(files['hall-a'])} files);\n  hall-b grades the other "
              f"{len(cells) - graded_at_a} ({len(files['hall-b'])} files).")
        if not run_halls(halls, files):
            print("THE STATIONS DID NOT JUDGE AND FORWARD EVERY FILE IN TIME")
            return 1
        print("both stations judged their files and forwarded every ledger row; each waits for "
              "the stage the other ran, and the plant decides those cells once, over both:")
        lot = _command("plant", "lot", "show", LOT, "--database", url, "--letters", str(desk))
        cell = _command("plant", "cell", "show", shared.cell_id, "--database", url,
                        "--letters", str(desk))
        letters = sorted((desk / "mail").glob("*.eml"))
        print(f"\nthe plant's letters (.eml, from the quality desk's [mail]): {desk / 'mail'}")
        for path in letters:
            with path.open("rb") as fh:
                message = email.parser.BytesHeaderParser(policy=email.policy.default).parse(fh)
            print(f"  {path.name}\n    {' '.join(str(message['Subject']).split())}")
        print(f"stations: {root / 'hall-a'}, {root / 'hall-b'} (the database stopped with the demo)")
        first = lot.stdout.splitlines()[0] if lot.stdout else ""
        ok = (lot.returncode == 0 and cell.returncode == 0
              and f"{len(cells)} cell(s) at 2 station(s) (hall-a, hall-b)" in first
              and plant_decisions(url, shared.cell_id) == 1)
        if not ok:
            print("EXPECTED EVERY CELL OF THE LOT AT BOTH STATIONS WITH ONE YIELD, AND ONE PLANT "
                  f"DECISION FOR {shared.cell_id}")
            return 1
        return 0
    finally:
        remove(server)
