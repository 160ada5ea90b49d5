"""Publishing one cell's certificate and cell JSON: its standing decision, rendered from records.

Edge module (ledger and files). A cell that arrives in stages has a stage record per
file; its standing decision (ledger ``decisions``) is the cell's own. This module turns
the ledger rows of one cell into a frozen ``CellSummary`` (pipeline.report.cellsummary),
renders the cell JSON and the cell certificate from it (pure, in pipeline.report), writes
both atomically and records each in ``ledger.published`` with the decision it shows:

    JSON written -> certificate written (its verification code: the JSON's SHA-256)
    -> ONE transaction: the 'cell certificate' and 'cell result' rows

A crash anywhere before that transaction leaves the cell's latest decision without its
'cell result' row, so the cell is still *pending* and is published again (same rows, same
bytes). Paths are recorded absolute, as every published file's (published_files.py).

Two callers: the station renders its pending cells in its worker processes
(cellcerts.py), and :func:`publish_cell_now` does all of it in the calling process, for
the review command right after it records a review, and for a lot closed by command.
"""

from __future__ import annotations

import datetime
import hashlib
import json
import logging
import os
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from pipeline import __version__
from pipeline.acceptance.results import RuleSetRef
from pipeline.acceptance.rules import CellType, RuleSet
from pipeline.errors import FormgateError
from pipeline.judge.aging import K_VALUE, judge_aging
from pipeline.judge.cellverdict import CYCLE_FILE, decide
from pipeline.judge.evaluate import decision_line
from pipeline.judge.kvalue import KValue
from pipeline.judge.lotclose import cell_stages
from pipeline.ledger.ledger import Ledger
from pipeline.ledger.rows import DecisionRow, PublishedRow, ResultRow, StoredReading
from pipeline.names import cell_file_stem, safe_name
from pipeline.report.cellsummary import (
    OUTLIER,
    AgingEntry,
    CellSummary,
    CheckEntry,
    DecisionEntry,
    ReadingEntry,
    ReviewEntry,
    ScreenEntry,
    StageEntry,
    key_metrics,
)
from pipeline.rulebook.book import RuleBook
from pipeline.station import faults
from pipeline.station.channelwatch import suspect_notes
from pipeline.station.settings import Settings
from pipeline.writing import write_atomic

log = logging.getLogger("formgate.station")

RESULT_KIND, CERTIFICATE_KIND = "cell result", "cell certificate"


@dataclass(frozen=True, slots=True)
class CellPublished:
    """What :func:`publish_cell_now` wrote: the cell JSON and certificate, and the decision
    (ledger id) they show. ``None`` paths: nothing was written (no decision yet, or no
    certificate wanted under ``certify``)."""

    json_path: Path | None
    pdf_path: Path | None
    decision_id: int | None


def cell_paths(settings: Settings, lot: str, cell_id: str) -> tuple[Path, Path]:
    """``<results>/<lot>/<cell>~cell.json`` and ``<certificates>/<lot>/<cell>~cell.pdf``."""
    folder, stem = safe_name(lot), cell_file_stem(cell_id)
    return (
        settings.results / folder / f"{stem}.json",
        settings.certificates / folder / f"{stem}.pdf",
    )


# ---- the summary, from the ledger's rows ------------------------------------------------------


def _decision(row: DecisionRow) -> DecisionEntry:
    return DecisionEntry(
        row.id, row.verdict, row.reason, row.hazards, row.grade, row.cause, row.decided_at,
        row.review_id,
    )


def _rule_set_of(
    rulebook: RuleBook, docs: list[dict[str, Any]], readings: list[StoredReading]
) -> tuple[RuleSet, CellType] | None:
    """The rule set and cell type the cell is decided under, as station/cells.py finds them."""
    types = [str(d["cell_type"]["name"]) for d in docs] + [
        s.reading.cell_type for s in readings if s.reading.cell_type
    ]
    if not types:
        return None
    return rulebook.for_cell_type(types[-1])


