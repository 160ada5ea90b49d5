"""Publishing what the workers judged: record, write the JSON, archive, quarantine, letters.

One finished output becomes, in this order: ONE ledger transaction (result, check rows,
outbox rows with the failure or hold letter, and the certificate promised in the ledger's
certificate queue), the JSON written atomically and recorded as a published file with its
SHA-256 (published_files.py), the input marked published and moved to
archive/YYYY-MM-DD/. The certificate is rendered after, when a worker is free
(certqueue.py); the letter that attaches it waits for it. An input that cannot be judged
goes to quarantine/ with a .reason.txt beside it. Claiming inputs is claiming.py's job,
handing them to the workers tasks.py's; the mail thread sends the letters (mailer.py).
"""

from __future__ import annotations

import dataclasses
import datetime
import json
import logging
from collections.abc import Callable
from pathlib import Path

from pipeline.acceptance.results import CellResult, VerdictKind
from pipeline.acceptance.rules import WHOLE_PROGRAM
from pipeline.errors import FormgateError
from pipeline.judge.channels import channel_label
from pipeline.judge.evaluate import decision_line
from pipeline.judge.review import Asked
from pipeline.ledger.certificates import PRIORITY
from pipeline.ledger.channel_alerts import ChannelAlert
from pipeline.ledger.ledger import Ledger
from pipeline.ledger.rows import CheckRowData, InputRow, ResultRow
from pipeline.mail.letters import Letter, alert_letter, failure_letter, hold_letter
from pipeline.names import fit
from pipeline.read.readings import ReadingFile
from pipeline.rulebook.book import RuleBook
from pipeline.runner import result_paths
from pipeline.station import faults
from pipeline.station.cells import CellDecisions
from pipeline.station.certqueue import RecordCertificates
from pipeline.station.channelwatch import (
    PASSES_PER_SCREEN,
    open_alert_for,
    suspect_note,
    watch_channels,
)
from pipeline.station.digests import cell_certificate_link, cell_certificate_path
from pipeline.station.guard import Guard
from pipeline.station.published_files import Written, note_kept, note_written
from pipeline.station.reviewing import ReportLot, record_review
from pipeline.station.setaside import NAME_RESERVE_BYTES
from pipeline.station.settings import Settings
from pipeline.station.worker import Output
from pipeline.writing import move_into, require_folder, write_atomic

log = logging.getLogger("formgate.station")


