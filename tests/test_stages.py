"""A cell's record as two cycle files, its formation and its grading, judged one by one.

Invented demo cells are simulated once (pipeline.demo.synth), read through noisy cycler
channels sampled every 1 to 10 s, and written both as one file of the whole program and
as a formation file and a grading file (pipeline.demo.stages). The two stage files must
give the whole file's metrics, and the worst of their two verdicts must be the whole
file's; a defect fails the stage whose record shows it; the program's end is judged per
stage.
"""

from __future__ import annotations

import dataclasses
import datetime
import functools
import json

import jsonschema
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pipeline.acceptance.results import CellResult, Outcome, VerdictKind
from pipeline.acceptance.rules import Program
from pipeline.demo import cycletext, synth
from pipeline.demo import lots as demo
from pipeline.demo.channel import NOISELESS, Channel
from pipeline.demo.stages import StageRecords, split_stages, stage_metadata
from pipeline.errors import InputError
from pipeline.judge.evaluate import evaluate
from pipeline.judge.metricdefs import judged_on
from pipeline.judge.program import INCOMPLETE
from pipeline.judge.record_end import looks_cut
from pipeline.read.profile import load_profile
from pipeline.report.certificate import build_context
from pipeline.report.result import schema_text, to_document
from pipeline.rulebook.book import RuleBook, load_rules_dir
from pipeline.runner import judge
from pipeline.shipped import RULES_DIR

RULEBOOK = load_rules_dir(RULES_DIR)
# The same rules with the channel's zero offset left in the current: for the checks that the
# split itself keeps every sample's charge (each file estimates its own offset, so with the
# offset taken out two files agree within that estimate's uncertainty, not to the last bit)
AS_RECORDED = RuleBook(tuple(
    dataclasses.replace(rule_set, zero_offset="as recorded") for rule_set in RULEBOOK.rule_sets
))
ANALYSED_AT = datetime.datetime(2026, 3, 6, 9, 0, tzinfo=datetime.UTC)
BY_ID = {c.cell_id: c for c in demo.ALL_DEMO_CELLS}
ORDER = {VerdictKind.PASS: 0, VerdictKind.HOLD: 1, VerdictKind.FAIL: 2}


def channel(nominal_ah: float, noisy: bool) -> Channel:
    """A channel of 2.5 C range: 0.05 % (noisy: 0.1 %) of range current noise, 0.01 % (0.02 %)
    offset at rest, 1 mV voltage noise, a spike at each step change, as tests/test_realistic.py
    reads the demo lots (typical cycler accuracy classes: from memory, medium)."""
    noise, offset = (1e-3, 2e-4) if noisy else (5e-4, 1e-4)
    return Channel(2.5 * nominal_ah, noise, offset, 1e-3, 0.05, 0.3, 0.005)


@functools.cache
def recorded(cell_id: str, interval_s: float, noisy: bool) -> synth.SimulatedRecord:
    """The demo cell sampled every ``interval_s``, read through a typical or a noisy channel."""
    cell = BY_ID[cell_id]
    rng = demo._seed_for(cell, 2026)
    recipe = dataclasses.replace(
        demo.demo_recipe(cell, rng), channel=NOISELESS, sample_interval_s=interval_s
    )
    clean = synth.simulate_formation(recipe, rng)
    return synth.with_channel(clean, channel(recipe.nominal_capacity_ah, noisy), rng)


def file_bytes(record: synth.SimulatedRecord, cell_id: str, stage: str | None = None) -> bytes:
    metadata = demo.demo_metadata(BY_ID[cell_id])
    if stage is not None:
        metadata = stage_metadata(metadata, stage)
    return cycletext.to_cycle_file(record, metadata).encode("utf-8")


def judged(
    data: bytes, name: str = "c.csv", rulebook: RuleBook = RULEBOOK, **kwargs: object
) -> CellResult:
    return judge(data, name, rulebook, analysed_at=ANALYSED_AT, **kwargs)  # type: ignore[arg-type]


