"""The program's grading cycle: by its step number, by the cycle count, and records that do not fit."""

from __future__ import annotations

import functools

from pipeline.acceptance.rules import Program
from pipeline.demo import cycletext, lots
from pipeline.judge.program import INCOMPLETE, MISMATCH, choose_grading
from pipeline.judge.segmentation import split_steps
from pipeline.model import Segmentation, Trace

CELL = lots.DEMO_CELLS[0]  # program steps: 7 the formation discharge, 12 the grading discharge


@functools.cache
def _trace() -> Trace:
    return cycletext.to_trace(lots.demo_record(CELL), lots.demo_metadata(CELL), "c.csv")


def _cut(rows: int) -> Trace:
    t = _trace()
    return Trace(t.source, t.metadata, t.time_s[:rows], t.voltage_v[:rows], t.current_a[:rows],
                 t.temperature_c[:rows] if t.temperature_c is not None else None,
                 t.step[:rows] if t.step is not None else None,
                 t.cycle[:rows] if t.cycle is not None else None, t.first_data_line)


def _segment(trace: Trace) -> Segmentation:
    return split_steps(trace, 0.04, 20.0)


def test_the_grading_step_names_the_graded_discharge() -> None:
    trace = _trace()
    choice = choose_grading(trace, _segment(trace), Program(grading_step=12))
    assert choice.cycle is not None and choice.notes == ()
    seg = _segment(trace)
    assert [seg.steps[i].program_step for i in choice.cycle.discharge_steps] == [12]
    # naming the formation discharge instead grades cycle 1
    choice = choose_grading(trace, seg, Program(grading_step=7))
    assert choice.cycle is not None and choice.cycle.index == 1


def test_a_record_without_its_grading_step_is_incomplete() -> None:
    record = lots.demo_record(CELL)
    rows = record.step_named(10).stop  # ends after the grading charge's CV step
    trace = _cut(rows)
    choice = choose_grading(trace, _segment(trace), Program(grading_step=12))
    assert choice.cycle is None
    (note,) = choice.notes
    assert note.code == INCOMPLETE
    assert note.text.endswith("before program step 12 (the grading discharge)")


def test_a_grading_step_that_is_no_discharge_is_not_this_program() -> None:
    trace = _trace()
    choice = choose_grading(trace, _segment(trace), Program(grading_step=11))  # a rest
    assert choice.cycle is None
    (note,) = choice.notes
    assert (note.code, note.text) == (
        MISMATCH,
        "program step 11, which the rule set names as the grading discharge, is a rest in "
        "this record",
    )


def test_more_cycles_than_the_program_grades_the_programs_last_and_says_so() -> None:
    trace = _trace()
    choice = choose_grading(trace, _segment(trace), Program(cycles=1))
    assert choice.cycle is not None and choice.cycle.index == 1
    (note,) = choice.notes
    assert (note.code, note.text) == (
        MISMATCH,
        "the record holds 2 charge-discharge cycles where the program has 1; cycle 1 is graded",
    )


# ---- without a program: the record's own end tells whether it was cut -----------------------


def test_without_a_program_a_whole_record_is_graded_on_its_last_cycle() -> None:
    trace = _trace()
    choice = choose_grading(trace, _segment(trace), Program())
    assert choice.cycle is not None and choice.cycle.index == 2 and choice.notes == ()


def test_without_a_program_a_record_cut_in_its_grading_charge_is_held_not_graded_on_cycle_1() -> None:
    record = lots.demo_record(CELL)
    step = record.step_named(9)  # the grading charge's constant-current step
    trace = _cut((step.start + step.stop) // 2)
    choice = choose_grading(trace, _segment(trace), Program())
    assert choice.cycle is None and choice.first_cycle_finished
    (note,) = choice.notes
    assert note.code == INCOMPLETE
    assert note.text.startswith("program incomplete: record ends in cycle 2's charge (constant")
    assert note.text.endswith("while current still flows: the record was cut short")


def test_without_a_program_a_record_cut_early_in_a_rest_is_held() -> None:
    record = lots.demo_record(CELL)
    rest = record.step_named(11)  # the rest before the grading discharge
    trace = _cut(rest.start + 3)
    choice = choose_grading(trace, _segment(trace), Program())
    assert choice.cycle is None
    (note,) = choice.notes
    assert note.code == INCOMPLETE and "far shorter than the rests between its steps" in note.text


def test_a_rule_set_without_a_program_holds_a_record_cut_in_its_grading_charge() -> None:
    """The whole judge: a plating hazard was once raised on the formation cycle's efficiency."""
    import dataclasses
    import datetime

    from pipeline.acceptance.results import VerdictKind
    from pipeline.rulebook.book import RuleBook, load_rules_dir
    from pipeline.runner import judge
    from pipeline.shipped import RULES_DIR

    shipped = load_rules_dir(RULES_DIR)
    no_program = RuleBook(tuple(dataclasses.replace(r, program=Program()) for r in shipped.rule_sets))
    record = lots.demo_record(CELL)
    step = record.step_named(9)
    rows = (step.start + step.stop) // 2
    text = cycletext.to_cycle_file(record, lots.demo_metadata(CELL), include_step_columns=False)
    lines = text.splitlines(keepends=True)
    header = next(i for i, line in enumerate(lines) if not line.startswith("#"))
    cut = "".join(lines[: header + 1 + rows]).encode("utf-8")
    result = judge(cut, "cut.csv", no_program,
                   analysed_at=datetime.datetime(2026, 3, 2, tzinfo=datetime.UTC))
    assert result.verdict.kind is VerdictKind.HOLD
    assert result.verdict.hazards == ()
    assert result.metrics.values["grading_coulombic_efficiency"] is None
