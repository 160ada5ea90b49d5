"""A cell's verdict over its stages and its lot: the worst of its stages, held while one is missing.

Pure. Each stage result (a cycle file covers formation and grading; the aging readings
cover aging) brings its verdict and deciding line. The cell's verdict is:

- ``fail`` when any stage failed: a failure is final even while other stages are missing;
- else ``hold`` when a needed stage is missing ("waiting for stage aging"), a stage is
  held, or the closed lot's screens found the cell an outlier ("outlier in lot: ...");
- else ``pass``.

Every reason that holds or fails the cell is kept, the deciding ones first, so a
reader sees all of them in one line.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

from pipeline.acceptance.rules import STAGES, WAITING_FOR_STAGE, Window
from pipeline.judge.lotscreens import Outlier
from pipeline.judge.quantities import format_value, precision

# What each kind of record covers.
CYCLE_FILE: tuple[str, ...] = ("formation", "grading")
AGING: tuple[str, ...] = ("aging",)
_ORDER = {"fail": 0, "error": 1, "hold": 2, "pass": 3}


@dataclass(frozen=True, slots=True)
class CheckOut:
    """A check of a record that was out of its window or could not be judged."""

    rule_id: str  # the check's id, as in the result JSON
    metric: str
    severity: str  # reject or review
    outcome: str  # out_of_window or not_judged

    @property
    def failed(self) -> bool:
        """A reject check out of its window: what fails a cell."""
        return self.severity == "reject" and self.outcome == "out_of_window"


@dataclass(frozen=True, slots=True)
class StageRecord:
    """One judged record of a cell: the stages it covers, its verdict and deciding line."""

    stages: tuple[str, ...]
    verdict: str  # pass, fail, hold
    reason: str = ""  # the deciding line of a fail or hold
    hazards: tuple[str, ...] = ()
    source: str = ""  # the file it came from
    sha256: str = ""
    checks_out: tuple[CheckOut, ...] = ()  # what a person reviewing the cell looks at


@dataclass(frozen=True, slots=True)
class CellDecision:
    """The verdict of a cell over its stages and lot, with every reason in deciding order."""

    verdict: str
    reasons: tuple[str, ...]
    hazards: tuple[str, ...]
    missing: tuple[str, ...]  # needed stages with no record yet

    @property
    def reason(self) -> str:
        return "; ".join(self.reasons)


def outlier_phrase(outlier: Outlier, unit: str = "") -> str:
    """'outlier in lot: k_value_mV_per_day 2.410 mV/day > lot limit 1.300 mV/day'.

    The value and the limit are written as everywhere else (quantities.py), in the metric's
    own unit; ``unit`` is no longer needed and kept for the callers that pass it.
    """
    del unit  # the metric names its unit
    sign, bound = (">", outlier.high) if outlier.side == "high" else ("<", outlier.low)
    extra = precision(outlier.metric, outlier.value, Window(outlier.low, outlier.high))
    value = format_value(outlier.metric, outlier.value, extra)
    return (
        f"outlier in lot: {outlier.metric} {value} {sign} lot limit "
        f"{format_value(outlier.metric, bound, extra)}"
    )


def decide(
    needed: Sequence[str],
    records: Sequence[StageRecord],
    outlier_reasons: Sequence[str] = (),
) -> CellDecision:
    """The cell's verdict from its stage records (one per stage: the one that counts)."""
    unknown = [s for r in records for s in r.stages if s not in STAGES]
    if unknown:
        raise ValueError(f"unknown stage {unknown[0]!r}; stages are {', '.join(STAGES)}")
    covered = {s for r in records for s in r.stages}
    missing = tuple(s for s in STAGES if s in needed and s not in covered)
    ranked = sorted(records, key=lambda r: _ORDER.get(r.verdict, 0))
    hazards = tuple(dict.fromkeys(h for r in records if r.verdict == "fail" for h in r.hazards))
    failing = [r.reason for r in ranked if r.verdict in ("fail", "error")]
    holding = [r.reason for r in ranked if r.verdict == "hold"]
    waiting = [f"{WAITING_FOR_STAGE} {s}" for s in missing]
    if failing:
        verdict = "fail"
    elif holding or waiting or outlier_reasons:
        verdict = "hold"
    else:
        verdict = "pass"
    reasons = tuple(dict.fromkeys(r for r in [*failing, *holding, *outlier_reasons, *waiting] if r))
    return CellDecision(verdict, reasons, hazards, missing)
