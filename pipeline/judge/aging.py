"""A cell's aging stage judged: its open-circuit-voltage readings -> K-value -> the aging checks.

Pure: readings and a rule set in, a verdict out. The K-value is the OCV drop per day
from the first to the last reading (kvalue.py), corrected for temperature when the rule
set gives a coefficient; readings too close together, or a reading without the
temperature a correction needs, leave ``k_value_mV_per_day`` not measured, and a check
on it then holds the cell with that reason: it is never counted as in window.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field

from pipeline.acceptance.results import Verdict
from pipeline.acceptance.rules import CellType, RuleSet
from pipeline.judge.evaluate import evaluate
from pipeline.judge.kvalue import KValue, NotMade, k_value
from pipeline.model import DEFAULT_ACCURACY, CellMetrics, Note
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
    uncertainty: dict[str, float] = field(default_factory=dict)  # U (k = 2) by metric


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


def reading_resolution(volts: float) -> float:
    """The resolution an OCV reading was written to: one unit of its last decimal (V).

    >>> reading_resolution(3.6512), reading_resolution(3.65)
    (0.0001, 0.01)
    """
    text = repr(float(volts))
    decimals = len(text.split(".", 1)[1]) if "." in text and "e" not in text else 6
    return 10.0 ** -min(decimals, 6)


def aging_uncertainty(
    readings: Sequence[Reading], values: dict[str, float | None], k: KValue | NotMade
) -> dict[str, float]:
    """Expanded uncertainties (k = 2) of the aging metrics (JCGM 100:2008).

    The K-value is a difference of two readings of one meter: its gain and offset cancel
    (JCGM 100:2008 5.2.2) and what stays is each reading's resolution, a rectangular
    half-step (JCGM 100:2008 F.2.2.1), over the days between them. The last OCV carries
    the default voltage class (common practice) and its resolution. The AC resistance has
    none: the meter's class is not declared anywhere formgate reads.
    """
    out: dict[str, float] = {}
    # one meter wrote them all: its resolution is the finest step any of them shows (a
    # reading that ends in zeros, 3.6470, reads back as 3.647)
    step_v = min((reading_resolution(r.ocv_v) for r in readings), default=0.0)
    if isinstance(k, KValue) and k.days > 0:
        u_mv = math.sqrt(2.0) * step_v / math.sqrt(12.0) * 1000.0
        out[K_VALUE] = 2.0 * u_mv / k.days
    last_ocv = values.get("aging_ocv_V")
    if last_ocv is not None and readings:
        cls = DEFAULT_ACCURACY
        gain = cls.voltage_pct_of_reading / 100.0 / math.sqrt(3.0)
        offset = cls.voltage_mv / 1000.0 / math.sqrt(3.0)
        step = step_v / math.sqrt(12.0)
        out["aging_ocv_V"] = 2.0 * math.sqrt((last_ocv * gain) ** 2 + offset**2 + step**2)
    return out


def judge_aging(readings: Sequence[Reading], rule_set: RuleSet, cell_type: CellType) -> AgingResult:
    """Judge one cell's aging readings against the rule set's checks on aging metrics."""
    if not readings:
        raise ValueError("a cell's aging stage needs at least one reading")
    values, k, notes = aging_values(readings, rule_set)
    uncertainty = aging_uncertainty(readings, values, k)
    metrics = CellMetrics(values, (), (), (), uncertainty=uncertainty)
    verdict = evaluate(rule_set, cell_type, metrics, notes, stages=("aging",))
    return AgingResult(readings[0].cell_id, values, k, verdict, notes, uncertainty)
