"""Invented judged cells for the certificate tests and the golden snapshots.

Every name, lot and number here is invented. The grading discharge is built from
published open-circuit-potential fits (LFP from Safari &
Delacourt 2011, graphite from Chen et al. 2020, with an illustrative electrode
balance) so the plots look like a real LFP/graphite cell; plateaus, peaks and
metrics are invented to match that curve roughly.
"""

from __future__ import annotations

import contextlib
import datetime
import hashlib
import importlib
import sys
import types
from collections.abc import Iterator
from typing import NamedTuple

import numpy as np

from pipeline.acceptance.results import CellResult, CheckResult, Outcome, RuleSetRef, Verdict, VerdictKind
from pipeline.acceptance.rules import CellType, Hazard, Severity, Window
from pipeline.demo.ocp import lfp_graphite_cell
from pipeline.model import AccuracyClass, CellMetrics, Curve, CycleMetrics, Note, Plateau, SourceRef

NOMINAL_AH = 20.0
GRADING_AH = 20.13
CUTOFF_V = 2.5
IR_DROP_V = 0.02  # invented: 1 mOhm-ish cell at a C/5-like current
ANALYSED_AT = datetime.datetime(2026, 3, 2, 10, 15, 0, tzinfo=datetime.UTC)
SOFTWARE_VERSION = "0.1.0"  # fixed so snapshots do not move with releases
SOURCE_NAME = "DEMO-LOT-01_DEMO-C0042.csv"
INPUT_SHA256 = hashlib.sha256(b"invented cycle file DEMO-C0042").hexdigest()
RULES_SHA256 = hashlib.sha256(b"invented rule set demo-lfp r3").hexdigest()


def full_cell_ocv_v(soc: np.ndarray) -> np.ndarray:
    """Synthetic LFP/graphite full cell, our own electrode map (illustrative):
    the Safari & Delacourt 2011 LFP fit minus the Chen et al. 2020 graphite fit."""
    return lfp_graphite_cell(soc)


def soc_at_cutoff() -> float:
    """State of charge where the loaded voltage reaches the cut-off voltage."""
    fine = np.linspace(1.0, 0.0, 20001)
    v_fine = full_cell_ocv_v(fine) - IR_DROP_V
    return float(np.interp(CUTOFF_V, v_fine[::-1], fine[::-1]))


def grading_curve(points: int = 1001) -> Curve:
    """V against discharged capacity in %, from full (SOC 1) down to the cut-off voltage."""
    soc_end = soc_at_cutoff()
    soc = np.linspace(1.0, soc_end, points)
    q_pct = (1.0 - soc) / (1.0 - soc_end) * 100.0
    return Curve(q_pct, full_cell_ocv_v(soc) - IR_DROP_V)


def ica_curve(curve: Curve, capacity_ah: float = GRADING_AH, bin_v: float = 0.005) -> Curve:
    """dQ/dV on a uniform voltage grid, lightly smoothed (common practice)."""
    v_grid = np.arange(2.60, 3.45, bin_v)
    q_ah = curve.x / 100.0 * capacity_ah
    q_grid = np.interp(v_grid, curve.y[::-1], q_ah[::-1])
    dq_dv = -np.gradient(q_grid, v_grid)
    kernel = np.exp(-0.5 * (np.arange(-6, 7) / 2.5) ** 2)
    return Curve(v_grid, np.convolve(dq_dv, kernel / kernel.sum(), mode="same"))


PLATEAUS = (
    Plateau(7.5, 25.4, 3.320, 0.179 * GRADING_AH),
    Plateau(34.0, 62.0, 3.279, 0.280 * GRADING_AH),
    Plateau(64.0, 79.0, 3.226, 0.150 * GRADING_AH),
)
ICA_PEAKS_V = (3.200, 3.275, 3.320)

CYCLES = (
    CycleMetrics(1, 22.05, 20.11, 20.11 / 22.05, 64.27, 3.196, 3.650, 2.500, 2710.0, 29.8),
    CycleMetrics(2, 20.31, 20.15, 20.15 / 20.31, 64.49, 3.201, 3.651, 2.500, 1322.0, 30.6),
    CycleMetrics(3, 20.21, 20.13, 20.13 / 20.21, 64.52, 3.205, 3.651, 2.500, 1288.0, 31.4),
)


class _Rule(NamedTuple):
    id: str
    metric: str
    low: float | None
    high: float | None
    severity: Severity
    hazard: Hazard | None
    message: str


