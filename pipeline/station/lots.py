"""Lots at a station: close one, record its decisions, write its report and export, list them.

Edge module: it reads the lot's results and readings from the ledger, closes the lot
with the pure pipeline.judge.lotclose, records each cell's decision at the close (a pass the
lot's screens turn into a hold is recorded beside the pass, with its letter), and
writes the report PDF and the one-row-per-cell CSV:

    <certificates>/<lot>/_lot-report.pdf     <results>/<lot>/_lot-cells.csv (and .parquet)
    <certificates>/<lot>/_chart-*.svg, .png  (the report's charts, by channel and over time)

(the leading underscore keeps them apart from every cell's files: a cell id never
makes a file name that starts with one). Used by `formgate lot close` and by the
station when a lot has been quiet for its rule set's ``[lot] quiet_h``.
"""

from __future__ import annotations

import dataclasses
import datetime
import json
import logging
import threading
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from functools import partial
from pathlib import Path

from pipeline.errors import FormgateError
from pipeline.judge.channels import ChannelRecord, ChannelScreen, record_of_result
from pipeline.judge.lotclose import ClosedCell, ClosedLot, close_lot
from pipeline.judge.lotstats import tally
from pipeline.judge.metricdefs import RULE_METRICS
from pipeline.ledger.ledger import Ledger
from pipeline.ledger.rows import DecisionRow
from pipeline.mail.digest import digest_letter
from pipeline.mail.letters import Letter, alert_letter
from pipeline.names import safe_name
from pipeline.read.readings import Reading, ReadingFile
from pipeline.report.lotparquet import lot_export_parquet
from pipeline.report.lotreport import (
    DEFAULT_SCREEN,
    LotCell,
    LotReportInput,
    RuleSetRef,
    lot_export_csv,
    lot_figures,
    render_lot_report_pdf,
)
from pipeline.report.svgraster import svg_to_png
from pipeline.rulebook.book import RuleBook
from pipeline.station.cellpublish import all_current, publish_cells_now
from pipeline.station.cells import change_letters
from pipeline.station.channelwatch import watch_of
from pipeline.station.digests import lot_rows
from pipeline.station.published_files import Written, note_written
from pipeline.station.reviewing import (
    alert_waiting,
    last_review_id,
    reviewed_cells,
    reviewed_since,
)
from pipeline.station.settings import Settings
from pipeline.station.unjudged import UnjudgedCell, unjudged_cells
from pipeline.writing import write_atomic

log = logging.getLogger("formgate.station")
UNITS = {m.name: m.unit for m in RULE_METRICS}
CELLS_WAIT_S = 300.0  # longest a lot's close waits for its cells' certificates


@dataclass(frozen=True, slots=True)
class LotOutcome:
    """What closing (or reporting) a lot did: the lot, the files written, the changed cells."""

    closed: ClosedLot
    report: Path
    export: Path
    changed: tuple[str, ...]  # cells whose decision changed at the close
    newly_closed: bool


def gather(ledger: Ledger, lot: str, rulebook: RuleBook) -> ClosedLot:
    """The lot as the ledger holds it, closed by the rules (pure once the rows are read)."""
    # every record, as the station decides a cell (station/cells.py): one query for the lot
    docs = [json.loads(r.result_json) for r in ledger.results.of_lot(lot)]
    files: dict[str, list[Reading]] = {}
    sha: dict[str, str] = {}
    for stored in ledger.readings.of(lot):
        files.setdefault(stored.file_name, []).append(stored.reading)
        sha[stored.file_name] = stored.file_sha256
    readings = [ReadingFile(name, {}, tuple(rows)) for name, rows in files.items()]
    return close_lot(lot, [d for d in docs if d["verdict"] != "error"], readings, rulebook, sha256=sha,
                     reviews=reviewed_cells(ledger, lot))  # a review that stands decides its cell