class Publisher:
    """Record, publish, archive and quarantine what the workers finished."""

    def __init__(
        self,
        settings: Settings,
        ledger: Ledger,
        clock: Callable[[], datetime.datetime],
        cells: CellDecisions,
        guard: Guard,
        certificates: RecordCertificates,
        report_lot: ReportLot | None = None,
    ) -> None:
        self.settings = settings
        self.report_lot = report_lot  # a closed lot's report written again (lots.report_closed_lot)
        self.ledger = ledger
        self.clock = clock
        self.cells = cells
        self.guard = guard
        self.certificates = certificates
        self.judged = 0  # files judged since the station started (the heartbeat shows it)
        self.unscreened = 0  # passed records recorded since the channels were last screened

    def apply(self, row: InputRow, output: Output) -> None:
        row = self.ledger.inputs.get(row.id) or row  # applied again after a pause: where it stands now
        if row.final_path is not None:
            return
        if output.error is not None:
            if output.bug:
                log.error("%s: internal error\n%s", row.name, output.detail)
            self.quarantine(row, output.error)
            return
        if output.readings is not None:
            self.keep_readings(row, output.readings)
            return
        assert output.result is not None and output.json_text is not None
        # the worker told the result which record of its cell it is (ledger/history.py)
        result, json_text, pdf = output.result, output.json_text, output.pdf
        if row.state == "claimed":
            self.record(row, result, json_text, with_pdf=pdf is not None or self.certify(result),
                        rendered=pdf is not None)
        result_id = (self.ledger.inputs.get(row.id) or row).result_id
        if pdf is None and result_id is not None and self.ledger.certificates.is_waiting(result_id):
            self.certificates.keep(result_id, result)  # for its render, when a worker is free
        self.keep_earlier_outputs(row, result)
        self.publish(row, result, json_text, pdf)
        self.judged += 1
        self.guard.mail_wake.set()  # a letter with no certificate to wait for is due now
        r = result
        hazards = (
            f" hazard: {', '.join(h.value for h in r.verdict.hazards)}" if r.verdict.hazards else ""
        )
        # a fail or hold names what decided it, as its mail and status do
        decided = "" if r.verdict.passed else f": {decision_line(r.verdict, r.notes)}"
        log.info(
            "%s lot %s: %s%s (%.2f s)%s [%s]",
            r.cell_id,
            r.lot,
            r.verdict.kind.value,
            decided,
            output.seconds,
            hazards,
            row.name,
        )
        self.cells.decide_cells([(r.lot, r.cell_id)], "record")
        if r.verdict.kind is VerdictKind.FAIL and self.settings.channels.suspect_fails == "retest":
            alert = open_alert_for(self.ledger, r)
            if alert is not None and alert.raised_at <= r.analysed_at:  # failed on a suspect channel
                ask_retest(self.settings, self.ledger, self.cells.rules.rulebook, r, alert,
                           now=self.clock(), report_lot=self.report_lot)

    def earlier_records(self, row: InputRow, result: CellResult) -> list[ResultRow]:
        """The cell's earlier records of the same stages from other inputs, oldest first."""
        own = self.ledger.results.of_input(row.id)
        return [
            r
            for r in self.ledger.results.of_cell(result.lot, result.cell_id)
            if r.input_id != row.id
            and (own is None or r.id < own.id)
            and tuple(json.loads(r.result_json).get("stages") or WHOLE_PROGRAM) == result.stages
        ]

    def certify(self, result: CellResult) -> bool:
        """Whether the station renders this record's certificate (``certify`` in station.toml)."""
        certify = self.settings.certify
        return certify == "all" or (
            certify == "failed_and_held" and result.verdict.kind is not VerdictKind.PASS
        )

    def keep_earlier_outputs(self, row: InputRow, result: CellResult) -> None:
        """Before a retest's outputs take the cell's file names, the earlier record's files
        move to names of their own (``<cell>~record-1.json``), and the ledger follows them:
        no published file is ever replaced without a trace."""
        json_path, pdf_path = self.output_paths(result)
        for n, earlier in enumerate(self.earlier_records(row, result), start=1):
            if earlier.json_path != str(json_path):
                continue  # moved before
            kept_json = json_path.with_name(f"{json_path.stem}~record-{n}.json")
            kept_pdf = pdf_path.with_name(f"{pdf_path.stem}~record-{n}.pdf")
            moved: list[Written] = []
            if json_path.exists():
                moved.append(Written(kept_json, json_path.read_bytes(), "result"))
                write_atomic(moved[-1].data, kept_json, make_parents=False)
            has_pdf = earlier.pdf_path is not None and pdf_path.exists()
            # a certificate still to render is rendered under the name it moves to
            waiting = earlier.pdf_path is not None and self.ledger.certificates.is_waiting(earlier.id)
            if has_pdf and not waiting:
                moved.append(Written(kept_pdf, pdf_path.read_bytes(), "certificate"))
                write_atomic(moved[-1].data, kept_pdf, make_parents=False)
            # recorded again under their new names before the ledger follows them there
            for problem in note_kept(self.ledger, earlier, moved, now=self.clock()):
                log.warning("%s", problem)
            self.ledger.results.move_outputs(
                earlier.id, str(kept_json),
                str(kept_pdf) if has_pdf or waiting else earlier.pdf_path,
            )

    def keep_readings(self, row: InputRow, readings: ReadingFile | None) -> None:
        """An OCV reading file: its readings kept (ONE transaction), the file archived, and
        every cell it reads decided again. ``readings`` None: kept before a restart."""
        if row.state == "claimed" and readings is not None:
            self.ledger.readings.record(row.id, readings.readings)
        row = self.ledger.inputs.get(row.id) or row
        if row.state == "judged":
            self.ledger.inputs.mark_published(row.id)
        self.finish(self.ledger.inputs.get(row.id) or row, "archived")
        cells = self.ledger.readings.cells_of_input(row.id)
        lots = sorted({lot for lot, _ in cells})
        log.info("%s: aging readings of %d cell(s), lot %s", row.name, len(cells), ", ".join(lots))
        self.cells.decide_cells(cells, "readings")

    def output_paths(self, result: CellResult) -> tuple[Path, Path]:
        return result_paths(self.settings.results, self.settings.certificates, result)

    def letters(self, result: CellResult, pdf_path: Path) -> list[Letter]:
        """A fail's or hold's letter: it attaches the record's certificate (the outbox holds
        it until that is rendered) and names the cell's own (held until that is published)."""
        waits_for = cell_certificate_path(self.settings, result.lot, result.cell_id)
        return [dataclasses.replace(x, waits_for=waits_for) for x in self._letters(result, pdf_path)]

    def _letters(self, result: CellResult, pdf_path: Path) -> list[Letter]:
        routing, station = self.settings.routing, self.settings.station_name
        kind = result.verdict.kind
        if kind is VerdictKind.FAIL and routing.failures_to:
            return [
                failure_letter(
                    result,
                    str(pdf_path),
                    routing.failures_to,
                    station=station,
                    domain=routing.domain,
                    cell_certificate=cell_certificate_link(self.settings, result.lot, result.cell_id),
                    channel_note=suspect_note(open_alert_for(self.ledger, result)),
                )
            ]
        if kind is VerdictKind.HOLD and routing.holds_to:
            return [
                hold_letter(
                    result, str(pdf_path), routing.holds_to, station=station, domain=routing.domain,
                    cell_certificate=cell_certificate_link(self.settings, result.lot, result.cell_id),
                )
            ]
        return []

    def record(
        self, row: InputRow, result: CellResult, json_text: str, *, with_pdf: bool = True,
        rendered: bool = False,
    ) -> None:
        """ONE transaction: result, check rows, outbox rows, and the certificate promised in
        the queue unless it was ``rendered`` with the result (the rule text was kept at load)."""
        json_path, pdf_path = self.output_paths(result)
        self.ledger.results.record(
            row.id,
            cell_id=result.cell_id,
            lot=result.lot,
            verdict=result.verdict.kind.value,
            hazards=[h.value for h in result.verdict.hazards],
            result_json=json_text,
            checks=[CheckRowData.from_check(c) for c in result.verdict.checks],
            rule_set_name=result.rule_set.name,
            rule_set_revision=result.rule_set.revision,
            rule_set_sha256=result.rule_set.sha256,
            analysed_at=result.analysed_at,
            json_path=str(json_path),
            pdf_path=str(pdf_path) if with_pdf else None,
            mails=self.letters(result, pdf_path),
            certificate_priority=None if rendered else PRIORITY.get(result.verdict.kind.value, 0),
        )
        faults.point("after_commit")
        # the channel that tested it, screened with the station's others: one alert if suspect
        if result.verdict.kind is not VerdictKind.PASS or self.unscreened >= PASSES_PER_SCREEN:
            self.unscreened = 0
            watch_channels(self.ledger, self.settings, result, now=self.clock())
        else:
            self.unscreened += 1

    def publish(self, row: InputRow, result: CellResult, json_text: str, pdf: bytes | None) -> None:
        json_path, pdf_path = self.output_paths(result)
        # the results and certificates folders must be there; a lot's folder is made in them
        written = [Written(json_path, json_text.encode("utf-8"), "result")]
        write_atomic(written[0].data, json_path, make_parents=False)
        if pdf is not None:
            written.append(Written(pdf_path, pdf, "certificate"))
            write_atomic(
                pdf, pdf_path, before_rename=lambda: faults.point("mid_render"), make_parents=False
            )
        faults.point("after_write")
        # the hashes of the bytes written, before the input counts as published: after a crash
        # here the input is still 'judged', and the restart writes and records the same bytes
        note_written(
            self.ledger, written, now=self.clock(), lot=result.lot, cell_id=result.cell_id,
            result_id=(self.ledger.inputs.get(row.id) or row).result_id,
        )
        self.ledger.inputs.mark_published(row.id)
        faults.point("after_publish")
        self.finish(self.ledger.inputs.get(row.id) or row, "archived")

    def finish(self, row: InputRow, state: str) -> None:
        """Move the input (and its marker) from work/ to archive/YYYY-MM-DD/ and record it."""
        day = row.arrived_at.astimezone(datetime.UTC).strftime("%Y-%m-%d")
        target = self.settings.archive / day / final_name(row)
        self._move_final(row, target)
        self.ledger.inputs.mark_final(row.id, state, str(target), now=self.clock())

    def quarantine(self, row: InputRow, reason: str) -> None:
        """Record why, move the input to quarantine/ with a .reason.txt beside it, record where."""
        if not row.reason:
            letters = []
            if self.settings.routing.alerts_to:
                letters.append(
                    alert_letter(
                        f"file quarantined: {row.name}",
                        reason,
                        self.settings.routing.alerts_to,
                        station=self.settings.station_name,
                        key=f"quarantine:{row.sha256}:{row.id}",
                        domain=self.settings.routing.domain,
                    )
                )
            self.ledger.inputs.record_error(row.id, reason, letters, now=self.clock())
        target = self.settings.quarantine / final_name(row)
        require_folder(self.settings.quarantine)
        write_atomic(
            _reason_text(row, reason).encode("utf-8"),
            target.with_name(target.name + ".reason.txt"),
            make_parents=False,
        )
        self._move_final(row, target)
        self.ledger.inputs.mark_final(row.id, "quarantined", str(target), reason, now=self.clock())
        self.guard.note_error(reason.splitlines()[0])
        log.warning("%s: quarantined: %s", row.name, reason.splitlines()[0])

    def _move_final(self, row: InputRow, target: Path) -> None:
        work = Path(row.work_path)
        if work.exists():
            move_into(work, target.parent, name=target.name, exact=True, make_parents=False)
        for inbox in self.settings.inboxes:
            marker = work.with_name(work.name + inbox.marker_suffix)
            if inbox.handover == "marker" and marker.exists():
                move_into(marker, target.parent, name=target.name + inbox.marker_suffix,
                          make_parents=False)
        faults.point("after_archive_move")


