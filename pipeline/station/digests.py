"""Lot digests of passed cells: queued once a lot has been quiet, listing the whole lot as it stands.

A passed cell gets no mail of its own: a lot's digest covers its new passes once the
lot has been quiet for ``digest_quiet_s``, and lists every cell of the lot as it stands
(its decision over all its stages, its grade, its grading capacity and certificate). The
ledger records which digest covers which cell (ledger/digests.py); composing the letter
is the mail part's.
"""

from __future__ import annotations

import datetime
import json
import logging
import os
import threading
import urllib.parse
from collections.abc import Callable
from pathlib import Path

from pipeline.ledger.ledger import Ledger
from pipeline.ledger.rows import ResultRow
from pipeline.mail.digest import DigestRow, digest_letter
from pipeline.station.cellpublish import all_current, cell_paths, published_certificate
from pipeline.station.published_files import recorded_path
from pipeline.station.settings import Settings
from pipeline.station.unjudged import unjudged_cells

log = logging.getLogger("formgate.station")
CELLS_WAIT_S = 300.0  # longest a quiet lot's digest waits for its cells' certificates


def certificate_link(pdf_path: str, certificates: Path, base_url: str | None) -> str:
    """How a digest names a certificate: a link under ``base_url``, else its full path.

    The link is the base address followed by the certificate's path under the
    certificates folder, each part percent-encoded (RFC 3986), so any cell id stays one
    working link.

    >>> certificate_link("out/certificates/L 1/C#1.pdf", Path("out/certificates"),
    ...                  "https://qa.example.com/certs")
    'https://qa.example.com/certs/L%201/C%231.pdf'
    >>> certificate_link("", Path("c"), "https://qa.example.com/")
    ''
    """
    if not pdf_path:
        return ""
    path = Path(os.path.abspath(pdf_path))
    if base_url is None:
        return str(path)
    try:
        under = path.relative_to(os.path.abspath(certificates))
    except ValueError:  # written elsewhere by an older configuration: the path says where
        return str(path)
    return base_url.rstrip("/") + "/" + "/".join(urllib.parse.quote(part) for part in under.parts)


def lot_rows(ledger: Ledger, lot: str, settings: Settings) -> list[DigestRow]:
    """Every cell of ``lot`` once, as it stands: its decision over all its stages where it has
    one (else its latest record's verdict), its grade, the grading capacity of its latest
    record that covers grading (else of its latest record), and its cell certificate (the
    one name that shows its standing decision) once that is published: never a stage
    record's certificate, whose verdict is one stage's. A cell whose only file could not be
    judged (a quarantined file that names it: station/unjudged.py) is listed too, verdict
    ``error`` with the file's reason, as the lot report and `lot close` count it."""
    routing = settings.routing
    latest: dict[str, ResultRow] = {}
    grading: dict[str, ResultRow] = {}
    for r in ledger.results.current_of_lot(lot):  # by cell, oldest first
        latest[r.cell_id] = r
        if "grading" in json.loads(r.result_json).get("stages", ("grading",)):
            grading[r.cell_id] = r
    decisions = ledger.decisions.latest_of_lot(lot)
    cells = sorted(set(latest) | set(decisions))
    rows = []
    for cell in cells:
        record = grading.get(cell) or latest.get(cell)
        document = json.loads(record.result_json) if record is not None else {}
        decision = decisions.get(cell)
        hazards: tuple[str, ...] = ()
        if decision is not None:
            verdict, reason, grade = decision.verdict, decision.reason, decision.grade
            hazards = decision.hazards  # a released cell keeps them, and their cautions
        else:
            verdict = record.verdict if record is not None else "hold"
            reason = document.get("decision", "") if verdict != "pass" else ""
            grade = None
        rows.append(
            DigestRow(
                cell,
                verdict,
                document.get("metrics", {}).get("grading_capacity_Ah"),
                certificate_link(
                    cell_certificate(ledger, lot, cell, settings),
                    settings.certificates,
                    routing.certificates_url,
                ),
                reason,
                grade,
                hazards,
            )
        )
    for refused in unjudged_cells(settings, ledger, lot):
        if refused.cell_id not in decisions and refused.cell_id not in latest:
            rows.append(DigestRow(refused.cell_id, "error", None, "",
                                  f"its file was not judged (in quarantine): {refused.reason}"))
    return rows


def cell_certificate_link(settings: Settings, lot: str, cell_id: str) -> str:
    """How a letter names the cell's own certificate (``<cell>~cell.pdf``), by the one name that
    always shows its standing decision; '' when the station writes none (``certify = "none"``)."""
    if settings.certify == "none":
        return ""
    path = str(cell_paths(settings, lot, cell_id)[1])
    return certificate_link(path, settings.certificates, settings.routing.certificates_url)


def cell_certificate_path(settings: Settings, lot: str, cell_id: str) -> str | None:
    """The path of the cell's own certificate as the ledger records it when published (a
    letter that links it waits for it: ``Letter.waits_for``); None when none is written."""
    if settings.certify == "none":
        return None
    return recorded_path(cell_paths(settings, lot, cell_id)[1])


def cell_certificate(ledger: Ledger, lot: str, cell_id: str, settings: Settings) -> str:
    """The path of the cell's certificate if one is published (and so on disk), else ''."""
    row = published_certificate(settings, ledger, lot, cell_id)
    return row.path if row is not None else ""


class DigestDuty:
    """Queue each quiet lot's digest of its new passes (a duty of the station's loop)."""

    def __init__(
        self,
        settings: Settings,
        ledger: Ledger,
        clock: Callable[[], datetime.datetime],
        mail_wake: threading.Event,
    ) -> None:
        self.settings = settings
        self.ledger = ledger
        self.clock = clock
        self.mail_wake = mail_wake

    def queue(self) -> None:
        routing = self.settings.routing
        if not routing.digests_to:
            return
        now = self.clock()
        for lot in self.ledger.digests.pending_lots():
            latest = self.ledger.digests.latest_activity(lot)
            if latest is not None and (now - latest).total_seconds() < routing.digest_quiet_s:
                continue
            cells = self.ledger.digests.passed_cells(lot)
            if not cells:
                continue
            # the digest links each cell's certificate as it stands: it waits for the ones
            # being published, up to CELLS_WAIT_S past the quiet time, then links what is there
            waited = 0.0 if latest is None else (now - latest).total_seconds() - routing.digest_quiet_s
            cell_ids = list(self.ledger.decisions.latest_of_lot(lot))
            if waited < CELLS_WAIT_S and not all_current(self.settings, self.ledger, lot, cell_ids):
                continue
            # the digest covers the new pass cells and lists the whole lot as it stands
            rows = lot_rows(self.ledger, lot, self.settings)
            letter = digest_letter(
                lot,
                rows,
                routing.digests_to,
                station=self.settings.station_name,
                digest_no=self.ledger.digests.count(lot) + 1,
                domain=routing.domain,
            )
            self.ledger.digests.queue(letter, [c.id for c in cells], now=now)
            self.mail_wake.set()
            # ``cells`` are passed records (a cell's formation and grading files are two): the
            # log counts cells, those of the new records that pass as the digest lists them
            passing = {row.cell_id for row in rows if row.verdict == "pass"}
            newly = len({c.cell_id for c in cells} & passing)
            log.info("digest queued for lot %s: %d cell(s), %d newly passed", lot, len(rows), newly)
