"""People's reviews at a station: recording one, whether one still stands, and the cells that wait.

Edge module (ledger, rules and letters); what a review may do and what it decides is
pipeline.judge.review's, pure. Used by `formgate review` (recording a review beside a
running or a stopped station: SQLite's write-ahead log lets it in, and the review with
the decision it gives is ONE transaction that refuses when the cell's decision changed
meanwhile), by the station's cell decisions and lot closes (a review stands until
something new about the cell arrives), and by the lot closer's round (one alert per cell
that has waited for a person longer than its rule set's ``[review] wait_h``).
ISO 9001:2015 clause 8.7 (control of nonconforming outputs) is the review record's source.
"""

from __future__ import annotations

import dataclasses
import datetime
import json
import logging
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path

from pipeline.errors import FormgateError
from pipeline.judge.lotclose import CellNow, CellStages
from pipeline.judge.lotclose import cell_now as cell_as_it_stands
from pipeline.judge.lotstats import GradeClass, grade_of
from pipeline.judge.review import Asked, Decided, Reviewed, ReviewRefused, check, given, stands
from pipeline.ledger.ledger import Ledger
from pipeline.ledger.rows import DecisionRow, ReviewRow
from pipeline.mail.letters import Letter, alert_letter
from pipeline.mail.review_letters import ReviewFacts, review_letter
from pipeline.rulebook.book import RuleBook
from pipeline.station.digests import cell_certificate_link, cell_certificate_path
from pipeline.station.settings import Settings

log = logging.getLogger("formgate.station")


def cell_now(ledger: Ledger, rulebook: RuleBook, lot: str, cell_id: str) -> CellNow | None:
    """The cell's records that count, as the station decides it (station/cells.py), from the
    ledger; None when no record names its cell type yet."""
    docs = [json.loads(r.result_json) for r in ledger.results.of_cell(lot, cell_id)
            if r.verdict != "error"]
    readings = [(s.file_name, s.file_sha256, s.reading) for s in ledger.readings.of(lot, cell_id)]
    return cell_as_it_stands(docs, readings, rulebook)


def basis_of(files: Sequence[tuple[str, str, str]]) -> list[str]:
    """A decision's basis: each file it rests on as "stage words:file name:SHA-256"."""
    return [f"{stage}:{name}:{sha}" for stage, name, sha in files]


def seen_files(basis: Sequence[str]) -> frozenset[tuple[str, str]]:
    """(file name, SHA-256) of every file a decision's basis names (its review left out).

    >>> sorted(seen_files(["review:3", "formation and grading:c:1.csv:ab12", "aging:a.csv:cd"]))
    [('a.csv', 'cd'), ('c:1.csv', 'ab12')]
    """
    found = set()
    for entry in basis:
        if entry.startswith("review:"):
            continue
        _, _, rest = entry.partition(":")  # stage words never hold a colon; a file name may
        name, _, sha = rest.rpartition(":")
        found.add((name, sha))
    return frozenset(found)


def _closed_at(ledger: Ledger, lot: str) -> datetime.datetime | None:
    return ledger.lots.get(lot).closed_at


def as_reviewed(
    review: ReviewRow, gave: DecisionRow, closed_at: datetime.datetime | None
) -> Reviewed:
    """A recorded review and the decision it gave, as judge.review needs them."""
    asked = Asked(review.action, review.reviewer, review.reason, review.stage, review.accepts)
    return Reviewed(
        asked,
        Decided(gave.verdict, gave.reason, gave.hazards, gave.grade),
        seen_files(gave.basis),
        after_close=closed_at is not None and closed_at <= review.reviewed_at,
    )


def reviewed(ledger: Ledger, lot: str, cell_id: str) -> Reviewed | None:
    """The cell's latest review, or None."""
    reviews = ledger.reviews.of_cell(lot, cell_id)
    gave = ledger.reviews.given(reviews[-1]) if reviews else None
    if not reviews or gave is None:
        return None
    return as_reviewed(reviews[-1], gave, _closed_at(ledger, lot))


def reviewed_cells(ledger: Ledger, lot: str) -> dict[str, Reviewed]:
    """Each reviewed cell of the lot -> its latest review (for the lot's close)."""
    latest = {r.cell_id: r for r in ledger.reviews.of_lot(lot)}
    closed_at = _closed_at(ledger, lot) if latest else None
    out = {}
    for cell, review in latest.items():
        gave = ledger.reviews.given(review)
        if gave is not None:
            out[cell] = as_reviewed(review, gave, closed_at)
    return out


