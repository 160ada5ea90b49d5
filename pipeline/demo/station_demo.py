"""`formgate demo`: a station on a temporary folder, fed by a simulated cycler, drained, summarised.

The simulated cycler hands the invented demo lots over the ways real cyclers do:
slow writes in chunks (settle inbox), write-then-rename (rename inbox), a marker
file after the data (marker inbox); it also drops a bad file and a second copy of
one file. The station runs exactly as `formgate watch` does; the demo stops it
once every file has reached the archive or quarantine and the outbox is empty.
Demo only: nothing here is used by the station itself.
"""

from __future__ import annotations

import datetime
import json
import logging
import tempfile
import threading
import time
from pathlib import Path

from pipeline.demo.lots import (
    ALL_DEMO_CELLS,
    DEMO_CHANNEL_CELLS,
    DEMO_STAGED_CELLS,
    WORN_CONTACT_CHANNEL,
    DemoCell,
    demo_aging_file,
    demo_file_bytes,
    demo_stage_files,
    stage_file_name,
)
from pipeline.ledger.ledger import Ledger
from pipeline.shipped import RULES_DIR
from pipeline.station.lots import LotOutcome
from pipeline.station.settings import Settings, init_station, read_settings, smtp_settings
from pipeline.station.station import Station

CHANNEL_LOT = "DEMO-LOT-05"
STATION_TOML = """\
# Demo station written by `formgate demo`: three inboxes, one per way of handing a
# file over, short waits so the demo runs in a minute or two, mail as .eml files.
[station]
name = "demo-line-1"
workers = 2
reconcile_s = 2.0
heartbeat_s = 2.0

[inbox.slow-writers]       # cyclers that just write; finished = unchanged for settle_s
folder = "inbox"
handover = "settle"
settle_s = 2.0

[inbox.renamers]           # cyclers that write NAME.part and rename it when done
folder = "inbox-rename"
handover = "rename"

[inbox.markers]            # cyclers that write NAME.done after the data
folder = "inbox-marker"
handover = "marker"

[mail]                     # no [smtp] host: every mail is written into mail/ as .eml
failures_to = ["quality@example.com"]
holds_to = ["quality@example.com"]
digests_to = ["production@example.com"]
alerts_to = ["maintenance@example.com"]
digest_quiet_s = 20.0
"""

# A file that cannot be judged: a metadata block, then a number with a typo.
BAD_FILE = (
    "# cell_id: L01-099\n# lot: DEMO-LOT-01\n# cell_type: DEMO-LFP-20A\n"
    "time_s,voltage_V,current_A\n0.0,3.301,0.0\n10.0,3.3O2,0.0\n20.0,3.302,0.0\n"
)


