"""Judging a lot that no one on the project drew: PyBaMM's SPMe cells read through noisy channels.

The reference lot (tests/reference/README.md) was simulated once by PyBaMM's single-particle
model with electrolyte (SPMe) with two published parameter sets, Chen et al., J. Electrochem.
Soc. 167 (2020) 080534 (NMC811/graphite, 5 Ah) and Prada et al., J. Electrochem. Soc. 160
(2013) A616 (LFP/graphite, scaled to 20 Ah), running the same formation and grading program as
the demo. Here each cell is resampled every 1, 2 or 5 s, read through a simulated cycler
channel (current noise 0.05 % or 0.1 % of a 2.5 C range, a zero offset of 0.01 % or 0.02 % of
range at rest, 1 mV voltage noise, a spike or ramp at every step change: typical accuracy
classes, from memory, medium), with and without its step column, and judged. Its metrics are
compared with the model's own truths, computed from the noiseless 1 s output.

The shipped windows are placeholders for a customer's specification, drawn for the invented
demo cell types. Three of them are tighter than these published-model cells, which are a
different design, so this test widens exactly those three (see RULE_CHANGES) and keeps every
other window as shipped.
"""

from __future__ import annotations

import dataclasses
import datetime
import functools

import numpy as np
import pytest

from pipeline.acceptance.results import VerdictKind
from pipeline.acceptance.rules import Hazard
from pipeline.demo import cycletext
from pipeline.demo.channel import Channel, add_channel_errors
from pipeline.judge.evaluate import summarise
from pipeline.rulebook.book import RuleBook, load_rule_set
from pipeline.runner import judge
from pipeline.shipped import RULES_DIR
from tests.reference.lot import REFERENCE_CELLS, ReferenceRecord, load_cell, load_truth

ANALYSED_AT = datetime.datetime(2026, 3, 5, 8, 0, tzinfo=datetime.UTC)

# (rule file, text as shipped, text for this lot, why)
RULE_CHANGES = (
    (
        "nmc_graphite.toml",
        "high = 35.0 ",
        "high = 60.0 ",
        # the Chen 2020 cell's 10 s DCIR at full charge and C/3 is 45-48 mOhm in the SPMe,
        # most of it charge transfer at the nearly full graphite (derived, PyBaMM SPMe)
    ),
    (
        "lfp_graphite.toml",
        "high = 8.0 ",
        "high = 22.0 ",
        # the Prada 2013 cell, scaled to 20 Ah, reads about 15 mOhm: 10 s at C/3 from full
        # charge moves its open-circuit voltage on the steep end of the Afshar et al. 2017 fit
    ),
    (
        "lfp_graphite.toml",
        "low = 0.98                 # after formation",
        "low = 0.97                 # after formation",
        # its C/3 grading discharge returns about 2 % less than its 0.2 C charge put in
        # (rate-limited LFP particles in the Prada 2013 set): 0.979, not a defect
    ),
)

EXPECTED: dict[str, tuple[VerdictKind, tuple[Hazard, ...]]] = {
    "nmc_normal_1": (VerdictKind.PASS, ()),
    "nmc_normal_2": (VerdictKind.PASS, ()),
    "nmc_normal_3": (VerdictKind.PASS, ()),
    "nmc_normal_4": (VerdictKind.PASS, ()),
    "nmc_low_capacity": (VerdictKind.FAIL, (Hazard.ABNORMAL_CAPACITY,)),
    "nmc_high_dcir": (VerdictKind.FAIL, ()),
    # a leak of 30 mA also costs 6 % of the grading charge: the efficiency check sees it too
    "nmc_internal_short": (VerdictKind.FAIL, (Hazard.INTERNAL_SHORT, Hazard.LITHIUM_PLATING)),
    "nmc_lithium_plating": (VerdictKind.FAIL, (Hazard.LITHIUM_PLATING,)),
    "lfp_normal_1": (VerdictKind.PASS, ()),
    "lfp_normal_2": (VerdictKind.PASS, ()),
    "lfp_normal_3": (VerdictKind.PASS, ()),
    "lfp_normal_4": (VerdictKind.PASS, ()),
    "lfp_low_first_cycle_efficiency": (VerdictKind.FAIL, ()),
    "lfp_over_temperature": (VerdictKind.FAIL, (Hazard.OVER_TEMPERATURE,)),
    "lfp_missing_plateau": (VerdictKind.FAIL, ()),
}
INTERVALS = (1.0, 2.0, 5.0)


@functools.cache
def rulebook() -> RuleBook:
    texts = {path.name: path.read_text(encoding="utf-8") for path in RULES_DIR.glob("*.toml")}
    for name, shipped, changed in RULE_CHANGES:
        assert texts[name].count(shipped) == 1, (name, shipped)
        texts[name] = texts[name].replace(shipped, changed)
    return RuleBook(tuple(load_rule_set(text, name) for name, text in sorted(texts.items())))