def final_name(row: InputRow) -> str:
    """Ledger id first, so names never clash and each file leads to its ledger row."""
    return fit(f"{row.id:06d}_{row.name}", reserve_bytes=NAME_RESERVE_BYTES)


def _reason_text(row: InputRow, reason: str) -> str:
    return (
        f"{row.name} was quarantined by formgate.\n\n{reason}\n\n"
        f"ledger input id: {row.id}\nsha256: {row.sha256}\narrived: {row.arrived_at.isoformat()}\n\n"
        "Fix the cause, then drop a corrected file into the inbox (the station judges new bytes;\n"
        "the same bytes again are judged again only if they were quarantined before).\n"
    )


def ask_retest(
    settings: Settings, ledger: Ledger, rulebook: RuleBook | None, result: CellResult,
    alert: ChannelAlert, *, now: datetime.datetime, report_lot: ReportLot | None = None,
) -> bool:
    """``[channels] suspect_fails = "retest"``: ask, as the station, for a retest of the stage a
    suspect channel failed, so the cell waits for a record from another channel. The failed
    record keeps its verdict, certificate and cautions; a person may still release or reject
    the cell. False (and logged) when the review cannot be recorded now. ``report_lot``: see
    reviewing.record_review (a retest in a closed lot writes its report again)."""
    if rulebook is None or not result.stages:
        return False
    reason = (f"{channel_label((alert.station, alert.channel))} is suspect: test the cell again on "
              "another channel")
    asked = Asked("retest", f"station {settings.station_name}", reason, stage=result.stages[-1])
    try:
        record_review(settings, ledger, rulebook, lot=result.lot, cell_id=result.cell_id,
                      asked=asked, now=now, report_lot=report_lot)
    except FormgateError as exc:
        log.warning("cell %s lot %s: no retest asked for the suspect channel: %s", result.cell_id,
                    result.lot, exc)
        return False
    return True