@dataclasses.dataclass(frozen=True)
class Judged:
    whole: CellResult
    formation: CellResult
    grading: CellResult
    split: StageRecords


@functools.cache
def judged_three_ways(
    cell_id: str, interval_s: float, noisy: bool, rulebook: RuleBook = RULEBOOK
) -> Judged:
    record = recorded(cell_id, interval_s, noisy)
    split = split_stages(record, np.random.default_rng(7))
    return Judged(
        judged(file_bytes(record, cell_id), rulebook=rulebook),
        judged(file_bytes(split.formation, cell_id, "formation"), "f.csv", rulebook=rulebook),
        judged(file_bytes(split.grading, cell_id, "grading"), "g.csv", rulebook=rulebook),
        split,
    )


# (cell, sampling interval s, noisy channel): normal cells of the three chemistries and a
# defect of each stage, between them 1 to 10 s sampling and both channel classes.
CASES = [
    ("L01-001", 1.0, False),
    ("L01-010", 5.0, True),  # low first-cycle efficiency
    ("L01-011", 10.0, False),  # high DCIR
    ("L01-012", 2.0, True),  # internal short
    ("N02-001", 5.0, True),
    ("NA3-007", 10.0, True),  # sodium plating
]


def rel(a: float | None, b: float | None) -> float:
    assert a is not None and b is not None
    return abs(a / b - 1.0)


def diff(a: float | None, b: float | None) -> float:
    assert a is not None and b is not None
    return abs(a - b)


@pytest.mark.parametrize(("cell_id", "interval_s", "noisy"), CASES)
def test_stage_files_give_the_whole_files_metrics_and_verdict(
    cell_id: str, interval_s: float, noisy: bool
) -> None:
    three = judged_three_ways(cell_id, interval_s, noisy)
    whole, form, grad = (r.metrics.values for r in (three.whole, three.formation, three.grading))
    name = f"{cell_id} at {interval_s:g} s"
    # the accuracy the project holds on noisy records (tests/test_realistic.py,
    # benchmarks/accuracy.py): capacity 0.1 %, first-cycle efficiency 0.002, DCIR 8 %,
    # drift 0.1 mV/h, plateau voltage 3 mV
    assert diff(form["first_cycle_efficiency"], whole["first_cycle_efficiency"]) <= 0.002, name
    # irreversible capacity is charge less discharge: 0.1 % of the charge it is the difference of
    charge = three.whole.metrics.cycles[0].charge_capacity_ah
    assert diff(form["irreversible_capacity_Ah"], whole["irreversible_capacity_Ah"]) <= 0.001 * charge
    assert rel(grad["grading_capacity_Ah"], whole["grading_capacity_Ah"]) <= 0.001, name
    assert rel(grad["grading_energy_Wh"], whole["grading_energy_Wh"]) <= 0.001, name
    assert diff(grad["grading_coulombic_efficiency"], whole["grading_coulombic_efficiency"]) <= 0.002
    assert rel(grad["dcir_mOhm"], whole["dcir_mOhm"]) <= 0.08, name
    assert diff(grad["rest_voltage_drift_mV_per_h"], whole["rest_voltage_drift_mV_per_h"]) <= 0.1
    if whole["main_plateau_voltage_V"] is not None:
        assert diff(grad["main_plateau_voltage_V"], whole["main_plateau_voltage_V"]) <= 0.003, name
    assert grad["plateau_count"] == whole["plateau_count"], name
    # every row of the whole file is in one of the two; the formation file adds a gentle
    # charge to the storage level (0.2 C), which neither sets a new peak nor discharges
    assert max(form["max_charge_voltage_V"] or 0, grad["max_charge_voltage_V"] or 0) == pytest.approx(
        whole["max_charge_voltage_V"], abs=1e-9
    )
    assert min(form["min_discharge_voltage_V"] or 9, grad["min_discharge_voltage_V"] or 9) == pytest.approx(
        whole["min_discharge_voltage_V"], abs=1e-9
    )
    peak = max(form["max_temperature_C"] or 0, grad["max_temperature_C"] or 0)
    assert 0.0 <= peak - (whole["max_temperature_C"] or 0) <= 0.3, name
    assert (form["cycle_count"] or 0) + (grad["cycle_count"] or 0) == whole["cycle_count"] == 2
    # the other stage's metrics are not measured on a stage file, and its checks not listed
    assert grad["first_cycle_efficiency"] is None and form["grading_capacity_Ah"] is None
    for result in (three.formation, three.grading):
        stages = result.stages
        assert {c.metric for c in result.verdict.checks} <= set(judged_on(stages)), name
        assert not any(c.outcome is Outcome.NOT_JUDGED for c in result.verdict.checks), name
    # a cell's verdict over its stages is the worst of them (pipeline/judge/cellverdict.py)
    worst = max(three.formation.verdict.kind, three.grading.verdict.kind, key=ORDER.__getitem__)
    assert worst is three.whole.verdict.kind, name