def report_input(
    closed: ClosedLot,
    *,
    station: str,
    now: datetime.datetime,
    closed_at: datetime.datetime | None,
    decisions: Mapping[str, DecisionRow] | None = None,
    refused: Sequence[UnjudgedCell] = (),
    records: Sequence[ChannelRecord] = (),
    channel_screen: ChannelScreen = DEFAULT_SCREEN,
) -> LotReportInput:
    """The lot report's input. ``decisions``: each cell's latest decision in the ledger, whose
    time a cell shows when it is the decision the report shows (else the report's own time:
    an open lot's screens, as they would apply); ``refused``: the cells a quarantined file
    names (station/unjudged.py), shown not judged, counted in the tally and the yield."""
    rs = closed.rule_set
    recorded = decisions or {}

    def decided_at(c: ClosedCell) -> datetime.datetime:
        d = recorded.get(c.cell_id)
        shown = (c.decision.verdict, c.decision.reason)
        return d.decided_at if d is not None and (d.verdict, d.reason) == shown else now

    not_judged = tuple(
        LotCell(u.cell_id, "error", u.reason, None, (), {}, (("quarantined", u.name, u.sha256),),
                u.quarantined_at)
        for u in refused
    )
    verdicts = [c.decision.verdict for c in closed.cells] + [u.verdict for u in not_judged]
    statistics = dataclasses.replace(closed.statistics, tally=tally(verdicts)) if refused else (
        closed.statistics
    )
    return LotReportInput(
        lot=closed.lot,
        cell_types=closed.cell_types,
        rule_set=RuleSetRef(rs.name, rs.revision, rs.sha256, rs.family),
        station=station,
        generated_at=now,
        closed_at=closed_at,
        cells=tuple(
            LotCell(
                c.cell_id,
                c.decision.verdict,
                c.decision.reason,
                c.grade,
                c.decision.hazards,
                c.values,
                c.records,
                decided_at(c),
                c.cell_type,
                c.places,
                c.uncertainty,
            )
            for c in closed.cells
        ) + not_judged,
        checks=closed.checks,
        screens=closed.screens,
        grades=closed.grades,
        units=UNITS,
        statistics=statistics,
        records=tuple(records),
        channel_screen=channel_screen,
    )


def _letters(
    settings: Settings, closed: ClosedLot, cell: ClosedCell, now: datetime.datetime
) -> Callable[[DecisionRow | None], list[Letter]]:
    def letters(before: DecisionRow | None) -> list[Letter]:
        return change_letters(
            settings, lot=closed.lot, cell_id=cell.cell_id, decision=cell.decision,
            before=before, cause="lot closed", files=cell.records,
            family=closed.rule_set.family, now=now,
        )

    return letters


def channel_records(ledger: Ledger, lot: str) -> list[ChannelRecord]:
    """Every judged record of the lot (retests too) as the channel that tested it saw it."""
    return [record_of_result(json.loads(r.result_json)) for r in ledger.results.of_lot(lot)]


def report_paths(settings: Settings, lot: str) -> tuple[Path, Path]:
    folder = safe_name(lot)
    return (
        settings.certificates / folder / "_lot-report.pdf",
        settings.results / folder / "_lot-cells.csv",
    )


def parquet_path(export: Path) -> Path:
    """The Parquet export beside the CSV one: ``_lot-cells.parquet``."""
    return export.with_suffix(".parquet")


