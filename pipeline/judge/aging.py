"""A cell's aging stage judged: its open-circuit-voltage readings -> K-value -> the aging checks.

Pure: readings and a rule set in, a verdict out. The K-value is the OCV drop per day
from the first to the last reading (kvalue.py), corrected for temperature when the rule
set gives a coefficient; readings too close together, or a reading without the
temperature a correction needs, leave ``k_value_mV_per_day`` not measured, and a check
on it then holds the cell with that reason: it is never counted as in window.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

from pipeline.judge.evaluate import evaluate
from pipeline.judge.kvalue import KValue, NotMade, k_value
from pipeline.model import CellMetrics, CellType, Note, RuleSet, Verdict
from pipeline.read.readings import Reading

K_VALUE = "k_value_mV_per_day"


@dataclass(frozen=True, slots=True)
class AgingResult:
    """The aging stage of one cell: its metrics, the K-value (or why not) and the verdict."""

    cell_id: str
    values: dict[str, float | None]
    k: KValue | NotMade
    verdict: Verdict
    notes: tuple[Note, ...]


def aging_values(
    readings: Sequence[Reading], rule_set: RuleSet
) -> tuple[dict[str, float | None], KValue | NotMade, tuple[Note, ...]]:
    """The aging metrics of one cell's readings, its K-value record and the notes on them."""
    settings = rule_set.aging
    k = k_value(
        readings,
        min_days=settings.min_days,
        temperature_coefficient_mV_per_K=settings.temperature_coefficient_mv_per_k,
        reference_C=settings.reference_c,
    )
    last = max(readings, key=lambda r: (r.at, r.line)) if readings else None
    values: dict[str, float | None] = {
        K_VALUE: k.mv_per_day if isinstance(k, KValue) else None,
        "aging_ocv_V": last.ocv_v if last is not None else None,
        "aging_acir_mOhm": last.acir_mohm if last is not None else None,
    }
    notes: tuple[Note, ...] = ()
    if isinstance(k, NotMade):
        notes = (Note("k_value_not_made", k.reason, blocks=(K_VALUE,)),)
    elif k.note:
        notes = (Note("k_value", k.note),)
    return values, k, notes


def judge_aging(readings: Sequence[Reading], rule_set: RuleSet, cell_type: CellType) -> AgingResult:
    """Judge one cell's aging readings against the rule set's checks on aging metrics."""
    if not readings:
        raise ValueError("a cell's aging stage needs at least one reading")
    values, k, notes = aging_values(readings, rule_set)
    metrics = CellMetrics(values, (), (), ())
    verdict = evaluate(rule_set, cell_type, metrics, notes, stages=("aging",))
    return AgingResult(readings[0].cell_id, values, k, verdict, notes)