def last_review_id(ledger: Ledger, lot: str) -> int:
    """The id of the lot's latest review (0: none), to tell the reviews recorded after it."""
    reviews = ledger.reviews.of_lot(lot)
    return reviews[-1].id if reviews else 0


def reviewed_since(ledger: Ledger, lot: str, cell_id: str, review_id: int) -> bool:
    """True when the cell has a review later than ``review_id``."""
    reviews = ledger.reviews.of_cell(lot, cell_id)
    return bool(reviews) and reviews[-1].id > review_id


def review_stands(ledger: Ledger, lot: str, cell_id: str, stages: CellStages) -> bool:
    """True when the cell's latest review still decides it: nothing new about the cell came
    after it (judge/review.py ``stands``), so deciding it again must not undo it."""
    review = reviewed(ledger, lot, cell_id)
    return review is not None and stands(review, stages.records, stages.files)


# writes a closed lot's report and export again: (rulebook, lot, now) -> the report's path or None
ReportLot = Callable[[RuleBook, str, datetime.datetime], Path | None]


@dataclass(frozen=True, slots=True)
class Recorded:
    """A review recorded: its row, the decision it gave and the one it answered; ``report``:
    its closed lot's report, written again to show it (None: the lot is open, or the report
    could not be written now)."""

    review: ReviewRow
    decision: DecisionRow
    answered: DecisionRow
    report: Path | None = None


def _current(ledger: Ledger, latest: DecisionRow, stages: CellStages) -> bool:
    """Whether the station, deciding the cell now, would keep ``latest`` (else a record or
    reading came in that the station has still to decide)."""
    if latest.cause == "review":
        review = reviewed(ledger, latest.lot, latest.cell_id)
        return review is not None and stands(review, stages.records, stages.files)
    seen = seen_files(latest.basis)
    return all((name, sha) in seen for _, name, sha in stages.files)


def _rejected_by(ledger: Ledger, latest: DecisionRow) -> str | None:
    if latest.cause != "review" or latest.review_id is None:
        return None
    review = ledger.reviews.get(latest.review_id)
    return review.reviewer if review is not None and review.action == "reject" else None


def _recipients(settings: Settings, verdicts: Sequence[str]) -> tuple[str, ...]:
    routing = settings.routing
    to: list[str] = []
    if "fail" in verdicts:
        to += routing.failures_to
    if "hold" in verdicts:
        to += routing.holds_to
    return tuple(dict.fromkeys(to))


