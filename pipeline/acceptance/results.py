"""The records of what judging found: each check's outcome, the verdict, the cell's result.

Data only, frozen, like the model's records: a CheckResult per rule applied, the Verdict
they give, the RuleSetRef that traces the rules, where a record stands among its cell's
records (RecordPlace, OtherRecord), and the CellResult that the result JSON, the
certificate, the letters and the ledger read.
"""

from __future__ import annotations

import datetime
import enum
from collections.abc import Mapping
from dataclasses import dataclass, field

from pipeline.acceptance.rules import SIMPLE, WHOLE_PROGRAM, CellType, Hazard, Severity, Window
from pipeline.model import AccuracyClass, CellMetrics, CurrentBand, Note, frozen_mapping


class Outcome(enum.Enum):
    IN_WINDOW = "in_window"
    OUT_OF_WINDOW = "out_of_window"
    NOT_JUDGED = "not_judged"  # value missing or untrustworthy: leads to hold
    SKIPPED = "skipped"  # value missing and the rule says that is acceptable


class VerdictKind(enum.Enum):
    PASS = "pass"
    FAIL = "fail"
    HOLD = "hold"
    ERROR = "error"


@dataclass(frozen=True, slots=True)
class CheckResult:
    """One row of the check table: a rule applied to a measured value."""

    rule_id: str
    metric: str
    value: float | None
    window: Window  # absolute (resolved against the cell type)
    outcome: Outcome
    severity: Severity
    hazard: Hazard | None
    message: str
    uncertainty: float | None = None  # the value's expanded uncertainty U (k = 2), if known
    decision: str = SIMPLE  # the decision rule the check was made by (DECISION_RULES)
    # guarded acceptance: the value lies within U inside a limit, too close to decide (held)
    too_close: bool = False


@dataclass(frozen=True, slots=True)
class Verdict:
    """The judgement on one cell: verdict, the check rows and hazards of failed reject checks."""

    kind: VerdictKind
    checks: tuple[CheckResult, ...]
    hazards: tuple[Hazard, ...]
    reasons: tuple[str, ...] = field(default=())

    @property
    def passed(self) -> bool:
        return self.kind is VerdictKind.PASS

    @property
    def left_out(self) -> tuple[CheckResult, ...]:
        """Checks not made that the rule set lets be left out: never counted as in window."""
        return tuple(c for c in self.checks if c.outcome is Outcome.SKIPPED)


@dataclass(frozen=True, slots=True)
class RuleSetRef:
    """Which rule set judged a cell: enough to trace it (name, revision, SHA-256 of the file)."""

    name: str
    revision: str
    sha256: str
    source: str
    family: str | None = None  # the rule set's family of cells, when it declares one


@dataclass(frozen=True, slots=True)
class RecordPlace:
    """Which record of its cell and stage a file is, when the cell has more than one.

    ``supersedes``: the file name, verdict and analysis time of the record it replaces
    (the one before it), so a reader of a retest sees what no longer stands.
    """

    number: int
    of: int
    supersedes_file: str
    supersedes_verdict: str
    supersedes_at: datetime.datetime

    def words(self) -> str:
        """'2 of 2 for this cell and stage; supersedes c.csv (fail, judged 2026-...)'."""
        at = self.supersedes_at.astimezone(datetime.UTC).isoformat(timespec="seconds")
        return (
            f"{self.number} of {self.of} for this cell and stage; supersedes "
            f"{self.supersedes_file} ({self.supersedes_verdict}, judged {at})"
        )


@dataclass(frozen=True, slots=True)
class OtherRecord:
    """Another record of the same cell: the stages it covers, its file, SHA-256 and verdict
    (empty for a file of aging readings, which is judged with the cell, not alone)."""

    stages: tuple[str, ...]
    name: str
    sha256: str
    verdict: str


@dataclass(frozen=True, slots=True)
class CellResult:
    """Everything known about one judged cell: what the JSON result and the certificate show.

    ``analysed_at`` is timezone-aware UTC and is an input, never read from a clock
    here, so the same result always renders to the same bytes.
    """

    source_name: str
    input_sha256: str
    metadata: Mapping[str, str]
    cell_type: CellType
    rule_set: RuleSetRef
    metrics: CellMetrics
    verdict: Verdict
    notes: tuple[Note, ...]
    analysed_at: datetime.datetime
    software_version: str
    current_band: CurrentBand | None = None  # how rest was told from current (segmentation)
    stages: tuple[str, ...] = WHOLE_PROGRAM  # the stages the cycle file covers (its metadata)
    record: RecordPlace | None = None  # set by a station when the cell has an earlier record
    needed_stages: tuple[str, ...] = WHOLE_PROGRAM  # what the cell's final verdict needs
    other_records: tuple[OtherRecord, ...] = ()  # the cell's other stages, as a station knew them
    accuracy: AccuracyClass | None = None  # the channel's class the uncertainties came from

    def __post_init__(self) -> None:
        object.__setattr__(self, "metadata", frozen_mapping(self.metadata))
        if self.analysed_at.tzinfo is None:
            raise ValueError("CellResult.analysed_at must be timezone-aware")

    @property
    def cell_id(self) -> str:
        return self.metadata.get("cell_id", "")

    @property
    def lot(self) -> str:
        return self.metadata.get("lot", "")
