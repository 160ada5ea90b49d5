"""A cell's standing decision as one frozen record: what its cell certificate and cell JSON show.

Pure records and the few words drawn from them. A cell that arrives in stages has one
record per file (a stage record, with its own certificate); its standing decision is the
cell's own, the latest of: its stages, its readings, its lot's screens, a person's review.
The station builds a :class:`CellSummary` from its ledger rows (pipeline.station.cellpublish);
the cell JSON (cellresult.py) and the cell certificate (cellcertificate.py) are pure renders
of it, so the same rows always give the same bytes. Nothing here reads a clock or a file.
"""

from __future__ import annotations

import datetime
from dataclasses import dataclass

from pipeline.acceptance.results import RuleSetRef
from pipeline.acceptance.rules import SAFETY_HAZARDS, WAITING_FOR_STAGE

# What a stage record shows of its metrics on the cell certificate: the values a quality
# engineer reads first for each stage (common practice), in this order.
KEY_METRICS: dict[str, tuple[str, ...]] = {
    "formation": ("first_cycle_efficiency", "irreversible_capacity_Ah"),
    "grading": (
        "grading_capacity_Ah",
        "grading_energy_Wh",
        "dcir_mOhm",
        "rest_voltage_drift_mV_per_h",
    ),
    "any": ("max_temperature_C",),
}
OUTLIER = "outlier in lot: "


def key_metrics(stages: tuple[str, ...]) -> tuple[str, ...]:
    """The key metrics of a record of ``stages``, in the order shown.

    >>> key_metrics(("formation",))
    ('first_cycle_efficiency', 'irreversible_capacity_Ah', 'max_temperature_C')
    """
    names = [m for s in ("formation", "grading") if s in stages for m in KEY_METRICS[s]]
    return (*names, *KEY_METRICS["any"])


@dataclass(frozen=True, slots=True)
class DecisionEntry:
    """One decision on the cell as the ledger holds it (``id``: its ledger row)."""

    id: int
    verdict: str  # pass, fail, hold
    reason: str
    hazards: tuple[str, ...]
    grade: str | None
    cause: str  # record, readings, lot closed, rules, review
    decided_at: datetime.datetime
    review_id: int | None = None

    @property
    def reasons(self) -> tuple[str, ...]:
        return tuple(r for r in self.reason.split("; ") if r)


@dataclass(frozen=True, slots=True)
class StageEntry:
    """One cycle-file record of the cell: a stage record (or one of the whole program).

    ``counts_for``: the stages this record is the one that counts for (empty: a record
    another one superseded). ``decision``: its deciding line (a fail or hold). ``metrics``:
    its key metrics (:func:`key_metrics`), None where not measured. ``json_name`` and
    ``certificate_name``: its own published files (no certificate: None).
    """

    stages: tuple[str, ...]
    counts_for: tuple[str, ...]
    file: str
    sha256: str
    verdict: str
    decision: str
    hazards: tuple[str, ...]
    analysed_at: datetime.datetime
    rule_set: str  # name and revision that judged it
    metrics: tuple[tuple[str, float | None], ...]
    json_name: str
    certificate_name: str | None


@dataclass(frozen=True, slots=True)
class ReadingEntry:
    """One open-circuit-voltage reading of the cell's aging stage, with its file."""

    at: datetime.datetime
    ocv_v: float
    acir_mohm: float | None
    temperature_c: float | None
    file: str
    sha256: str


@dataclass(frozen=True, slots=True)
class CheckEntry:
    """One check on the aging stage: value, window, severity and outcome (as the judge said)."""

    rule_id: str
    metric: str
    value: float | None
    low: float | None
    high: float | None
    severity: str  # reject, review
    outcome: str  # in_window, out_of_window, not_judged, skipped
    uncertainty: float | None = None  # the value's expanded uncertainty U (k = 2), if known


@dataclass(frozen=True, slots=True)
class AgingEntry:
    """The aging stage judged on every reading: its verdict, K-value and checks.

    ``k_value_mV_per_day``: the OCV drop per day from the first to the last reading
    (None when it could not be made: ``k_note`` says why); ``days`` between them.
    """

    verdict: str
    decision: str
    k_value_mV_per_day: float | None
    days: float | None
    k_note: str
    readings: tuple[ReadingEntry, ...]
    checks: tuple[CheckEntry, ...]


@dataclass(frozen=True, slots=True)
class ScreenEntry:
    """One of the lot's screens as it applies to this cell.

    ``outcome``: ``outlier`` (the screen held the cell at its lot's close: ``detail`` says by
    how much), ``not held`` (a passing cell: inside the lot's limits at the close, or its lot
    not closed yet; a cell outside them would be held) or ``not applied`` (the screens judge
    only the cells that pass when the lot closes).
    """

    id: str
    metric: str
    k: float
    sides: str
    value: float | None
    outcome: str
    detail: str


