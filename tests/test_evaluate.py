"""The judge: verdicts from data-file cases, invariants under widening and narrowing, cautions."""

from __future__ import annotations

import dataclasses
import math
import tomllib
from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.acceptance.results import Outcome, VerdictKind
from pipeline.acceptance.rules import CellType, Hazard, Rule, RuleSet, Severity, Window
from pipeline.judge.evaluate import decision_line, evaluate, summarise
from pipeline.judge.metricdefs import METRIC_NAMES
from pipeline.judge.program import INCOMPLETE
from pipeline.model import CellMetrics, Note, PlateauSettings
from pipeline.report import hazards
from pipeline.rulebook.book import load_rule_set
from tests.conftest import DATA_DIR, REPO

CASES = DATA_DIR / "judge_cases"
CASE_NAMES = sorted(p.stem for p in CASES.glob("*.toml"))
CASE_KEYS = {"description", "rules", "cell_type", "metrics", "notes", "expected"}
EXPECTED_KEYS = {"verdict", "hazards", "reasons", "outcomes", "checks"}


def _metrics(values: dict[str, float | None], notes: tuple[Note, ...] = ()) -> CellMetrics:
    return CellMetrics(values, (), (), (), notes=notes)


def _load_case(name: str) -> dict[str, Any]:
    """Read one judge case and check it for typos, so a misspelt key cannot weaken a test."""
    case = tomllib.loads((CASES / f"{name}.toml").read_text(encoding="utf-8"))
    assert set(case) <= CASE_KEYS, set(case) - CASE_KEYS
    assert set(case["expected"]) <= EXPECTED_KEYS, set(case["expected"]) - EXPECTED_KEYS
    assert set(case["metrics"]) <= set(METRIC_NAMES), set(case["metrics"]) - set(METRIC_NAMES)
    return case


# ---------------------------------------------------------------- cases as data


def test_there_are_judge_cases_for_every_shipped_rule_file_and_every_verdict() -> None:
    cases = [_load_case(n) for n in CASE_NAMES]
    assert {c["rules"] for c in cases} >= {
        f"rules/{p.name}" for p in (REPO / "rules").glob("*.toml")
    }
    assert {c["expected"]["verdict"] for c in cases} == {"pass", "hold", "fail"}


@pytest.mark.parametrize("name", CASE_NAMES)
def test_judge_case(name: str) -> None:
    case = _load_case(name)
    rules_path = REPO / case["rules"]
    rule_set = load_rule_set(rules_path.read_text(encoding="utf-8"), case["rules"])
    cell_type = rule_set.cell_type(case["cell_type"])
    assert cell_type is not None
    notes = tuple(
        Note(n["code"], n["text"], blocks=tuple(n.get("blocks", ()))) for n in case.get("notes", ())
    )
    verdict = evaluate(rule_set, cell_type, _metrics(case["metrics"]), notes)
    expected = case["expected"]
    assert verdict.kind.value == expected["verdict"]
    assert [h.value for h in verdict.hazards] == expected["hazards"]
    if "reasons" in expected:
        assert list(verdict.reasons) == expected["reasons"]
    by_id = {c.rule_id: c for c in verdict.checks}
    for rule_id, outcome in expected.get("outcomes", {}).items():
        assert by_id[rule_id].outcome.value == outcome, rule_id
    if "checks" in expected:
        assert [c.rule_id for c in verdict.checks] == expected["checks"]


# ---------------------------------------------------------------- single behaviours

CT = CellType("DEMO-T", 20.0, -0.1, 5.0)


def _rule_set(*rules: Rule) -> RuleSet:
    return RuleSet("t", "1", "LFP/graphite", "0" * 64, "t.toml", (CT,), PlateauSettings(), rules)


def test_check_rows_hold_the_resolved_window_without_float_noise() -> None:
    rule = Rule(
        "cap", "grading_capacity_Ah", Window(0.98, 1.12, "nominal_capacity"), Severity.REJECT
    )
    (row,) = evaluate(_rule_set(rule), CT, _metrics({"grading_capacity_Ah": 20.1})).checks
    assert row.window == Window(19.6, 22.4)
    assert (row.value, row.outcome, row.message) == (20.1, Outcome.IN_WINDOW, "")


def test_notes_carried_by_the_metrics_block_too() -> None:
    rule = Rule("d", "dcir_mOhm", Window(None, 8.0), Severity.REJECT)
    note = Note("step_mismatch", "The step column disagrees.", blocks=("dcir_mOhm",))
    verdict = evaluate(_rule_set(rule), CT, _metrics({"dcir_mOhm": 99.0}, (note,)))
    assert verdict.kind is VerdictKind.HOLD
    assert verdict.checks[0].outcome is Outcome.NOT_JUDGED
    assert verdict.checks[0].value == 99.0  # shown, but not trusted