# Defect -> the stage whose record shows it, and the metric of the failing check.
SHOWN_ON = {
    "L01-010": ("formation", "first_cycle_efficiency"),
    "L01-011": ("grading", "dcir_mOhm"),
    "L01-012": ("grading", "rest_voltage_drift_mV_per_h"),
    "NA3-007": ("grading", "grading_coulombic_efficiency"),
}


@pytest.mark.parametrize("cell_id", sorted(SHOWN_ON))
def test_a_defect_fails_the_stage_that_shows_it(cell_id: str) -> None:
    interval_s, noisy = next((i, n) for c, i, n in CASES if c == cell_id)
    three = judged_three_ways(cell_id, interval_s, noisy)
    stage, metric = SHOWN_ON[cell_id]
    failing = three.formation if stage == "formation" else three.grading
    other = three.grading if stage == "formation" else three.formation
    assert failing.verdict.kind is VerdictKind.FAIL
    out = [c.metric for c in failing.verdict.checks if c.outcome is Outcome.OUT_OF_WINDOW]
    assert metric in out
    assert metric not in {c.metric for c in other.verdict.checks}
    if cell_id != "NA3-007":  # plating lowers every cycle's efficiency, the first one's too
        assert other.verdict.kind is VerdictKind.PASS, other.verdict.reasons


def test_an_over_temperature_cell_fails_on_both_stages() -> None:
    # the fault heats the cell on every charge; max_temperature_C belongs to every cycle file
    three = judged_three_ways("L01-014", 10.0, False)
    for result in (three.whole, three.formation, three.grading):
        failed = [c.metric for c in result.verdict.checks if c.outcome is Outcome.OUT_OF_WINDOW]
        assert result.verdict.kind is VerdictKind.FAIL and "max_temperature_C" in failed


def test_capacity_is_conserved_over_the_split() -> None:
    # The composite trapezoidal rule on the same samples adds up over consecutive ranges
    # (Press et al. 2007, Numerical Recipes, 3rd ed., section 4.1; from memory), and a step's
    # capacity is the integral of its current (Faraday's law), so the formation file's cycle 1
    # plus the grading file's cycles hold the whole file's charge and discharge.
    three = judged_three_ways("L01-001", 1.0, False, AS_RECORDED)
    whole, form, grad = (r.metrics.cycles for r in (three.whole, three.formation, three.grading))
    assert form[0].charge_capacity_ah == pytest.approx(whole[0].charge_capacity_ah, rel=1e-9)
    assert form[0].discharge_capacity_ah == pytest.approx(whole[0].discharge_capacity_ah, rel=1e-9)
    total_charge = form[0].charge_capacity_ah + sum(c.charge_capacity_ah for c in grad)
    total_discharge = (form[0].discharge_capacity_ah or 0) + sum(
        c.discharge_capacity_ah or 0 for c in grad
    )
    assert total_charge == pytest.approx(sum(c.charge_capacity_ah for c in whole), rel=1e-9)
    assert total_discharge == pytest.approx(
        sum(c.discharge_capacity_ah or 0 for c in whole), rel=1e-9
    )


