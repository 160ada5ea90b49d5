"""The table of cell-level metrics: JSON key, unit and meaning, the one list rules may name.

metrics.py produces exactly these keys; rulebook.py refuses any other ``metric =``
value (with a close-match suggestion); the rules documentation and the result
schema are generated from this table, so the three cannot drift apart.
"""

from __future__ import annotations

from dataclasses import dataclass

# The stages of a cell's making (as acceptance.rules.STAGES): which record a metric is measured on.
FORMATION, AGING, GRADING = "formation", "aging", "grading"
EVERY_CYCLE_FILE: tuple[str, ...] = (FORMATION, GRADING)


@dataclass(frozen=True, slots=True)
class MetricDef:
    name: str  # JSON key, unit in its proper case (docs/metrics.md)
    unit: str  # as printed on the certificate ("" for a plain number or fraction)
    meaning: str
    relative_ok: bool = False  # may a window on it be given relative to nominal capacity?
    # The stages whose records carry it: a check on it is judged on a record of one of them,
    # never on another's. EVERY_CYCLE_FILE: a file of either stage (or both) measures it.
    stages: tuple[str, ...] = EVERY_CYCLE_FILE


METRICS: tuple[MetricDef, ...] = (
    MetricDef(
        "first_cycle_efficiency", "",
        "coulombic efficiency of cycle 1 (initial coulombic efficiency), a fraction",
        stages=(FORMATION,),
    ),
    MetricDef(
        "irreversible_capacity_Ah", "Ah",
        "charge minus discharge capacity of cycle 1", relative_ok=True,
        stages=(FORMATION,),
    ),
    MetricDef(
        "grading_capacity_Ah", "Ah",
        "discharge capacity of the last complete discharge in the file", relative_ok=True,
        stages=(GRADING,),
    ),
    MetricDef(
        "grading_energy_Wh", "Wh", "discharge energy of the grading discharge",
        stages=(GRADING,),
    ),
    MetricDef(
        "grading_mean_voltage_V", "V",
        "mean discharge voltage of the grading discharge (energy / capacity)",
        stages=(GRADING,),
    ),
    MetricDef(
        "grading_coulombic_efficiency", "",
        "coulombic efficiency of the grading cycle, a fraction",
        stages=(GRADING,),
    ),
    MetricDef(
        "grading_cv_duration_s", "s", "time spent in constant-voltage charge in the grading cycle",
        stages=(GRADING,),
    ),
    MetricDef(
        "dcir_mOhm", "mOhm",
        "(V before the last rest-to-discharge transition - V a pulse time into it) / |I|",
        stages=(GRADING,),
    ),
    MetricDef(
        "rest_voltage_drift_mV_per_h", "mV/h",
        "least-squares slope of V over the final rest, after its relaxation time; negative = falling",
        stages=(GRADING,),
    ),
    MetricDef("max_charge_voltage_V", "V", "highest voltage during any charge step"),
    MetricDef("min_discharge_voltage_V", "V", "lowest voltage during any discharge step"),
    MetricDef("max_temperature_C", "°C", "highest cell temperature anywhere in the file"),
    MetricDef("cycle_count", "", "number of cycles (a charge followed by a discharge) found"),
    MetricDef(
        "plateau_count", "", "number of plateaus found on the grading discharge",
        stages=(GRADING,),
    ),
    MetricDef(
        "main_plateau_voltage_V", "V", "median voltage of the longest plateau",
        stages=(GRADING,),
    ),
    MetricDef(
        "main_plateau_length_pct", "%", "length of the longest plateau, % of grading capacity",
        stages=(GRADING,),
    ),
    MetricDef(
        "total_plateau_length_pct", "%", "summed length of all plateaus, % of grading capacity",
        stages=(GRADING,),
    ),
)

METRIC_NAMES: tuple[str, ...] = tuple(m.name for m in METRICS)
BY_NAME: dict[str, MetricDef] = {m.name: m for m in METRICS}

# Measured on the cell's open-circuit-voltage readings during aging, not in a cycle file: a
# check on one of these is judged when the cell's readings are in, never on a cycle file.
AGING_METRICS: tuple[MetricDef, ...] = (
    MetricDef(
        "k_value_mV_per_day", "mV/day",
        "open-circuit voltage drop per day between the first and the last aging reading "
        "(K-value); positive = falling",
        stages=(AGING,),
    ),
    MetricDef(
        "aging_ocv_V", "V", "open-circuit voltage at the last aging reading", stages=(AGING,),
    ),
    MetricDef(
        "aging_acir_mOhm", "mOhm", "AC resistance at the last aging reading", stages=(AGING,),
    ),
)
AGING_METRIC_NAMES: tuple[str, ...] = tuple(m.name for m in AGING_METRICS)

# Every metric a rule file may name: a cycle file's, then the aging readings'.
RULE_METRICS: tuple[MetricDef, ...] = (*METRICS, *AGING_METRICS)
RULE_METRIC_NAMES: tuple[str, ...] = tuple(m.name for m in RULE_METRICS)
RULE_BY_NAME: dict[str, MetricDef] = {m.name: m for m in RULE_METRICS}


def judged_on(stages: tuple[str, ...]) -> tuple[str, ...]:
    """The metrics a record covering ``stages`` is judged on: those of any of its stages.

    >>> judged_on(("formation",))
    ('first_cycle_efficiency', 'irreversible_capacity_Ah', 'max_charge_voltage_V', \
'min_discharge_voltage_V', 'max_temperature_C', 'cycle_count')
    """
    return tuple(m.name for m in RULE_METRICS if set(m.stages) & set(stages))
