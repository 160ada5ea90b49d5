"""Which cycle is the program's grading cycle, and whether the record got that far.

Pure: a Trace, its Segmentation and the rule set's Program in, a GradingChoice out.
Real channels abort programs (power loss, channel fault, operator stop), so the last
discharge of a record is not always the grading discharge: a record cut during the
second charge holds only the formation cycle. The grading cycle is the one the
program names: by its step number when the file has a step column and the rule set
gives ``grading_step``, else by the program's cycle count, else the last cycle, when the
record's own end shows that it was not cut (:func:`cut_short`). A
discharge counts as finished when another step follows it, or when it stopped within
a tolerance of the program's end-of-discharge voltage. A record that ends before its
grading discharge is finished is *incomplete*: a note says where it ends, the metrics
that need the missing part are not measured, and the cell is held.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

from pipeline.acceptance.rules import Program
from pipeline.judge.metricdefs import FORMATION, GRADING
from pipeline.model import Cycle, Note, Segmentation, SourceRef, Step, StepKind, StepMode, Trace

INCOMPLETE = "program_incomplete"
MISMATCH = "program_mismatch"
# Notes with these codes hold the cell whatever its checks say (evaluate.py).
HOLDING_CODES: tuple[str, ...] = (INCOMPLETE, MISMATCH)

# Metrics of the grading cycle and of what follows it in the program.
GRADING_METRICS: tuple[str, ...] = (
    "grading_capacity_Ah",
    "grading_energy_Wh",
    "grading_mean_voltage_V",
    "grading_coulombic_efficiency",
    "grading_cv_duration_s",
    "dcir_mOhm",
    "rest_voltage_drift_mV_per_h",
    "plateau_count",
    "main_plateau_voltage_V",
    "main_plateau_length_pct",
    "total_plateau_length_pct",
    "cycle_count",
)
FIRST_CYCLE_METRICS: tuple[str, ...] = ("first_cycle_efficiency", "irreversible_capacity_Ah")


@dataclass(frozen=True, slots=True)
class GradingChoice:
    """The grading cycle (None when the record has none) and whether cycle 1 is whole.

    ``notes`` say why there is no grading cycle, or that the record does not match the
    program; a note with a code in HOLDING_CODES holds the cell.
    """

    cycle: Cycle | None
    first_cycle_finished: bool
    notes: tuple[Note, ...] = ()


def discharge_finished(trace: Trace, steps: tuple[Step, ...], cycle: Cycle, program: Program) -> bool:
    """True when ``cycle`` has a discharge that was not cut off by the end of the record."""
    if not cycle.discharge_steps:
        return False
    last = steps[cycle.discharge_steps[-1]]
    if last.index < len(steps) - 1:
        return True
    if program.end_of_discharge_v is None:
        return False
    end_v = float(trace.voltage_v[last.stop - 1])
    return end_v <= program.end_of_discharge_v + program.end_tolerance_v


def describe_end(trace: Trace, segmentation: Segmentation) -> str:
    """Where a record ends, in words: its last step, that step's cycle, and the time.

    For example "cycle 2's charge (constant voltage, program step 10), 15.3 h after the start".
    """
    steps = segmentation.steps
    if not steps:
        return "a record with no step"
    last = steps[-1]
    details = []
    if last.kind is StepKind.REST:
        before = next((s for s in reversed(steps[:-1]) if s.kind is not StepKind.REST), None)
        what = "a rest" if before is None else f"the rest after a {before.kind.value}"
    else:
        owner = next(
            (c for c in segmentation.cycles if last.index in c.charge_steps + c.discharge_steps),
            None,
        )
        what = f"a {last.kind.value}" if owner is None else f"cycle {owner.index}'s {last.kind.value}"
        details.append("constant voltage" if last.mode is StepMode.CV else "constant current")
    if last.program_step is not None:
        details.append(f"program step {last.program_step}")
    hours = float(trace.time_s[-1] - trace.time_s[0]) / 3600.0
    return what + (f" ({', '.join(details)})" if details else "") + f", {hours:.1f} h after the start"


def _incomplete(
    trace: Trace, segmentation: Segmentation, missing: str, blocks: tuple[str, ...] = GRADING_METRICS
) -> Note:
    return Note(
        INCOMPLETE,
        f"program incomplete: record ends in {describe_end(trace, segmentation)}, {missing}",
        trace.where(len(trace) - 1),
        blocks,
    )


def stage_program(program: Program, stages: tuple[str, ...]) -> Program:
    """The part of ``program`` that a record of ``stages`` holds.

    The whole program for a record of formation and grading. A formation record holds
    the formation cycles (the program's cycles but the last, at least one), perhaps
    followed by a charge to a storage level and a rest, so no final rest is asked of
    it. A grading record holds one cycle, the grading cycle, and the final rest; the
    program's ``grading_step`` numbers a step of the whole program, so it is not looked
    for in a grading record, whose steps its own program numbers.
    """
    if FORMATION in stages and GRADING in stages:
        return program
    if GRADING in stages:
        return dataclasses.replace(program, cycles=1, grading_step=None)
    cycles = None if program.cycles is None else max(1, program.cycles - 1)
    return dataclasses.replace(program, cycles=cycles, grading_step=None, final_rest_s=None)


def check_formation(trace: Trace, segmentation: Segmentation, program: Program) -> GradingChoice:
    """A formation record's cycles against its program (:func:`stage_program` of formation).

    No grading cycle is looked for. A record that ends before the discharge of its last
    formation cycle (or of cycle 1, when the program does not say how many) was
    finished is incomplete; more finished cycles than the program runs is another program.
    """
    steps, cycles = segmentation.steps, segmentation.cycles
    finished = [c for c in cycles if discharge_finished(trace, steps, c, program)]
    first_ok = bool(cycles) and cycles[0] in finished
    expected = program.cycles or 1
    blocks = (*FIRST_CYCLE_METRICS, "cycle_count")
    if len(finished) < expected:
        missing = f"before the discharge of cycle {expected} (the last formation cycle) was finished"
        return _none(first_ok, _incomplete(trace, segmentation, missing, blocks))
    if program.cycles is not None and len(finished) > expected:
        text = (
            f"the formation record holds {len(finished)} charge-discharge cycles where the "
            f"program's formation has {expected}"
        )
        return _none(first_ok, Note(MISMATCH, text, SourceRef(trace.source)))
    return GradingChoice(None, first_ok, ())


def _none(first_ok: bool, note: Note) -> GradingChoice:
    """No grading cycle, and the note that says why."""
    return GradingChoice(None, first_ok, (note,))


def choose_grading(trace: Trace, segmentation: Segmentation, program: Program) -> GradingChoice:
    """The program's grading cycle in ``segmentation``, or notes saying why there is none."""
    steps, cycles = segmentation.steps, segmentation.cycles
    finished = [c for c in cycles if discharge_finished(trace, steps, c, program)]
    first_ok = bool(cycles) and cycles[0] in finished
    if program.grading_step is not None and trace.step is not None:
        return _by_step(trace, segmentation, program.grading_step, finished, first_ok)
    if program.cycles is not None:
        if len(finished) < program.cycles:
            missing = f"before the discharge of cycle {program.cycles} (the grading cycle) was finished"
            return _none(first_ok, _incomplete(trace, segmentation, missing))
        notes: tuple[Note, ...] = ()
        if len(finished) > program.cycles:
            notes = (
                Note(
                    MISMATCH,
                    f"the record holds {len(finished)} charge-discharge cycles where the "
                    f"program has {program.cycles}; cycle {program.cycles} is graded",
                    SourceRef(trace.source),
                ),
            )
        return GradingChoice(finished[program.cycles - 1], first_ok, notes)
    # no program to go by: the record's own end tells whether it was cut short, so that a
    # record cut in its grading charge is never graded on its formation cycle
    cut = cut_short(segmentation)
    if cut is not None:
        return _none(first_ok, _incomplete(trace, segmentation, cut))
    complete = [c for c in cycles if c.complete]
    if not complete:
        return GradingChoice(None, first_ok, ())
    if complete[-1] not in finished:
        return _none(first_ok, _incomplete(trace, segmentation, "before its last discharge was finished"))
    return GradingChoice(complete[-1], first_ok, ())


# Without a program, a record that ends in a rest shorter than this share of its earlier rests
# (the median of the rests between its steps) was cut short: a program's last rest is as long
# as its others or longer (our own choice of share; a final rest that measures self-discharge
# is hours long).
SHORT_REST_SHARE = 0.25


def cut_short(segmentation: Segmentation) -> str | None:
    """Why a record judged without a program looks cut short by its own end, or None.

    A cycler program ends with its current off, so a record whose last step still carries
    current (beyond the rest band) was cut during that step; one that ends in a rest far
    shorter than the rests between its steps was cut during that rest.
    """
    steps = segmentation.steps
    if not steps:
        return None
    last = steps[-1]
    if last.kind is not StepKind.REST:
        return "while current still flows: the record was cut short"
    earlier = sorted(
        s.duration_s for s in steps[1:-1] if s.kind is StepKind.REST and s.duration_s > 0
    )
    if not earlier:
        return None
    typical = earlier[len(earlier) // 2]
    if last.duration_s < SHORT_REST_SHARE * typical:
        return (
            f"{last.duration_s / 60.0:.1f} min into that rest, far shorter than the rests "
            f"between its steps ({typical / 60.0:.0f} min): the record was cut short"
        )
    return None


def _by_step(
    trace: Trace, segmentation: Segmentation, number: int, finished: list[Cycle], first_ok: bool
) -> GradingChoice:
    found = [s for s in segmentation.steps if s.program_step == number]
    if not found:
        missing = f"before program step {number} (the grading discharge)"
        return _none(first_ok, _incomplete(trace, segmentation, missing))
    step = found[0]
    owner = next((c for c in segmentation.cycles if step.index in c.discharge_steps), None)
    if step.kind is not StepKind.DISCHARGE or owner is None:
        what = (
            "comes before any charge"  # a discharge that no charge precedes: another program
            if step.kind is StepKind.DISCHARGE
            else f"is {'a rest' if step.kind is StepKind.REST else 'a charge'} in this record"
        )
        return _none(
            first_ok,
            Note(
                MISMATCH,
                f"program step {number}, which the rule set names as the grading discharge, {what}",
                trace.where(step.start),
                GRADING_METRICS,
            ),
        )
    if owner not in finished:
        missing = f"before program step {number} (the grading discharge) was finished"
        return _none(first_ok, _incomplete(trace, segmentation, missing))
    return GradingChoice(owner, first_ok, ())


# A final rest counts as finished at this share of the program's final rest (sampling and
# the cycler's own step timing end it a little early or late: common practice).
FINAL_REST_SHARE = 0.99


def final_rest(
    trace: Trace, segmentation: Segmentation, program: Program, grading: Cycle
) -> tuple[Step | None, Note | None]:
    """The program's final rest (the record's last step, a rest after the grading discharge).

    None with a note when the record does not end in such a rest, or ends before the
    program's final rest was over; the note holds the cell when the rule set gives the
    final rest's length, since the record was then cut short.
    """
    last = segmentation.steps[-1]
    where = trace.where(len(trace) - 1)
    blocks = ("rest_voltage_drift_mV_per_h",)
    if last.kind is not StepKind.REST or last.index < grading.discharge_steps[-1]:
        if program.final_rest_s is None:
            text = (
                "the record does not end in a rest after the grading discharge, so the rest "
                "voltage drift is not measured"
            )
            return None, Note("no_final_rest", text, where, blocks)
        text = (
            f"program incomplete: record ends in {describe_end(trace, segmentation)}, "
            f"before the final rest"
        )
        return None, Note(INCOMPLETE, text, where, blocks)
    if program.final_rest_s is not None and last.duration_s < FINAL_REST_SHARE * program.final_rest_s:
        text = (
            f"program incomplete: record ends {last.duration_s / 3600.0:.2f} h into the final "
            f"rest, which the program runs for {program.final_rest_s / 3600.0:.2f} h"
        )
        return None, Note(INCOMPLETE, text, where, blocks)
    return last, None