def record_review(
    settings: Settings,
    ledger: Ledger,
    rulebook: RuleBook,
    *,
    lot: str,
    cell_id: str,
    asked: Asked,
    now: datetime.datetime,
    report_lot: ReportLot | None = None,
) -> Recorded:
    """Check ``asked`` against the cell's standing decision and record it with the decision it
    gives and its letter: ONE transaction. Raises ReviewRefused (exit 2) with what to do.

    ``report_lot`` writes a closed lot's report and export again after the review
    (lots.report_closed_lot, handed in by the caller: the lot part sits above this one)."""
    latest = ledger.decisions.latest(lot, cell_id)
    if latest is None:
        raise ReviewRefused(
            f"cell {cell_id} of lot {lot} has no decision yet", None,
            "It is decided once its first record is judged (formgate cell show shows it).",
        )
    cell = cell_now(ledger, rulebook, lot, cell_id)
    if cell is None:
        raise ReviewRefused(f"cell {cell_id} of lot {lot} names no cell type yet", None,
                            "Review it once a record of it has been judged.")
    if not _current(ledger, latest, cell.stages):
        raise ReviewRefused(
            f"cell {cell_id} of lot {lot} has a record or reading that its decision does not "
            "rest on yet: the station has still to decide it", None,
            f"Look again in a moment (formgate cell show FOLDER {cell_id} --lot {lot}); a "
            "stopped station decides it when it starts (formgate watch).",
        )
    shown = Decided(latest.verdict, latest.reason, latest.hazards, latest.grade)
    rule_set = cell.rule_set
    check(asked, shown, cell.stages.records, cell=cell_id, needed=cell.needed,
          release_hazards=rule_set.release_hazards, counts=rule_set.record_counts,
          rejected_by=_rejected_by(ledger, latest))
    grade = None
    if asked.action == "release" and _closed_at(ledger, lot) is not None:
        # its lot was graded at its close: the released cell gets the grade its values give
        classes = [GradeClass(g.name, {m: (lo, hi) for m, lo, hi in g.bounds}) for g in rule_set.grades]
        grade = grade_of(cell.stages.values, classes)
    out = given(asked, shown, grade=grade)

    def letters(review: ReviewRow, gave: DecisionRow) -> list[Letter]:
        to = _recipients(settings, (latest.verdict, gave.verdict))
        if not to:
            return []
        facts = ReviewFacts(
            cell_id=cell_id, lot=lot, action=review.action, reviewer=review.reviewer,
            reason=review.reason, reviewed_at=review.reviewed_at,
            was=(latest.verdict, latest.reason, latest.decided_at),
            now=(gave.verdict, gave.reason), review_id=review.id, stage=review.stage,
            accepts=review.accepts, hazards=gave.hazards, family=rule_set.family,
            certificate=cell_certificate_link(settings, lot, cell_id),
        )
        letter = review_letter(facts, to, station=settings.station_name,
                               domain=settings.routing.domain)
        # it links the cell's own certificate, rewritten to show the review: the outbox holds
        # it until that is published, as a fail's or hold's letter
        return [dataclasses.replace(letter, waits_for=cell_certificate_path(settings, lot, cell_id))]

    try:
        review, decision = ledger.reviews.record(
            cell_id=cell_id, lot=lot, action=asked.action, stage=asked.stage,
            accepts=asked.accepts, reviewer=" ".join(asked.reviewer.split()),
            reason=asked.reason.strip(), now=now, answers=latest.id,
            decision=lambda _: (out.verdict, out.reason, out.hazards, out.grade),
            letters=letters, basis=basis_of(cell.stages.files),
        )
    except ValueError as exc:  # the station decided the cell again meanwhile
        raise ReviewRefused(
            f"{exc}; nothing was recorded", None,
            f"Look again (formgate cell show FOLDER {cell_id} --lot {lot}) and review the "
            "decision that stands now.",
        ) from exc
    log.info("cell %s lot %s: %s by %s (was %s): %s", cell_id, lot, asked.action,
             review.reviewer, latest.verdict, decision.reason)
    report = (report_lot(rulebook, lot, now)
              if report_lot is not None and _closed_at(ledger, lot) is not None else None)
    return Recorded(review, decision, latest, report)


def age_words(seconds: float) -> str:
    """How long for people: minutes, hours or days.

    >>> age_words(600), age_words(3 * 3600), age_words(3 * 86400)
    ('10 min', '3.0 h', '3.0 days')
    """
    if seconds < 5400:
        return f"{seconds / 60:.0f} min"
    if seconds < 2 * 86400:
        return f"{seconds / 3600:.1f} h"
    return f"{seconds / 86400:.1f} days"


def alert_waiting(
    settings: Settings, ledger: Ledger, rulebook: RuleBook, now: datetime.datetime
) -> int:
    """One alert per cell that has waited for a person longer than its rule set's
    ``[review] wait_h`` (once per spell of waiting); the number queued."""
    routing = settings.routing
    if not routing.alerts_to:
        return 0
    queued = 0
    for lot, cell, verdict, reason, since in ledger.reviews.waiting():
        cell_type = ledger.lots.cell_type(lot)
        try:
            hours = rulebook.for_cell_type(cell_type)[0].review_wait_h if cell_type else None
        except FormgateError:
            continue
        waited = (now - since).total_seconds()
        if hours is None or waited < hours * 3600:
            continue
        letter = alert_letter(
            f"cell {cell} of lot {lot} has waited {age_words(waited)} for a review",
            f"Cell {cell} of lot {lot} has been {verdict} since "
            f"{since.isoformat(timespec='seconds')}, longer than the {hours:g} h its rule set "
            f"allows ([review] wait_h), and no person has reviewed it: {reason}\n\n"
            f"A quality engineer should release, reject or retest it: formgate review list "
            f"{settings.root} shows the cells that wait.",
            routing.alerts_to,
            station=settings.station_name,
            key=f"review wait\n{lot}\n{cell}\n{since.isoformat()}",
            domain=routing.domain,
        )
        if ledger.outbox.by_message_id(letter.message_id) is None:
            ledger.outbox.queue(letter, now=now)
            queued += 1
            log.warning("cell %s of lot %s has waited for a review for over %g h", cell, lot, hours)
    return queued