def close_and_report(
    settings: Settings,
    ledger: Ledger,
    rulebook: RuleBook,
    lot: str,
    *,
    by: str,
    now: datetime.datetime,
    close: bool = True,
    cells_ready: Callable[[str, Sequence[str]], None] | None = None,
) -> LotOutcome:
    """Close ``lot`` (unless ``close`` is False: a report of the lot as it stands) and write
    its report and export. Closing records every cell's decision at the close, with the
    letters of the ones that changed; a lot closed before keeps its first close time.

    Before the lot counts as closed, its cells' own certificates show the close (grades,
    screens): ``cells_ready(lot, cells)`` sees to it (the station waits for its workers);
    without it they are published here. A crash before leaves the lot open, closed again."""
    seen = last_review_id(ledger, lot)  # read before the lot: a later review is newer than it
    closed = gather(ledger, lot, rulebook)
    changed: list[str] = []
    newly = False
    closed_at = ledger.lots.get(lot).closed_at
    if close:
        for cell in closed.cells:
            d = cell.decision
            with ledger.db.write():  # a review recorded while the lot closed decides its cell
                if reviewed_since(ledger, lot, cell.cell_id, seen):
                    continue
                _, before, new = ledger.decisions.decide(
                    cell_id=cell.cell_id, lot=lot, verdict=d.verdict, reason=d.reason,
                    hazards=d.hazards, grade=cell.grade, cause="lot closed",
                    basis=[f"{s}:{n}:{h}" for s, n, h in cell.records], now=now,
                    letters=_letters(settings, closed, cell, now),
                )
            if new and before is not None and before.verdict != d.verdict:
                changed.append(cell.cell_id)
        ids = [c.cell_id for c in closed.cells]
        if cells_ready is not None:
            cells_ready(lot, ids)
        else:
            publish_cells_now(settings, ledger, rulebook, lot, ids, now)
        newly = ledger.lots.close(lot, by=by, now=now)
        closed_at = ledger.lots.get(lot).closed_at
    report, export = report_paths(settings, lot)
    data = report_input(
        closed, station=settings.station_name, now=now, closed_at=closed_at,
        decisions=ledger.decisions.latest_of_lot(lot), refused=unjudged_cells(settings, ledger, lot),
        records=channel_records(ledger, lot), channel_screen=watch_of(settings).screen,
    )
    if data.statistics is not None:  # what the report counts, the caller shows (not judged too)
        closed = dataclasses.replace(closed, statistics=data.statistics)
    written = [Written(report, render_lot_report_pdf(data), "lot report"),
               Written(export, lot_export_csv(data), "lot export"),
               Written(parquet_path(export), lot_export_parquet(data), "lot export")]
    # the report's charts, beside it (drawn as in it) as SVG and PNG, published with the report
    for stem, svg in lot_figures(data):
        written += [Written(report.parent / f"{stem}.svg", svg.encode("utf-8"), "lot report"),
                    Written(report.parent / f"{stem}.png", svg_to_png(svg), "lot report")]
    for file in written:
        write_atomic(file.data, file.path)
    note_written(ledger, written, now=now, lot=lot)  # their hashes, for formgate verify
    if close:
        ledger.lots.note_report(lot, str(report), str(export))
        routing = settings.routing
        if routing.digests_to:
            # the lot's last digest: every cell as closed, with the report attached; closing
            # again gives the same Message-ID, so the outbox never holds it twice
            ledger.outbox.queue(
                digest_letter(
                    lot,
                    lot_rows(ledger, lot, settings),
                    routing.digests_to,
                    station=settings.station_name,
                    digest_no=ledger.digests.count(lot) + 1,
                    domain=routing.domain,
                    report_path=str(report),
                ),
                now=now,
            )
    log.info("lot %s %s: %d cells, report %s", lot, "closed" if close else "reported",
             len(closed.cells), report)
    return LotOutcome(closed, report, export, tuple(changed), newly)


def report_closed_lot(
    settings: Settings, ledger: Ledger, rulebook: RuleBook, lot: str, now: datetime.datetime
) -> Path | None:
    """Write a closed lot's report and export again, as `formgate lot report` does (recorded
    with their new hashes), so that they show a review made after the close; no digest goes
    again (the review's own letter tells the people who were told of the hold or fail). The
    review stands whatever happens here: a report that cannot be written now is logged, and
    `formgate lot report` writes it later. Its path, or None. Handed to
    reviewing.record_review as its ``report_lot``."""
    try:
        return close_and_report(settings, ledger, rulebook, lot, by="review", now=now,
                                close=False).report
    except (FormgateError, OSError) as exc:
        log.warning("lot %s: its report and export could not be written again after the "
                    "review (%s); formgate lot report writes them", lot, exc)
        return None


def lots_due(
    ledger: Ledger, rulebook: RuleBook, now: datetime.datetime
) -> list[str]:
    """Open lots quiet for longer than their rule set's ``[lot] quiet_h``."""
    due = []
    for name in ledger.lots.names():
        lot = ledger.lots.get(name)
        cell_type = ledger.lots.cell_type(name)
        if lot.closed_at is not None or lot.last_activity is None or cell_type is None:
            continue
        try:
            quiet_h = rulebook.for_cell_type(cell_type)[0].lot_quiet_h
        except FormgateError:
            continue
        if quiet_h is not None and (now - lot.last_activity).total_seconds() >= quiet_h * 3600:
            due.append(name)
    return due