@functools.cache
def resampled(name: str, interval_s: float) -> ReferenceRecord:
    return load_cell(name, interval_s)


def interval_of(name: str) -> float:
    return INTERVALS[REFERENCE_CELLS.index(name) % len(INTERVALS)]


def read_through(name: str, noise: float, offset: float, seed: int) -> ReferenceRecord:
    true = resampled(name, interval_of(name))
    channel = Channel(2.5 * float(true.truth["nominal_capacity_Ah"]), noise, offset)
    volts, amps, temps = add_channel_errors(
        true.voltage_v, true.current_a, true.temperature_c, true.step, channel,
        np.random.default_rng([seed, REFERENCE_CELLS.index(name)]),
    )
    return dataclasses.replace(true, voltage_v=volts, current_a=amps, temperature_c=temps)


def judged(record: ReferenceRecord, steps: bool):  # -> CellResult
    text = cycletext.to_cycle_file(record, record.metadata, include_step_columns=steps)
    return judge(text.encode("utf-8"), f"{record.name}.csv", rulebook(), analysed_at=ANALYSED_AT)


def test_the_lot_carries_the_program_the_rules_describe() -> None:
    truth = load_truth()
    assert set(truth["cells"]) == set(REFERENCE_CELLS) == set(EXPECTED)
    for name in REFERENCE_CELLS:
        assert set(np.unique(resampled(name, 5.0).step)) == set(range(1, 16)), name


@pytest.mark.slow
@pytest.mark.parametrize(
    ("noise", "offset", "steps"),
    [(5e-4, 1e-4, True), (5e-4, 1e-4, False), (1e-3, 2e-4, False)],
    ids=["0.05%-steps", "0.05%-no-steps", "0.1%+offset-no-steps"],
)
def test_physics_lot_through_noisy_channels_gets_every_verdict_and_metric_right(
    noise: float, offset: float, steps: bool
) -> None:
    wrong = []
    for name in REFERENCE_CELLS:
        result = judged(read_through(name, noise, offset, seed=1), steps)
        kind, hazards = EXPECTED[name]
        verdict = result.verdict
        if (verdict.kind, verdict.hazards) != (kind, hazards):
            wrong.append(f"{name}: {verdict.kind.value} {verdict.hazards}: {summarise(verdict)}")
            continue
        truth = load_truth()["cells"][name]["truth"]
        got = result.metrics.values
        where = f"{name} at {interval_of(name):g} s"
        # tolerances of the noisy measurement against the model's noiseless truth
        assert got["grading_capacity_Ah"] == pytest.approx(truth["grading_capacity_Ah"], rel=1e-3), where
        assert got["first_cycle_efficiency"] == pytest.approx(truth["first_cycle_efficiency"], abs=0.002), where
        assert got["grading_coulombic_efficiency"] == pytest.approx(
            truth["grading_coulombic_efficiency"], abs=0.002
        ), where
        assert got["dcir_mOhm"] == pytest.approx(truth["dcir_mOhm"], rel=0.05), where
        assert got["rest_voltage_drift_mV_per_h"] == pytest.approx(
            truth["rest_voltage_drift_mV_per_h"], abs=0.5
        ), where
        assert got["max_temperature_C"] == pytest.approx(truth["max_temperature_C"], abs=0.3), where
    assert wrong == []


@pytest.mark.slow
def test_plateaus_of_the_physics_lot_hold_under_noise() -> None:
    """The same plateau definition gives the same plateaus on the noiseless and the noisy curve."""
    for name in ("lfp_normal_1", "lfp_normal_2", "lfp_normal_3", "lfp_normal_4", "nmc_normal_1"):
        clean = judged(resampled(name, interval_of(name)), True).metrics.values
        noisy = judged(read_through(name, 1e-3, 2e-4, seed=3), False).metrics.values
        assert noisy["plateau_count"] == clean["plateau_count"], name
        if clean["main_plateau_voltage_V"] is None:
            assert noisy["main_plateau_voltage_V"] is None, name
            continue
        assert noisy["main_plateau_voltage_V"] == pytest.approx(clean["main_plateau_voltage_V"], abs=0.003)
        assert noisy["main_plateau_length_pct"] == pytest.approx(clean["main_plateau_length_pct"], abs=2.0)
        # LFP/FePO4 is two-phase: its plateau is the one flat stretch of the curve, at the
        # full-cell potential of about 3.2-3.3 V at C/3 (Padhi et al., J. Electrochem. Soc.
        # 144 (1997) 1188; from memory, medium, for the load)
        assert 3.15 <= noisy["main_plateau_voltage_V"] <= 3.35, name