def _records(
    rows: list[ResultRow], docs: list[dict[str, Any]], counting: dict[tuple[str, str], list[str]]
) -> tuple[StageEntry, ...]:
    out = []
    for row, doc in zip(rows, docs, strict=True):
        stages = tuple(str(s) for s in doc.get("stages") or CYCLE_FILE)
        name, sha = str(doc["input"]["name"]), str(doc["input"]["sha256"])
        verdict = str(doc["verdict"])
        metrics = doc.get("metrics", {})
        out.append(StageEntry(
            stages=stages,
            counts_for=tuple(counting.get((name, sha), ())),
            file=name,
            sha256=sha,
            verdict=verdict,
            decision="" if verdict == "pass" else str(doc.get("decision") or ""),
            hazards=tuple(str(h) for h in doc.get("hazards", ())),
            analysed_at=row.analysed_at,
            rule_set=f"{row.rule_set_name} {row.rule_set_revision}",
            metrics=tuple((m, _float(metrics.get(m))) for m in key_metrics(stages)),
            json_name=Path(row.json_path).name,
            certificate_name=Path(row.pdf_path).name if row.pdf_path else None,
        ))
    return tuple(out)


def _float(value: object) -> float | None:
    return float(value) if isinstance(value, int | float) else None


def _aging(readings: list[StoredReading], rule_set: RuleSet, cell_type: CellType) -> AgingEntry:
    result = judge_aging([s.reading for s in readings], rule_set, cell_type)
    verdict = result.verdict.kind.value
    k = result.k
    if isinstance(k, KValue):
        note = k.note or ""
        days: float | None = k.days
    else:
        note, days = k.reason, None
    ordered = sorted(readings, key=lambda s: (s.reading.at, s.file_name, s.reading.line))
    return AgingEntry(
        verdict=verdict,
        decision="" if verdict == "pass" else decision_line(result.verdict, result.notes),
        k_value_mV_per_day=result.values.get(K_VALUE),
        days=days,
        k_note=note,
        readings=tuple(
            ReadingEntry(s.reading.at, s.reading.ocv_v, s.reading.acir_mohm,
                         s.reading.temperature_c, s.file_name, s.file_sha256)
            for s in ordered
        ),
        checks=tuple(
            CheckEntry(c.rule_id, c.metric, c.value, c.window.low, c.window.high,
                       c.severity.value, c.outcome.value, c.uncertainty)
            for c in result.verdict.checks
        ),
    )


def _screens(
    rule_set: RuleSet, values: dict[str, float | None], history: list[DecisionRow]
) -> tuple[ScreenEntry, ...]:
    """Each lot screen as it applies to the cell, from the decision its lot's close recorded
    (the latest with cause 'lot closed'), else from the standing one."""
    closing = next((d for d in reversed(history) if d.cause == "lot closed"), history[-1])
    reasons = [r for r in closing.reason.split("; ") if r]
    out = []
    for screen in rule_set.screens:
        found = next((r for r in reasons if r.startswith(f"{OUTLIER}{screen.metric} ")), None)
        if found is not None:
            outcome, detail = "outlier", found[len(OUTLIER):]
        elif closing.verdict == "pass" or any(r.startswith(OUTLIER) for r in reasons):
            outcome = "not held"
            detail = "the screens hold a passing cell outside the lot's limits at its close"
        else:
            outcome = "not applied"
            detail = "the screens judge only the cells that pass when the lot closes"
        out.append(ScreenEntry(screen.id, screen.metric, screen.k, screen.sides,
                               values.get(screen.metric), outcome, detail))
    return tuple(out)


def summarize(
    settings: Settings,
    ledger: Ledger,
    rulebook: RuleBook,
    lot: str,
    cell_id: str,
    *,
    certificate: bool = True,
) -> CellSummary | None:
    """The cell's standing decision and everything behind it, from the ledger's rows.

    None when the cell has no decision yet. Raises FormgateError when its cell type is in
    no rule set of ``rulebook`` (as deciding it would). ``certificate``: whether a cell
    certificate is published with the JSON (the JSON names it).
    """
    history = ledger.decisions.of_cell(lot, cell_id)
    if not history:
        return None
    rows = [r for r in ledger.results.of_cell(lot, cell_id) if r.verdict != "error"]
    docs = [json.loads(r.result_json) for r in rows]
    readings = ledger.readings.of(lot, cell_id)
    found = _rule_set_of(rulebook, docs, readings)
    if found is None:
        raise FormgateError(f"cell {cell_id} of lot {lot} names no cell type")
    rule_set, cell_type = found
    triples = [(s.file_name, s.file_sha256, s.reading) for s in readings]
    stages = cell_stages(docs, triples, rule_set, cell_type)
    counting: dict[tuple[str, str], list[str]] = {}
    for words, name, sha in stages.files:
        if words != "aging":
            counting.setdefault((name, sha), []).extend(words.split(" and "))
    needed = cell_type.stages or rule_set.stages
    json_path, pdf_path = cell_paths(settings, lot, cell_id)
    return CellSummary(
        cell_id=cell_id,
        lot=lot,
        cell_type=cell_type.name,
        nominal_capacity_ah=cell_type.nominal_capacity_ah,
        # the rule file's name, as a result names it: never a path on the station's disk
        rule_set=RuleSetRef(rule_set.name, rule_set.revision, rule_set.sha256,
                            Path(rule_set.source).name, rule_set.family),
        station=settings.station_name,
        software_version=__version__,
        needed=tuple(needed),
        missing=decide(needed, stages.records).missing,
        decision=_decision(history[-1]),
        history=tuple(_decision(d) for d in history),
        records=_records(rows, docs, counting),
        aging=_aging(readings, rule_set, cell_type) if readings else None,
        screens=_screens(rule_set, dict(stages.values), history),
        reviews=tuple(
            ReviewEntry(r.id, r.action, r.stage, r.accepts, r.reviewer, r.reason, r.reviewed_at,
                        r.decision_id)
            for r in ledger.reviews.of_cell(lot, cell_id)
        ),
        json_name=json_path.name,
        certificate_name=pdf_path.name if certificate else None,
        channel_notes=suspect_notes(ledger, rows, docs),
    )