class LotCloser(threading.Thread):
    """Closes the lots that fell quiet, on its own ledger connection, beside the main loop.

    A lot's close (its statistics, decisions and report) takes a while for a large lot;
    in a thread of its own it never holds up claiming and judging. Whatever goes wrong
    is logged and tried again next round: a lot close never stops the station.
    """

    def __init__(
        self,
        settings: Settings,
        rules: Callable[[], RuleBook | None],
        clock: Callable[[], datetime.datetime],
        mail_wake: threading.Event,
        *,
        interval_s: float = 60.0,
    ) -> None:
        super().__init__(name="formgate-lots", daemon=False)
        self.settings = settings
        self.rules = rules
        self.clock = clock
        self.mail_wake = mail_wake
        self.interval_s = interval_s
        self.stop_event = threading.Event()

    def run(self) -> None:
        with Ledger(self.settings.ledger) as ledger:
            while not self.stop_event.wait(self.interval_s):
                self.round(ledger)

    def round(self, ledger: Ledger) -> None:
        rulebook = self.rules()
        if rulebook is None:
            return
        try:
            self.alert_overdue(ledger, rulebook)
        except Exception as exc:  # a busy or failing disk: next round
            log.error("cells waiting for a stage cannot be checked: %s", exc)
        try:
            if alert_waiting(self.settings, ledger, rulebook, self.clock()):
                self.mail_wake.set()
        except Exception as exc:  # a busy or failing disk: next round
            log.error("cells waiting for a person cannot be checked: %s", exc)
        try:
            due = lots_due(ledger, rulebook, self.clock())
        except Exception as exc:  # a busy or failing disk: next round
            log.error("lots due for closing cannot be listed: %s", exc)
            return
        for lot in due:
            if self.stop_event.is_set():
                return
            try:
                close_and_report(
                    self.settings, ledger, rulebook, lot, by="station", now=self.clock(),
                    cells_ready=partial(self.wait_for_cells, ledger),
                )
                self.mail_wake.set()
            except InterruptedError:  # stopping while it waited for its cells: next start
                return
            except Exception as exc:  # logged and tried again; never the end of the station
                log.error("lot %s could not be closed: %s", lot, exc)

    def wait_for_cells(self, ledger: Ledger, lot: str, cells: Sequence[str]) -> None:
        """Wait until the station's workers have published the cells' certificates as the
        close decided them (the main loop sees the new decisions), at most CELLS_WAIT_S: the
        lot's digest links them. Past that the lot closes all the same, and a digest links
        the certificates as they are (each is rewritten once its render is done)."""
        deadline = time.monotonic() + CELLS_WAIT_S
        while not all_current(self.settings, ledger, lot, cells):
            if time.monotonic() > deadline:
                log.warning("lot %s: its cells' certificates are not all published after %g s; "
                            "closing it all the same", lot, CELLS_WAIT_S)
                return
            if self.stop_event.wait(0.5):
                raise InterruptedError("the station is stopping")  # the lot closes next start

    def alert_overdue(self, ledger: Ledger, rulebook: RuleBook) -> None:
        """One alert per cell whose needed stage is later than its rule set's overdue_h."""
        routing = self.settings.routing
        if not routing.alerts_to:
            return
        now = self.clock()
        for lot, cell, reason, first in ledger.decisions.waiting_cells():
            cell_type = ledger.lots.cell_type(lot)
            try:
                hours = rulebook.for_cell_type(cell_type)[0].stage_overdue_h if cell_type else None
            except FormgateError:
                continue
            if hours is None or (now - first).total_seconds() < hours * 3600:
                continue
            letter = alert_letter(
                f"cell {cell} of lot {lot}: a stage is overdue",
                f"Cell {cell} of lot {lot} has been {reason} since "
                f"{first.isoformat(timespec='seconds')}, longer than the {hours:g} h its rule "
                "set allows ([stages] overdue_h). It stays held until the stage's record "
                "arrives: check that its file reached the station's inbox.",
                routing.alerts_to,
                station=self.settings.station_name,
                key=f"overdue\n{lot}\n{cell}\n{reason}",
                domain=routing.domain,
            )
            if ledger.outbox.by_message_id(letter.message_id) is None:
                ledger.outbox.queue(letter, now=now)
                self.mail_wake.set()
                log.warning("cell %s of lot %s: %s for over %g h", cell, lot, reason, hours)

    def stop(self) -> None:
        self.stop_event.set()
        self.join()