@dataclass(frozen=True, slots=True)
class ReviewEntry:
    """A person's review of the cell: what, who, when, why, and the decision it answered."""

    id: int
    action: str  # release, reject, retest
    stage: str | None
    accepts: tuple[str, ...]
    reviewer: str
    reason: str
    reviewed_at: datetime.datetime
    answered: int


@dataclass(frozen=True, slots=True)
class CellSummary:
    """Everything a cell certificate and cell JSON show, from the ledger's rows of one cell.

    ``decision``: the standing decision (the cell's latest); ``history``: every decision,
    oldest first, the standing one last. ``needed``: the stages its rule set needs;
    ``missing``: those with no record yet. ``json_name`` and ``certificate_name``: the cell's
    own file names (``<cell>~cell.json`` and ``.pdf``; no certificate is published with this
    JSON: None).
    """

    cell_id: str
    lot: str
    cell_type: str
    nominal_capacity_ah: float | None
    rule_set: RuleSetRef
    station: str
    software_version: str
    needed: tuple[str, ...]
    missing: tuple[str, ...]
    decision: DecisionEntry
    history: tuple[DecisionEntry, ...]
    records: tuple[StageEntry, ...]
    aging: AgingEntry | None
    screens: tuple[ScreenEntry, ...]
    reviews: tuple[ReviewEntry, ...]
    json_name: str
    certificate_name: str | None
    # a failed record a suspect channel tested, in words (station/channelwatch.py): on the
    # certificate only, beside the verdict; it never changes the verdict or its cautions
    channel_notes: tuple[str, ...] = ()

    def review(self, review_id: int | None) -> ReviewEntry | None:
        return next((r for r in self.reviews if r.id == review_id), None)


def released_over(summary: CellSummary) -> tuple[str, ...]:
    """The hazards a passing cell carries: a person released it although its record shows
    them (a release keeps every hazard), so their cautions stay with it. Empty otherwise."""
    d = summary.decision
    return d.hazards if d.verdict == "pass" else ()


def release_of(summary: CellSummary) -> ReviewEntry | None:
    """The release a passing cell rests on: the review of its standing decision, else (a
    decision made again since, at its lot's close) its latest release."""
    review = summary.review(summary.decision.review_id)
    if review is not None and review.action == "release":
        return review
    return next((r for r in reversed(summary.reviews) if r.action == "release"), None)


def _released_over_words(summary: CellSummary, hazards: tuple[str, ...]) -> str:
    safety = [h for h in hazards if h in SAFETY_HAZARDS]
    kind = "safety hazard" if safety else "hazard"
    named = f"the {kind}{'s' if len(hazards) > 1 else ''} {', '.join(hazards)}"
    review = release_of(summary)
    if review is None:
        how = f"passes although its record shows {named}"
    elif review.accepts:
        how = f"released as a concession by {review.reviewer} over {named}"
    else:
        how = f"released by {review.reviewer} over {named}"
    return f"{how}: the hazard stays on its record and its caution applies"


def standing_why(summary: CellSummary) -> tuple[str, ...]:
    """Why the cell stands where it stands, one line per cause, the deciding one first:
    the review it rests on (and a hazard a release passed it over), the stage records and
    checks that fail or hold it, the lot screen that holds it, the stages it waits for; for
    a pass, what it passed."""
    d = summary.decision
    lines: list[str] = []
    review = summary.review(d.review_id) if d.cause == "review" else None
    if review is not None:
        stage = f" of stage {review.stage}" if review.stage else ""
        accepts = f", accepting {', '.join(review.accepts)}" if review.accepts else ""
        lines.append(
            f"review {review.id}: {review.action}{stage}{accepts} by {review.reviewer} "
            f"({review.reviewed_at.astimezone(datetime.UTC):%Y-%m-%d %H:%M} UTC): {review.reason}"
        )
    hazards = released_over(summary)
    if hazards:
        lines.append(_released_over_words(summary, hazards))
    by_reason = {r.decision: r for r in summary.records if r.counts_for and r.decision}
    aging = summary.aging
    for reason in d.reasons:
        record = by_reason.get(reason)
        if record is not None:
            lines.append(f"{_words(record.counts_for)} record {record.file}: {reason}")
        elif aging is not None and reason == aging.decision:
            lines.append(f"aging readings: {reason}")
        elif reason.startswith(OUTLIER):
            lines.append(f"lot screen: {reason[len(OUTLIER):]}")
        elif reason.startswith(WAITING_FOR_STAGE):
            stage = reason[len(WAITING_FOR_STAGE):].strip()
            lines.append(f"waiting: no record yet of stage {stage}")
        else:
            lines.append(reason)
    if not lines and d.verdict == "pass":
        covered = [s for s in summary.needed if s not in summary.missing]
        lines.append(f"every needed stage passed ({_words(tuple(covered))})")
        if d.grade is not None:
            lines.append(f"graded {d.grade} at the lot's close")
    return tuple(lines)


def _words(stages: tuple[str, ...]) -> str:
    if len(stages) > 2:
        return ", ".join(stages[:-1]) + " and " + stages[-1]
    return " and ".join(stages)
