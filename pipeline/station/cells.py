"""A cell's decision over its stages: recomputed whenever a record of it or a reading arrives.

Edge module (ledger and letters); the deciding itself is pure (pipeline.judge.lotclose and
pipeline.judge.cellverdict). After each cycle file and each OCV reading file the
station decides every cell it touched, under the rules in force: its latest record
per stage and all its readings count. A decision that differs from the cell's latest
is recorded beside it (never over it), with its letters in the same transaction:

- a cell that fails or is held because of its readings (or its lot's screens) gets a
  letter of its own: its cycle files' letters could not have said so;
- a fail or hold that was mailed and no longer stands (a retest, a copy sent again, a
  stage that came in) gets a short follow-up naming what stands now;
- a fail or hold that stands as it was, only worded anew (the same hazards; for a hold,
  the same reasons apart from the stages it waits for), is recorded but not mailed again.

A cell held only while it waits for a stage gets no letter: that is the normal course.
"""

from __future__ import annotations

import dataclasses
import datetime
import logging
import threading
from collections.abc import Callable, Iterable, Sequence

from pipeline.acceptance.rules import WAITING_FOR_STAGE, only_waiting
from pipeline.errors import FormgateError
from pipeline.judge.cellverdict import CellDecision, decide
from pipeline.ledger.ledger import Ledger
from pipeline.ledger.rows import DecisionRow
from pipeline.mail.cell_letters import decision_letter, superseded_letter
from pipeline.mail.letters import Letter
from pipeline.station.digests import cell_certificate_link, cell_certificate_path
from pipeline.station.reviewing import cell_now, review_stands
from pipeline.station.rules_in_force import RulesInForce
from pipeline.station.settings import Settings

log = logging.getLogger("formgate.station")

def mailed(decision: DecisionRow | None) -> bool:
    """Whether a decision was one people were told of: a fail, or a hold for a real reason."""
    return decision is not None and (
        decision.verdict == "fail" or (decision.verdict == "hold" and not only_waiting(decision.reason))
    )


def stands(before: DecisionRow, decision: CellDecision) -> bool:
    """Whether ``decision`` is what ``before`` said, only worded anew: a fail with the same
    hazards (a stage it waited for came in, a retest failed alike), or a hold for the same
    reasons apart from the stages it waits for. What was mailed for ``before`` still holds."""
    if (before.verdict, set(before.hazards)) != (decision.verdict, set(decision.hazards)):
        return False

    def real(reason: str) -> list[str]:
        return [part for part in reason.split("; ") if part and not part.startswith(WAITING_FOR_STAGE)]

    return decision.verdict == "fail" or real(before.reason) == real(decision.reason)


def change_letters(
    settings: Settings,
    *,
    lot: str,
    cell_id: str,
    decision: CellDecision,
    before: DecisionRow | None,
    cause: str,
    files: Sequence[tuple[str, str, str]],
    family: str | None,
    now: datetime.datetime,
) -> list[Letter]:
    """The letters a cell's new decision calls for (see the module docstring)."""
    routing, station = settings.routing, settings.station_name
    out: list[Letter] = []
    key = f"{lot}\n{cell_id}\n{decision.verdict}\n{decision.reason}\n{before.id if before else 0}"
    # a decision that stands as it was is no news: neither a new letter nor an update
    same = before is not None and stands(before, decision)
    if cause != "record" and not same and decision.verdict in ("fail", "hold") and not only_waiting(
        decision.reason
    ):
        to = routing.failures_to if decision.verdict == "fail" else routing.holds_to
        if to:
            out.append(decision_letter(
                cell_id=cell_id, lot=lot, verdict=decision.verdict, reasons=decision.reasons,
                hazards=decision.hazards, cause=cause, records=files, family=family,
                recipients=to, station=station, key=key, decided_at=now, domain=routing.domain,
                certificate=cell_certificate_link(settings, lot, cell_id),
            ))
    if before is not None and mailed(before) and not same:
        to = routing.failures_to if before.verdict == "fail" else routing.holds_to
        if to:
            out.append(superseded_letter(
                cell_id=cell_id, lot=lot, was=(before.verdict, before.reason, before.decided_at),
                now=(decision.verdict, decision.reason), cause=cause, records=files,
                family=family, recipients=to, station=station, key=key, domain=routing.domain,
                certificate=cell_certificate_link(settings, lot, cell_id),
            ))
    # each letter names the cell's own certificate: the outbox holds it until that is published
    waits_for = cell_certificate_path(settings, lot, cell_id)
    return [dataclasses.replace(letter, waits_for=waits_for) for letter in out]


class CellDecisions:
    """Decide cells after their records, under the rules in force, and record what changed."""

    def __init__(
        self,
        settings: Settings,
        ledger: Ledger,
        clock: Callable[[], datetime.datetime],
        rules: RulesInForce,
        mail_wake: threading.Event,
        touched: Callable[[str, str], None] | None = None,
    ) -> None:
        self.settings = settings
        self.ledger = ledger
        self.clock = clock
        self.rules = rules
        self.mail_wake = mail_wake
        # told of each (lot, cell) decided again: its certificate may change with its records
        # even when its decision does not (cellcerts.py)
        self.touched = touched

    def decide_cells(self, cells: Iterable[tuple[str, str]], cause: str) -> None:
        """Decide each (lot, cell id) again and record what changed, with its letters."""
        for lot, cell_id in dict.fromkeys(cells):
            try:
                self.decide_cell(lot, cell_id, cause)
            except FormgateError as exc:  # e.g. its cell type is in no rule set any more
                log.error("cell %s of lot %s cannot be decided: %s", cell_id, lot, exc)
            if self.touched is not None:
                self.touched(lot, cell_id)

    def decide_cell(self, lot: str, cell_id: str, cause: str) -> DecisionRow | None:
        rulebook = self.rules.rulebook
        if rulebook is None:
            return None
        cell = cell_now(self.ledger, rulebook, lot, cell_id)
        if cell is None:
            log.warning("cell %s of lot %s names no cell type yet; not decided", cell_id, lot)
            return None
        rule_set, stages = cell.rule_set, cell.stages
        decision = decide(cell.needed, stages.records)
        now = self.clock()

        def letters(before: DecisionRow | None) -> list[Letter]:
            return change_letters(
                self.settings, lot=lot, cell_id=cell_id, decision=decision, before=before,
                cause=cause, files=stages.files, family=rule_set.family, now=now,
            )

        with self.ledger.db.write():  # one transaction: a review recorded meanwhile is seen
            if review_stands(self.ledger, lot, cell_id, stages):
                # a person's review decides the cell until something new about it arrives
                return self.ledger.decisions.latest(lot, cell_id)
            row, before, new = self.ledger.decisions.decide(
                cell_id=cell_id,
                lot=lot,
                verdict=decision.verdict,
                reason=decision.reason,
                hazards=decision.hazards,
                grade=None,
                cause=cause,
                basis=[f"{stage}:{name}:{sha}" for stage, name, sha in stages.files],
                now=now,
                letters=letters,
            )
        if new:
            self.mail_wake.set()
            was = f" (was {before.verdict})" if before is not None else ""
            log.info("cell %s lot %s: %s%s%s", cell_id, lot, row.verdict, was,
                     f": {row.reason}" if row.reason else "")
        return row