# ---- what is published, and what is still to publish -------------------------------------------


def wants_certificate(settings: Settings, verdict: str, earlier: PublishedRow | None) -> bool:
    """Whether the cell's decision gets a certificate under ``certify``: every decision with
    "all"; a fail or hold with "failed_and_held", and a pass once the cell had a certificate
    (its old fail or hold would stand under the cell's name otherwise); none with "none"."""
    if settings.certify == "all":
        return True
    if settings.certify == "failed_and_held":
        return verdict != "pass" or earlier is not None
    return False


def published_json(settings: Settings, ledger: Ledger, lot: str, cell_id: str) -> PublishedRow | None:
    """The latest 'cell result' row of the cell (looked up by its path: the ledger's index)."""
    row = ledger.published.by_path(os.path.abspath(cell_paths(settings, lot, cell_id)[0]))
    return row if row is not None and row.kind == RESULT_KIND else None


def published_certificate(
    settings: Settings, ledger: Ledger, lot: str, cell_id: str
) -> PublishedRow | None:
    """The latest 'cell certificate' row of the cell."""
    row = ledger.published.by_path(os.path.abspath(cell_paths(settings, lot, cell_id)[1]))
    return row if row is not None and row.kind == CERTIFICATE_KIND else None


def is_current(settings: Settings, ledger: Ledger, lot: str, cell_id: str) -> bool:
    """True when the cell's latest decision has its cell JSON (and so its certificate) published."""
    latest = ledger.decisions.latest(lot, cell_id)
    if latest is None:
        return True
    row = published_json(settings, ledger, lot, cell_id)
    return row is not None and row.decision_id == latest.id


@dataclass(frozen=True, slots=True)
class CellJob:
    """One cell to publish: its summary, its JSON text, and whether a certificate goes with it."""

    summary: CellSummary
    json_text: str

    @property
    def key(self) -> tuple[str, str]:
        return self.summary.lot, self.summary.cell_id

    @property
    def certificate(self) -> bool:
        return self.summary.certificate_name is not None


def job_for(
    settings: Settings, ledger: Ledger, rulebook: RuleBook, lot: str, cell_id: str
) -> CellJob | None:
    """The cell's job if its published JSON is not exactly what its rows give now, else None.

    Comparing the JSON's SHA-256 (not only the decision's id) also catches what changes
    without a new decision: a retest that passes as the first record did, a reading more.
    """
    from pipeline.report.cellresult import to_json

    earlier = published_json(settings, ledger, lot, cell_id)
    latest = ledger.decisions.latest(lot, cell_id)
    if latest is None:
        return None
    wanted = wants_certificate(
        settings, latest.verdict, published_certificate(settings, ledger, lot, cell_id)
    )
    summary = summarize(settings, ledger, rulebook, lot, cell_id, certificate=wanted)
    if summary is None:
        return None
    text = to_json(summary)
    if earlier is not None and earlier.sha256 == hashlib.sha256(text.encode("utf-8")).hexdigest():
        return None
    return CellJob(summary, text)


def render_certificate(job: CellJob) -> bytes | None:
    """The cell certificate's PDF bytes (pure and slow: about 0.2 s), or None if none is wanted."""
    if not job.certificate:
        return None
    from pipeline.report.cellcertificate import render_html  # WeasyPrint is slow to import
    from pipeline.report.pdf import render_pdf
    from pipeline.report.verification import verification_code

    # the certificate carries the code of the very JSON text published with it
    return render_pdf(render_html(job.summary, code=verification_code(job.json_text)))


