"""The program's grading cycle: by its step number, by the cycle count, and records that do not fit."""

from __future__ import annotations

import functools

from pipeline.demo import cycletext, lots
from pipeline.judge.program import INCOMPLETE, MISMATCH, choose_grading
from pipeline.judge.segmentation import split_steps
from pipeline.model import Program, Segmentation, Trace

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