def test_a_note_code_is_named_once_however_often_it_blocks() -> None:
    rule = Rule("d", "dcir_mOhm", Window(None, 8.0), Severity.REJECT)
    twice = Note("time_duplicates", "Rows repeat.", blocks=("dcir_mOhm", "dcir_mOhm"))
    verdict = evaluate(_rule_set(rule), CT, _metrics({"dcir_mOhm": 5.0}), (twice, twice))
    assert verdict.reasons == (
        "dcir_mOhm not judged: Rows repeat.",
    )


def test_a_skipped_check_alone_still_passes() -> None:
    rule = Rule("t", "max_temperature_C", Window(None, 45.0), Severity.REJECT, if_missing="skip")
    verdict = evaluate(_rule_set(rule), CT, _metrics({}))
    assert verdict.kind is VerdictKind.PASS and verdict.reasons == ()
    assert verdict.checks[0].message == (
        "max_temperature_C not measured (the rule set lets this check be left out)."
    )
    assert verdict.left_out == (verdict.checks[0],)
    assert summarise(verdict) == (
        "every check made is in window; not made (the rule set allows it): max_temperature_C"
    )


def test_a_failed_review_check_never_adds_a_hazard() -> None:
    rule = Rule(
        "t",
        "max_temperature_C",
        Window(None, 45.0),
        Severity.REVIEW,
        hazard=Hazard.OVER_TEMPERATURE,
    )
    verdict = evaluate(_rule_set(rule), CT, _metrics({"max_temperature_C": 70.0}))
    assert (verdict.kind, verdict.hazards) == (VerdictKind.HOLD, ())


def test_infinity_is_judged_as_a_value() -> None:
    rule = Rule("v", "max_charge_voltage_V", Window(None, 3.7), Severity.REJECT)
    verdict = evaluate(_rule_set(rule), CT, _metrics({"max_charge_voltage_V": math.inf}))
    assert verdict.kind is VerdictKind.FAIL


# ---------------------------------------------------------------- invariants

METRICS = ("grading_capacity_Ah", "dcir_mOhm", "max_temperature_C", "first_cycle_efficiency")
bound = st.one_of(st.none(), st.floats(-100, 100, allow_nan=False))
widening = st.floats(0, 50, allow_nan=False)


@st.composite
def judged_cells(draw: st.DrawFn) -> tuple[RuleSet, CellMetrics, tuple[Note, ...]]:
    rules = []
    for i in range(draw(st.integers(1, 4))):
        low, high = draw(bound), draw(bound)
        if low is not None and high is not None and low > high:
            low, high = high, low
        rules.append(
            Rule(
                f"r{i}",
                draw(st.sampled_from(METRICS)),
                Window(low, high, draw(st.sampled_from([None, "nominal_capacity"]))),
                draw(st.sampled_from(Severity)),
                draw(st.one_of(st.none(), st.sampled_from(Hazard))),
                if_missing=draw(st.sampled_from(["hold", "skip"])),
            )
        )
    values: dict[str, float | None] = {}
    for metric in METRICS:  # mostly measured, sometimes missing or NaN
        kind = draw(st.integers(0, 9))
        values[metric] = (
            None if kind == 0 else math.nan if kind == 1 else draw(st.floats(-150, 150))
        )
    blocked = draw(st.lists(st.sampled_from(METRICS), max_size=1))
    notes = (Note("n", "a note", blocks=tuple(blocked)),) if blocked else ()
    return _rule_set(*rules), _metrics(values), notes


def _change_windows(rule_set: RuleSet, by: list[float], sign: float) -> RuleSet:
    """Move every bound outward (sign +1) or inward (sign -1) by a non-negative amount."""
    rules = []
    for rule, step in zip(rule_set.rules, by, strict=False):
        w = rule.window
        low = None if w.low is None else w.low - sign * step
        high = None if w.high is None else w.high + sign * step
        if low is not None and high is not None and low > high:  # narrowed past each other
            # to the middle of the window as it was (the middle of the moved bounds can fall
            # outside it: 3.4e-252 narrowed by 1 each way is (1.0 + -1.0) / 2 = 0.0)
            assert w.low is not None and w.high is not None
            low = high = w.low / 2 + w.high / 2
        rules.append(dataclasses.replace(rule, window=Window(low, high, w.relative_to)))
    return dataclasses.replace(rule_set, rules=tuple(rules))


@settings(max_examples=200, deadline=None)
@given(judged_cells(), st.lists(widening, min_size=6, max_size=6))
def test_widening_windows_never_turns_a_pass_into_hold_or_fail(
    cell: tuple[RuleSet, CellMetrics, tuple[Note, ...]], by: list[float]
) -> None:
    rule_set, metrics, notes = cell
    if evaluate(rule_set, CT, metrics, notes).kind is VerdictKind.PASS:
        wider = _change_windows(rule_set, by, +1)
        assert evaluate(wider, CT, metrics, notes).kind is VerdictKind.PASS