def _identity(result: CellResult) -> list[tuple[str, str]]:
    rows = build_context(result)["identity"]
    assert isinstance(rows, list)
    return rows


def test_results_and_certificates_say_the_stages() -> None:
    three = judged_three_ways("N02-001", 5.0, True)
    validator = jsonschema.Draft202012Validator(json.loads(schema_text()))
    for result, stages in (
        (three.whole, ["formation", "grading"]),
        (three.formation, ["formation"]),
        (three.grading, ["grading"]),
    ):
        document = to_document(result)
        validator.validate(document)
        assert document["stages"] == stages
        assert "stage" not in document["other_metadata"]
    assert ("Stage", "formation and grading") in _identity(three.whole)
    assert build_context(three.whole)["stage_scope"] == ""
    context = build_context(three.formation)
    assert ("Stage", "formation") in _identity(three.formation)
    assert "grading checks are judged on the cell's grading record" in str(context["stage_scope"])


def _cut_at(record: synth.SimulatedRecord, step: int, share: float) -> synth.SimulatedRecord:
    truth = record.step_named(step)
    stop = truth.start + int(share * (truth.stop - truth.start))
    return dataclasses.replace(
        record,
        **{k: getattr(record, k)[:stop] for k in (
            "time_s", "voltage_v", "current_a", "temperature_c", "step", "cycle")},
        steps=tuple(t for t in record.steps if t.start < stop),
    )


def test_a_formation_file_is_never_cut_for_lacking_the_grading() -> None:
    cell_id = "L01-001"
    split = judged_three_ways(cell_id, 1.0, False).split
    whole_formation = file_bytes(split.formation, cell_id, "formation")
    # nor one that ends right after cycle 1's discharge, with no rest or storage charge
    bare = _cut_at(split.formation, 8, 0.0)
    assert bare.step[-1] == 7
    for data in (whole_formation, file_bytes(bare, cell_id, "formation")):
        assert looks_cut(data, "f.csv", RULEBOOK, None) is None
        result = judged(data, "f.csv")
        assert result.verdict.kind is VerdictKind.PASS, result.verdict.reasons
        assert not any(n.code == INCOMPLETE for n in result.notes)


@pytest.mark.parametrize(("stage", "step"), [("grading", 5), ("formation", 7)])
def test_a_stage_file_cut_in_its_discharge_is_held_program_incomplete(stage: str, step: int) -> None:
    # grading file: step 5 is the grading discharge (the whole program's step 12); formation
    # file: step 7 is cycle 1's discharge
    split = judged_three_ways("L01-001", 1.0, False).split
    record = split.grading if stage == "grading" else split.formation
    data = file_bytes(_cut_at(record, step, 0.5), "L01-001", stage)
    result = judged(data, f"{stage}.csv")
    assert result.verdict.kind is VerdictKind.HOLD
    assert result.verdict.reasons[0].startswith("Program incomplete: record ends in cycle 1's discharge")
    if stage == "grading":
        assert looks_cut(data, "g.csv", RULEBOOK, None) is not None


def test_a_grading_file_cut_in_its_final_rest_is_held_and_looks_cut() -> None:
    split = judged_three_ways("L01-001", 1.0, False).split
    data = file_bytes(_cut_at(split.grading, 8, 0.5), "L01-001", "grading")
    assert looks_cut(data, "g.csv", RULEBOOK, None) is not None
    result = judged(data, "g.csv")
    assert result.verdict.kind is VerdictKind.HOLD
    assert "final rest" in result.verdict.reasons[0]


def test_an_unknown_stage_is_a_located_input_error() -> None:
    text = (
        "# cell_id: X1\n# lot: LOT-Z\n# stage: ageing\n# cell_type: DEMO-LFP-20A\n"
        "time_s,voltage_V,current_A\n0,3.3,0\n1,3.3,0\n"
    )
    with pytest.raises(InputError) as caught:
        judged(text.encode(), "x.csv")
    assert caught.value.where is not None and caught.value.where.line == 3
    assert "ageing" in str(caught.value)
    assert "formation, grading, formation+grading" in str(caught.value)