RULES = (
    _Rule("first-cycle-efficiency", "first_cycle_efficiency", 0.85, 0.96, Severity.REJECT, None,
          "first-cycle efficiency outside its window"),
    _Rule("irreversible-capacity", "irreversible_capacity_Ah", None, 2.6, Severity.REVIEW, None,
          "first-cycle loss higher than usual"),
    _Rule("grading-capacity", "grading_capacity_Ah", 19.4, 21.0, Severity.REJECT,
          Hazard.ABNORMAL_CAPACITY, "grading capacity outside its window"),
    _Rule("grading-energy", "grading_energy_Wh", 60.0, None, Severity.REVIEW, None,
          "grading energy low"),
    _Rule("mean-voltage", "grading_mean_voltage_V", 3.15, 3.30, Severity.REVIEW, None,
          "mean discharge voltage outside its window"),
    _Rule("dcir", "dcir_mOhm", None, 3.0, Severity.REVIEW, None, "DC internal resistance high"),
    _Rule("self-discharge", "rest_voltage_drift_mV_per_h", -2.0, None, Severity.REJECT,
          Hazard.INTERNAL_SHORT, "voltage falls too fast at rest"),
    _Rule("max-charge-voltage", "max_charge_voltage_V", None, 3.70, Severity.REJECT,
          Hazard.OVER_VOLTAGE, "charged above the voltage limit"),
    _Rule("max-temperature", "max_temperature_C", None, 45.0, Severity.REJECT,
          Hazard.OVER_TEMPERATURE, "cell ran too hot"),
    _Rule("main-plateau-length", "main_plateau_length_pct", 20.0, None, Severity.REVIEW, None,
          "main plateau too short"),
    _Rule("plateau-count", "plateau_count", 2, 4, Severity.REVIEW, None,
          "unexpected number of plateaus"),
    _Rule("grading-efficiency", "grading_coulombic_efficiency", 0.98, 1.005, Severity.REJECT,
          Hazard.LITHIUM_PLATING, "grading coulombic efficiency outside its window"),
)

GOOD_VALUES: dict[str, float | None] = {
    "first_cycle_efficiency": 20.11 / 22.05,
    "irreversible_capacity_Ah": 22.05 - 20.11,
    "grading_capacity_Ah": GRADING_AH,
    "grading_energy_Wh": 64.52,
    "grading_mean_voltage_V": 3.205,
    "grading_coulombic_efficiency": 20.13 / 20.21,
    "grading_cv_duration_s": 1288.0,
    "dcir_mOhm": 1.82,
    "rest_voltage_drift_mV_per_h": -0.42,
    "max_charge_voltage_V": 3.651,
    "min_discharge_voltage_V": 2.500,
    "max_temperature_C": 31.4,
    "cycle_count": 3,
    "plateau_count": 3,
    "main_plateau_voltage_V": 3.279,
    "main_plateau_length_pct": 28.0,
    "total_plateau_length_pct": 60.9,
}

# Expanded uncertainties U (k = 2) of the invented metrics, of the sizes the LFP reference cell
# shows through a channel of the default class (the counts have none).
GOOD_U: dict[str, float] = {
    "first_cycle_efficiency": 0.0013,
    "irreversible_capacity_Ah": 0.0062,
    "grading_capacity_Ah": 0.012,
    "grading_energy_Wh": 0.071,
    "grading_mean_voltage_V": 0.0030,
    "grading_coulombic_efficiency": 0.0014,
    "grading_cv_duration_s": 3.6,
    "dcir_mOhm": 0.11,
    "rest_voltage_drift_mV_per_h": 0.13,
    "max_charge_voltage_V": 0.0034,
    "min_discharge_voltage_V": 0.0030,
    "max_temperature_C": 1.2,
    "main_plateau_voltage_V": 0.0030,
    "main_plateau_length_pct": 0.19,
    "total_plateau_length_pct": 0.31,
}
# The invented channel's class: the default, on a declared 50 A range.
ACCURACY = AccuracyClass(current_range_a=50.0, source="invented channel class")


def _checks(
    values: dict[str, float | None], not_judged: tuple[str, ...] = ()
) -> tuple[CheckResult, ...]:
    rows = []
    for rule in RULES:
        window = Window(rule.low, rule.high)
        value = values[rule.metric]
        if value is None or rule.metric in not_judged:
            outcome = Outcome.NOT_JUDGED
        else:
            outcome = Outcome.IN_WINDOW if window.contains(value) else Outcome.OUT_OF_WINDOW
        rows.append(CheckResult(rule.id, rule.metric, value, window, outcome, rule.severity,
                                rule.hazard, rule.message, GOOD_U.get(rule.metric)))
    return tuple(rows)