@settings(max_examples=200, deadline=None)
@given(judged_cells(), st.lists(widening, min_size=6, max_size=6))
def test_narrowing_windows_never_turns_a_fail_into_pass_or_hold(
    cell: tuple[RuleSet, CellMetrics, tuple[Note, ...]], by: list[float]
) -> None:
    rule_set, metrics, notes = cell
    if evaluate(rule_set, CT, metrics, notes).kind is VerdictKind.FAIL:
        narrower = _change_windows(rule_set, by, -1)
        assert evaluate(narrower, CT, metrics, notes).kind is VerdictKind.FAIL


@settings(max_examples=200, deadline=None)
@given(judged_cells())
def test_verdict_agrees_with_its_check_rows(
    cell: tuple[RuleSet, CellMetrics, tuple[Note, ...]],
) -> None:
    rule_set, metrics, notes = cell
    verdict = evaluate(rule_set, CT, metrics, notes)
    out = [c for c in verdict.checks if c.outcome is Outcome.OUT_OF_WINDOW]
    rejected = [c for c in out if c.severity is Severity.REJECT]
    assert (verdict.kind is VerdictKind.FAIL) == bool(rejected)
    assert set(verdict.hazards) == {c.hazard for c in rejected if c.hazard}
    assert list(verdict.hazards) == sorted(verdict.hazards, key=list(Hazard).index)
    # one reason per distinct message of a check out of window or not made (two checks on
    # one unmeasured metric say the same thing once)
    assert verdict.reasons == tuple(
        dict.fromkeys(
            c.message
            for c in verdict.checks
            if c.outcome in (Outcome.OUT_OF_WINDOW, Outcome.NOT_JUDGED)
        )
    )
    for check in out:  # a row's value really lies outside its absolute window
        assert check.value is not None and not check.window.contains(check.value)


# ---------------------------------------------------------------- cautions


def test_every_hazard_has_a_caution_and_the_handling_printed_with_them_defers_to_the_site() -> None:
    assert set(hazards.CAUTIONS) == set(Hazard)
    for caution in hazards.CAUTIONS.values():
        assert caution.title and caution.text.endswith(".")
    # printed once after the hazards' own cautions (certificate and mail)
    assert "site" in hazards.HANDLING and "do not" in hazards.HANDLING.lower()
    assert "quarantine" in hazards.HANDLING


def test_general_caution_defers_to_procedures_codes_authority_and_qualified_people() -> None:
    text = hazards.GENERAL_CAUTION
    for words in (
        "site's procedures",
        "local codes",
        "authority having jurisdiction",
        "qualified personnel",
        "Do not puncture, crush or open",
    ):
        assert words in text


def test_data_check_notice_says_it_is_not_a_safety_assessment() -> None:
    assert "data check, not a safety assessment" in hazards.DATA_CHECK_NOTICE


def test_every_hazard_a_shipped_rule_file_names_has_a_caution() -> None:
    for path in (REPO / "rules").glob("*.toml"):
        rule_set = load_rule_set(path.read_text(encoding="utf-8"), path.name)
        assert {r.hazard for r in rule_set.rules if r.hazard} <= set(hazards.CAUTIONS)


def test_case_files_name_existing_rule_files() -> None:
    """Judge cases name their rule file relative to the repository root."""
    for name in CASE_NAMES:
        assert (REPO / _load_case(name)["rules"]).is_file(), name


def test_the_decision_line_names_the_deciding_checks_with_value_and_bound() -> None:
    rules = (
        Rule("capacity", "grading_capacity_Ah", Window(19.0, 22.0), Severity.REJECT),
        Rule("dcir", "dcir_mOhm", Window(None, 8.0), Severity.REJECT, Hazard.INTERNAL_SHORT),
        Rule("drift", "rest_voltage_drift_mV_per_h", Window(-0.5, None), Severity.REVIEW),
    )
    rs = _rule_set(*rules)
    failed = evaluate(rs, CT, _metrics({"grading_capacity_Ah": 18.21, "dcir_mOhm": 9.5,
                                        "rest_voltage_drift_mV_per_h": -1.0}))
    # only the reject checks decide a fail; the review finding is on the certificate
    assert decision_line(failed) == (
        "grading_capacity_Ah 18.21 Ah < 19.00 Ah (reject); dcir_mOhm 9.50 mOhm > 8.00 mOhm (reject)"
    )
    held = evaluate(rs, CT, _metrics({"grading_capacity_Ah": 20.0, "rest_voltage_drift_mV_per_h": -1.0}))
    assert decision_line(held) == (
        "dcir_mOhm not measured; rest_voltage_drift_mV_per_h \N{MINUS SIGN}1.00 mV/h < \N{MINUS SIGN}0.50 mV/h (review)"
    )
    cut = Note(INCOMPLETE, "program incomplete: record ends in cycle 2's charge",
               blocks=("grading_capacity_Ah", "dcir_mOhm", "rest_voltage_drift_mV_per_h"))
    held = evaluate(rs, CT, _metrics({}), (cut,))
    assert held.kind is VerdictKind.HOLD
    assert decision_line(held, (cut,)) == "program incomplete: record ends in cycle 2's charge"