def test_an_import_profile_gives_the_stage_from_the_name_or_as_a_fixed_value() -> None:
    split = judged_three_ways("N02-001", 5.0, True).split
    data = cycletext.to_cycle_file(split.grading, demo.demo_metadata(BY_ID["N02-001"])).encode()
    by_name = load_profile(
        '[file]\nfile_name_pattern = "_(?P<stage>formation|grading)[.]"\n', "stage.toml"
    )
    fixed = load_profile('[metadata]\nstage = "grading"\n', "grading.toml")
    for profile, name in ((by_name, "N02-001_grading.csv"), (fixed, "N02-001.csv")):
        result = judged(data, name, profile=profile)
        assert result.stages == ("grading",)
        assert result.verdict.kind is VerdictKind.PASS, result.verdict.reasons
    wrong = load_profile('[metadata]\nstage = "greding"\n', "wrong.toml")
    with pytest.raises(InputError, match="greding"):
        judged(data, "N02-001.csv", profile=wrong)


def test_cycle_count_is_judged_against_the_stages_share_of_the_program() -> None:
    three = judged_three_ways("N02-001", 5.0, True)
    rule_set, cell_type = RULEBOOK.for_cell_type("DEMO-NMC-5A")
    for result in (three.formation, three.grading):
        check = next(c for c in result.verdict.checks if c.metric == "cycle_count")
        assert check.value == 1 and check.window.low == 1 and check.outcome is Outcome.IN_WINDOW
    # without the program's cycle count a grading file's share is unknown: held, never passed
    unknown = dataclasses.replace(rule_set, program=Program(cycles=None))
    verdict = evaluate(
        unknown, cell_type, three.grading.metrics, three.grading.notes, stages=("grading",)
    )
    check = next(c for c in verdict.checks if c.metric == "cycle_count")
    assert check.outcome is Outcome.NOT_JUDGED and verdict.kind is VerdictKind.HOLD


@functools.cache
def _reference_grading() -> CellResult:
    return judged_three_ways("L01-012", 10.0, True, AS_RECORDED).grading


@settings(max_examples=8, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(share=st.floats(0.02, 0.98))
def test_where_the_split_falls_does_not_change_the_grading_metrics(share: float) -> None:
    record = recorded("L01-012", 10.0, True)
    rest = record.step_named(synth.SPLIT_REST_STEP)
    at = rest.start_s + share * (rest.end_s - rest.start_s)
    split = split_stages(record, np.random.default_rng(3), at_s=at)
    # (the offset left in: where the split falls moves the rest rows each file estimates it from)
    got = judged(file_bytes(split.grading, "L01-012", "grading"), "g.csv", AS_RECORDED)
    want = _reference_grading()
    for metric in judged_on(("grading",)):
        a, b = got.metrics.values[metric], want.metrics.values[metric]
        if metric == "cycle_count":
            assert a == b
        elif b is None:
            assert a is None, metric
        else:
            assert a == pytest.approx(b, rel=1e-9, abs=1e-9), metric
    assert got.verdict.kind is want.verdict.kind


def test_the_demo_writes_a_cell_as_a_formation_file_and_a_grading_file() -> None:
    cell = BY_ID["L01-003"]
    files = demo.demo_stage_files(cell)
    assert list(files) == ["formation", "grading"]
    for stage, data in files.items():
        assert f"# stage: {stage}\n".encode() in data
        result = judged(data, demo.stage_file_name(cell, stage))
        assert result.stages == (stage,) and result.verdict.kind is VerdictKind.PASS
    grading = demo.demo_stage_records(cell).grading
    assert grading.time_s[0] == 0.0 and grading.step[0] == 1 and grading.cycle[0] == 1
    assert demo.demo_stage_files(cell) == files  # the same bytes every time