def make_result(
    values: dict[str, float | None],
    kind: VerdictKind,
    reasons: tuple[str, ...] = (),
    notes: tuple[Note, ...] = (),
    metadata: dict[str, str] | None = None,
    not_judged: tuple[str, ...] = (),
) -> CellResult:
    checks = _checks(values, not_judged)
    hazards = tuple(
        c.hazard for c in checks
        if c.hazard and c.outcome is Outcome.OUT_OF_WINDOW and c.severity is Severity.REJECT
    ) if kind is VerdictKind.FAIL else ()
    curve = grading_curve()
    meta = {
        "cell_id": "DEMO-C0042",
        "lot": "DEMO-LOT-01",
        "cell_type": "DEMO-LFP-20A",
        "channel": "B-07",
        "station": "FORM-STATION-2",
        "program": "demo-formation-v3",
        "started_at": "2026-02-27T08:00:00Z",
        "tray": "T-118",
    }
    meta.update(metadata or {})
    return CellResult(
        source_name=SOURCE_NAME,
        input_sha256=INPUT_SHA256,
        metadata=meta,
        cell_type=CellType("DEMO-LFP-20A", NOMINAL_AH, 2.0, 3.8, "invented LFP/graphite cell"),
        rule_set=RuleSetRef("demo-lfp", "3", RULES_SHA256, "rules/demo_lfp.toml"),
        metrics=CellMetrics(
            values=values,
            cycles=CYCLES,
            plateaus=PLATEAUS,
            ica_peaks_v=ICA_PEAKS_V,
            grading_curve=curve,
            ica_curve=ica_curve(curve),
            uncertainty={k: u for k, u in GOOD_U.items() if values.get(k) is not None},
        ),
        verdict=Verdict(kind, checks, hazards, reasons),
        notes=notes,
        analysed_at=ANALYSED_AT,
        software_version=SOFTWARE_VERSION,
        accuracy=ACCURACY,
    )


def pass_result(**metadata: str) -> CellResult:
    note = Note("time_duplicates", "2 rows repeated an earlier time stamp and were dropped.",
                SourceRef(SOURCE_NAME, 1204))
    return make_result(dict(GOOD_VALUES), VerdictKind.PASS, notes=(note,), metadata=metadata)


def fail_result(**metadata: str) -> CellResult:
    values = dict(GOOD_VALUES)
    values.update({
        "rest_voltage_drift_mV_per_h": -6.84,
        "max_temperature_C": 52.3,
        "grading_capacity_Ah": 18.62,
    })
    reasons = (
        "self-discharge: voltage falls too fast at rest (-6.84 mV/h, window >= -2.00 mV/h)",
        "max-temperature: cell ran too hot (52.3 °C, window <= 45.0 °C)",
        "grading-capacity: grading capacity outside its window (18.62 Ah, window 19.40-21.00 Ah)",
    )
    return make_result(values, VerdictKind.FAIL, reasons, metadata=metadata)


def hold_result(**metadata: str) -> CellResult:
    values = dict(GOOD_VALUES)
    values.update({"dcir_mOhm": None, "grading_mean_voltage_V": 3.121})
    note = Note("no_rest_before_discharge", "No rest before the last discharge: DCIR not measured.",
                SourceRef(SOURCE_NAME, 5120), blocks=("dcir_mOhm",))
    reasons = (
        "dcir: not judged (no value)",
        "mean-voltage: mean discharge voltage outside its window (3.121 V, window 3.150-3.300 V)",
    )
    return make_result(values, VerdictKind.HOLD, reasons, notes=(note,), metadata=metadata)


class Caution(NamedTuple):
    title: str
    text: str


def stand_in_hazards() -> types.ModuleType:
    """A test-only stand-in with the hazards API (general_caution, HANDLING, DATA_CHECK_NOTICE, ...)."""
    module = types.ModuleType("pipeline.report.hazards")
    module.GENERAL_CAUTION = (  # type: ignore[attr-defined]
        "Test general caution: follow the site's procedures, local codes and qualified personnel."
    )
    module.general_caution = lambda family: module.GENERAL_CAUTION  # type: ignore[attr-defined]
    module.HANDLING = (  # type: ignore[attr-defined]
        "Test handling: quarantine the cell as the site's procedure says."
    )
    module.DATA_CHECK_NOTICE = (  # type: ignore[attr-defined]
        "Test notice: this certificate is a data check, not a safety assessment."
    )
    module.CAUTIONS = {  # type: ignore[attr-defined]
        h: Caution(f"Test caution title {h.value}", f"Test caution text for {h.value}.")
        for h in Hazard
    }
    return module


def real_hazards() -> types.ModuleType | None:
    """pipeline.report.hazards when it exists, else None."""
    try:
        return importlib.import_module("pipeline.report.hazards")
    except ModuleNotFoundError:
        return None


@contextlib.contextmanager
def hazards_in_use(module: types.ModuleType) -> Iterator[types.ModuleType]:
    """Make ``import pipeline.report.hazards`` give ``module`` for the duration, then restore."""
    missing = object()
    before = sys.modules.get("pipeline.report.hazards", missing)
    sys.modules["pipeline.report.hazards"] = module
    try:
        yield module
    finally:
        if before is missing:
            del sys.modules["pipeline.report.hazards"]
        else:
            sys.modules["pipeline.report.hazards"] = before  # type: ignore[assignment]