def write_and_record(
    settings: Settings, ledger: Ledger, job: CellJob, pdf: bytes | None, now: datetime.datetime
) -> CellPublished:
    """Write the cell's JSON, then its certificate, atomically; record both (JSON row last)."""
    s = job.summary
    json_path, pdf_path = cell_paths(settings, s.lot, s.cell_id)
    data = job.json_text.encode("utf-8")
    # the results and certificates folders must be there; a lot's folder is made in them
    write_atomic(data, json_path, make_parents=False)
    faults.point("after_cell_json")
    if pdf is not None:
        write_atomic(pdf, pdf_path, make_parents=False)
    with ledger.db.write():  # both rows or neither: the 'cell result' row marks it published
        if pdf is not None:
            ledger.published.record(
                path=os.path.abspath(pdf_path), sha256=hashlib.sha256(pdf).hexdigest(),
                kind=CERTIFICATE_KIND, now=now, lot=s.lot, cell_id=s.cell_id,
                decision_id=s.decision.id,
            )
        ledger.published.record(
            path=os.path.abspath(json_path), sha256=hashlib.sha256(data).hexdigest(),
            kind=RESULT_KIND, now=now, lot=s.lot, cell_id=s.cell_id, decision_id=s.decision.id,
        )
    return CellPublished(json_path, pdf_path if pdf is not None else None, s.decision.id)


def publish_cell_now(
    settings: Settings,
    ledger: Ledger,
    rulebook: RuleBook,
    lot: str,
    cell_id: str,
    now: datetime.datetime,
) -> CellPublished:
    """Render and publish the cell's JSON and certificate for its latest decision, in the
    calling process (about 0.2 s of CPU for the PDF).

    Reads the cell's records, readings, lot screens and reviews from ``ledger``; writes
    ``<results>/<lot>/<cell>~cell.json`` then ``<certificates>/<lot>/<cell>~cell.pdf`` (the
    JSON first: its SHA-256 is the certificate's verification code), each atomically, and
    records both in ``ledger.published`` (kinds 'cell result' and 'cell certificate', with
    the decision's id). A cell with no decision yet writes nothing. When what is published
    is already exactly what the rows give, nothing is written again. ``rulebook``: the rules
    in force (the cell's type names its rule set). Raises FormgateError when the cell's type
    is in no rule set, OSError when a file cannot be written.
    """
    job = job_for(settings, ledger, rulebook, lot, cell_id)
    if job is None:
        latest = ledger.decisions.latest(lot, cell_id)
        if latest is None:
            return CellPublished(None, None, None)
        json_path, pdf_path = cell_paths(settings, lot, cell_id)
        cert = published_certificate(settings, ledger, lot, cell_id)
        shown = pdf_path if cert is not None and cert.decision_id == latest.id else None
        return CellPublished(json_path, shown, latest.id)
    return write_and_record(settings, ledger, job, render_certificate(job), now)


@dataclass(frozen=True, slots=True)
class CellRendered:
    """What a worker made of a :class:`CellJob`: the certificate's bytes, or why not."""

    pdf: bytes | None
    error: str = ""


def render_job(job: CellJob) -> CellRendered:
    """Render one cell's certificate in a worker process; never raises (a bug is an error)."""
    try:
        return CellRendered(render_certificate(job))
    except Exception as exc:
        return CellRendered(None, f"{type(exc).__name__}: {exc}")


def publish_cells_now(
    settings: Settings,
    ledger: Ledger,
    rulebook: RuleBook,
    lot: str,
    cells: Sequence[str],
    now: datetime.datetime,
) -> None:
    """:func:`publish_cell_now` for each cell of ``cells`` in this process (a lot closed by
    command); a cell that cannot be decided under ``rulebook`` is logged and left."""
    for cell_id in cells:
        try:
            publish_cell_now(settings, ledger, rulebook, lot, cell_id, now)
        except FormgateError as exc:
            log.error("cell %s of lot %s: no cell certificate: %s", cell_id, lot, exc)


def all_current(settings: Settings, ledger: Ledger, lot: str, cells: Sequence[str]) -> bool:
    """True when each of ``cells`` has its cell JSON (and certificate) for its latest decision."""
    latest = ledger.decisions.latest_of_lot(lot)
    for cell_id in cells:
        decision = latest.get(cell_id)
        if decision is None:
            continue
        row = published_json(settings, ledger, lot, cell_id)
        if row is None or row.decision_id != decision.id:
            return False
    return True