def _write_slowly(path: Path, data: bytes, pieces: int = 3, pause_s: float = 0.4) -> None:
    """Write in pieces with pauses, as a cycler streaming its file would."""
    with path.open("wb") as fh:
        step = max(1, len(data) // pieces)
        for start in range(0, len(data), step):
            fh.write(data[start : start + step])
            fh.flush()
            time.sleep(pause_s)


def simulate_cycler(root: Path, cells: tuple[DemoCell, ...], log: logging.Logger) -> list[str]:
    """Hand every cell's file over to the station's inboxes; return the names dropped."""
    dropped: list[str] = []
    for n, cell in enumerate(cells):
        data = demo_file_bytes(cell)
        name = cell.file_name
        if n % 5 == 1:  # write-then-rename
            part = root / "inbox-rename" / f"{name}.part"
            part.write_bytes(data)
            part.rename(part.with_name(name))
        elif n % 5 == 3:  # data, then a marker
            (root / "inbox-marker" / name).write_bytes(data)
            time.sleep(0.3)
            (root / "inbox-marker" / f"{name}.done").write_bytes(b"")
        else:  # slow writer
            _write_slowly(root / "inbox" / name, data)
        dropped.append(name)
        log.info("cycler: handed over %s", name)
    (root / "inbox" / "DEMO-LOT-01_L01-099.csv").write_text(BAD_FILE, encoding="utf-8")
    dropped.append("DEMO-LOT-01_L01-099.csv")
    again = cells[0]  # the same bytes once more, under a new name: a duplicate
    (root / "inbox-rename" / f"copy-of-{again.file_name}").write_bytes(demo_file_bytes(again))
    dropped.append(f"copy-of-{again.file_name}")
    return dropped


def simulate_staged_line(root: Path, log: logging.Logger) -> list[str]:
    """Hand over lot DEMO-LOT-04 as a line with an aging stage makes it: every cell's formation
    file, then the aging tester's file for the whole lot, then every cell's grading file."""
    dropped: list[str] = []
    files = {cell: demo_stage_files(cell) for cell in DEMO_STAGED_CELLS}

    def hand_over(name: str, data: bytes) -> None:
        part = root / "inbox-rename" / f"{name}.part"
        part.write_bytes(data)
        part.rename(part.with_name(name))
        dropped.append(name)
        log.info("line: handed over %s", name)

    for cell in DEMO_STAGED_CELLS:
        hand_over(stage_file_name(cell, "formation"), files[cell]["formation"])
    hand_over("DEMO-LOT-04_aging-readings.csv", demo_aging_file())
    for cell in DEMO_STAGED_CELLS:
        hand_over(stage_file_name(cell, "grading"), files[cell]["grading"])
    return dropped


def _drained(root: Path, ledger_path: Path, expected: int) -> bool:
    for inbox in ("inbox", "inbox-rename", "inbox-marker"):
        if any(p for p in (root / inbox).iterdir() if not p.name.endswith(".done")):
            return False
    # work/.taken keeps settle-mode originals for keep_originals_h after their copy was
    # archived: the station keeps them, it does not have them in hand
    if any(p for p in (root / "work").iterdir() if not p.name.startswith(".")):
        return False
    if not ledger_path.exists():
        return False
    with Ledger(ledger_path) as ledger:
        open_rows = ledger.inputs.in_state("claimed", "judged", "published")
        finals = ledger.inputs.in_state("archived", "quarantined", "duplicate")
        outbox = ledger.outbox.counts()
        return (
            not open_rows
            and len(finals) >= expected
            and outbox.get("pending", 0) == 0
            and not ledger.certificates.backlog().waiting
            and not ledger.digests.pending_lots()
        )


def simulate_channel_line(root: Path, log: logging.Logger) -> list[str]:
    """Hand over lot DEMO-LOT-05 as its rack of four channels finishes its cells, one at a time:
    channel 5-03's contact wears half-way through (pipeline.demo.lots.DEMO_CHANNEL_CELLS)."""
    dropped = []
    for cell in DEMO_CHANNEL_CELLS:
        part = root / "inbox-rename" / f"{cell.file_name}.part"
        part.write_bytes(demo_file_bytes(cell))
        part.rename(part.with_name(cell.file_name))
        dropped.append(cell.file_name)
        log.info("cycler: handed over %s (channel %s)", cell.file_name, cell.channel)
        time.sleep(0.3)  # a rack finishes its cells one after another
    return dropped


def run_station_demo(folder: Path | None = None) -> int:
    """Run the whole demo; 0 when every file ended where it should."""
    root = folder or Path(tempfile.mkdtemp(prefix="formgate-demo-"))
    init_station(root, rules_from=RULES_DIR)
    # the digests link the certificates where this machine opens them ([mail] is the last table)
    link_base = (root / "certificates").resolve().as_uri()
    (root / "station.toml").write_text(
        STATION_TOML + f'certificates_url = "{link_base}/"\n', encoding="utf-8"
    )
    for extra in ("inbox-rename", "inbox-marker"):
        (root / extra).mkdir(exist_ok=True)
    settings = read_settings(root)
    smtp = smtp_settings(settings, {})
    from pipeline.errors import setup_logging

    setup_logging(settings.logs, settings.log_max_MB, settings.log_keep, verbose=True)
    log = logging.getLogger("formgate.demo")
    cells = ALL_DEMO_CELLS
    stop = threading.Event()
    dropped: list[str] = []
    closed: list[LotOutcome] = []

    def drain(deadline: float) -> None:
        while not stop.is_set() and time.monotonic() < deadline:
            if _drained(root, settings.ledger, len(dropped)):
                return
            time.sleep(1.0)

    def feed_and_watch() -> None:
        try:
            dropped.extend(simulate_cycler(root, cells, log))
            dropped.extend(simulate_staged_line(root, log))
            dropped.extend(simulate_channel_line(root, log))
            deadline = time.monotonic() + 600
            drain(deadline)
            # quality staff close the staged lot while the station runs: its letters go out
            if not stop.is_set():
                closed.append(_close_staged_lot(settings))
                closed.append(_close_staged_lot(settings, CHANNEL_LOT))
                drain(deadline)
        finally:
            stop.set()

    feeder = threading.Thread(target=feed_and_watch, name="demo-cycler")
    staged = 2 * len(DEMO_STAGED_CELLS) + 1
    print(
        f"demo station in {root}; the simulated cycler starts handing over {len(cells) + 2} "
        f"files, a line with an aging stage {staged} more (lot DEMO-LOT-04), and a rack whose "
        f"channel {WORN_CONTACT_CHANNEL} wears {len(DEMO_CHANNEL_CELLS)} more ({CHANNEL_LOT})"
    )
    feeder.start()
    try:
        Station(settings, smtp).run(stop)
    finally:
        stop.set()
        feeder.join()
    code = _report(root, len(dropped))
    if len(closed) < 2:
        print("LOTS DEMO-LOT-04 AND DEMO-LOT-05 WERE NOT CLOSED")
        return 1
    return max(code, _show_staged_lot(closed[0]), _show_channels(settings, closed[1]))


def _show_channels(settings: Settings, outcome: LotOutcome) -> int:
    """The channel alerts the station raised, and lot DEMO-LOT-05's report and charts."""
    with Ledger(settings.ledger) as ledger:
        alerts = ledger.channels.every()
    print()
    print(f"lot {CHANNEL_LOT} (four channels, ten cells each; channel {WORN_CONTACT_CHANNEL} wears), "
          "closed:")
    for alert in alerts:
        print(f"  channel {alert.channel} at {alert.station}: SUSPECT since cell {alert.cell_id}: "
              f"{alert.evidence}")
    charts = sorted(outcome.report.parent.glob("_chart-*.svg"))
    print(f"  lot report (PDF): {outcome.report}  (by-channel page, the lot over time)")
    print(f"  charts (SVG):     {len(charts)} files beside it, e.g. {charts[0].name if charts else '-'}")
    print(f"  channels:         formgate channel show {settings.root} {WORN_CONTACT_CHANNEL}")
    flagged = [(a.station, a.channel) for a in alerts]
    if flagged != [(settings.station_name, WORN_CONTACT_CHANNEL)]:
        print(f"EXPECTED ONE ALERT, ON CHANNEL {WORN_CONTACT_CHANNEL}; GOT {flagged}")
        return 1
    return 0


def _close_staged_lot(settings: Settings, lot: str = "DEMO-LOT-04") -> LotOutcome:
    """Close a lot (DEMO-LOT-04 by default) as quality staff would with `formgate lot close`."""
    from pipeline.rulebook.book import load_rules_dir
    from pipeline.station.lots import close_and_report

    now = datetime.datetime.now(datetime.UTC).replace(microsecond=0)
    with Ledger(settings.ledger) as ledger:
        return close_and_report(
            settings, ledger, load_rules_dir(settings.rules_dir), lot,
            by="command", now=now,
        )


def _show_staged_lot(outcome: LotOutcome) -> int:
    """What closing lot DEMO-LOT-04 gave: yield, grades, the cells that did not pass."""
    closed = outcome.closed
    tally = closed.statistics.tally
    print()
    print("lot DEMO-LOT-04 (formation and grading files, one aging tester file), closed:")
    print(f"  {tally.n} cells, yield {100 * (tally.yield_fraction or 0):.1f} %; grades: "
          + ", ".join(f"{g} {n}" for g, n in closed.statistics.grade_counts.items()))
    for cell in sorted(closed.cells, key=lambda c: (c.decision.verdict == "pass", c.cell_id)):
        if cell.decision.verdict != "pass":
            was = f" (was {cell.before_screens.verdict})" if cell.changed else ""
            print(f"  {cell.cell_id}  {cell.decision.verdict}{was}: {cell.decision.reason}")
    print(f"  lot report (PDF): {outcome.report}")
    print(f"  export (CSV):     {outcome.export}")
    undecided = [c.cell_id for c in closed.cells if c.decision.missing]
    if undecided:
        print(f"CELLS STILL WAITING FOR A STAGE: {', '.join(undecided)}")
        return 1
    return 0


def _cell_table(results: list[Path]) -> None:
    """Every cell once, as its cell JSON (``<cell>~cell.json``) stands: its standing verdict,
    hazards and the reasons that decide it (a stage record's JSON is one stage's verdict)."""
    print(f"{'cell':<10} {'lot':<12} {'verdict':<8} {'hazards':<16} reason")
    for path in results:
        if not path.name.endswith("~cell.json"):
            continue
        doc = json.loads(path.read_text(encoding="utf-8"))
        standing = doc["standing"]
        line = (
            f"{doc['cell']['cell_id']:<10} {doc['cell']['lot']:<12} {standing['verdict']:<8} "
            f"{', '.join(standing['hazards']):<16} {'; '.join(standing['reasons'])}"
        )
        print(line.rstrip())


def _report(root: Path, expected: int) -> int:
    archived = sorted(
        p.name
        for p in (root / "archive").rglob("*")
        if p.is_file() and not p.name.endswith(".done")
    )
    quarantined = sorted(
        p.name for p in (root / "quarantine").iterdir() if not p.name.endswith(".reason.txt")
    )
    results = sorted((root / "results").rglob("*.json"))
    pdfs = sorted((root / "certificates").rglob("*.pdf"))
    mails = sorted((root / "mail").glob("*.eml"))
    print()
    _cell_table(results)
    print()
    print(
        f"inputs handed over: {expected}; archived: {len(archived)}; quarantined: {len(quarantined)}"
    )
    for name in quarantined:
        reason = (
            (root / "quarantine" / f"{name}.reason.txt").read_text(encoding="utf-8").splitlines()
        )
        print(f"  quarantined {name}: {reason[2] if len(reason) > 2 else ''}")
    print()
    print(f"certificates (PDF): {root / 'certificates'}  ({len(pdfs)} files)")
    print(f"results (JSON):     {root / 'results'}  ({len(results)} files)")
    print(f"mails (.eml):       {root / 'mail'}  ({len(mails)} files)")
    print(f"ledger (SQLite):    {root / 'ledger.sqlite'}")
    print(f"log:                {root / 'logs' / 'formgate.log'}")
    print(f"status:             formgate status {root}")
    accounted = len(archived) + len(quarantined)
    if accounted != expected:
        print(f"NOT ALL FILES ACCOUNTED FOR: {accounted} of {expected}")
        return 1
    print(f"every file accounted for: {accounted} of {expected}")
    return 0
