"""Split one simulated record into two, its formation and its grading, as two stage files hold them.

A cell's stages may run on different channels or days: the split falls inside the rest
after cycle 1's discharge, the formation record gets a storage charge and a rest of its
own (simulated by :func:`pipeline.demo.synth.replay_formation` and read through the
record's channel), the grading record is renumbered from its own start. Pure: a record and
a seeded numpy Generator in, records out. Simulating the whole record is left to
:mod:`pipeline.demo.synth`, writing the records as text to :mod:`pipeline.demo.cycletext`.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

from pipeline.demo.cellmodel import temperatures
from pipeline.demo.channel import Channel, add_channel_errors
from pipeline.demo.synth import (
    SPLIT_REST_STEP,
    STORAGE_REST_S,
    Run,
    SimulatedRecord,
    StepTruth,
    replay_formation,
)


@dataclass(frozen=True, slots=True)
class StageRecords:
    """One simulated cell written as two records: its formation and its grading.

    ``cut`` is the row of the whole record where the grading record starts: the
    formation record holds the whole record's rows before it, then a charge to the
    storage level and a rest of its own; the grading record holds the rows from it on,
    its time counted from 0, its steps and cycles numbered from 1.
    """

    formation: SimulatedRecord
    grading: SimulatedRecord
    cut: int


def split_stages(
    record: SimulatedRecord,
    rng: np.random.Generator,
    *,
    at_s: float | None = None,
    storage_rest_s: float = STORAGE_REST_S,
) -> StageRecords:
    """``record`` (of :func:`simulate_formation`) as a formation record and a grading record.

    The split falls at ``at_s`` (s from the start; default the middle) inside the rest
    after cycle 1's discharge, as when a cell leaves its formation channel for another
    channel or day. Both keep the whole record's rows, so the channel errors those carry
    stay; the formation record's storage charge and rest are simulated on the cell model
    from the state at the split and read through the record's channel (noise, offset, the
    switch spike) with ``rng``. What the cell went through between the two records is not
    in either (it holds no charge or discharge of any cycle).
    """
    rest = record.step_named(SPLIT_REST_STEP)
    at = 0.5 * (rest.start_s + rest.end_s) if at_s is None else at_s
    cut = int(np.searchsorted(record.time_s, at))
    if not rest.start < cut < rest.stop:
        raise ValueError(
            f"the split at {at:g} s must leave rows of the rest after cycle 1 "
            f"({rest.start_s:g}-{rest.end_s:g} s) on both sides"
        )
    recipe = record.recipe
    run = replay_formation(recipe, float(record.time_s[cut - 1]) - rest.start_s, storage_rest_s)
    if sum(t.stop - t.start for t in run.truths[:SPLIT_REST_STEP]) != cut:
        raise ValueError("the record is not simulate_formation's for its recipe")
    return StageRecords(
        _formation_part(record, run, cut, rng), _grading_part(record, cut), cut
    )


def _formation_part(
    record: SimulatedRecord, run: Run, cut: int, rng: np.random.Generator
) -> SimulatedRecord:
    """The whole record's rows before ``cut``, then the run's storage charge and rest."""
    recipe = record.recipe
    time_s = np.concatenate(run.times) / 10.0
    volts, amps = np.concatenate(run.volts), np.concatenate(run.amps)
    counts = [t.stop - t.start for t in run.truths]
    step = np.repeat([t.number for t in run.truths], counts)
    temps = temperatures(recipe, time_s, amps)
    # the last kept row goes in with the new ones, so the storage charge's first row shows the switch
    tail = slice(cut - 1, None)
    channel = recipe.channel or Channel.for_cell(recipe.nominal_capacity_ah)
    volts, amps, temps = add_channel_errors(
        volts[tail], amps[tail], temps[tail], step[tail], channel, rng
    )
    return SimulatedRecord(
        recipe=recipe,
        time_s=np.concatenate((record.time_s[:cut], time_s[cut:])),
        voltage_v=np.concatenate((record.voltage_v[:cut], np.round(volts[1:], 5) + 0.0)),
        current_a=np.concatenate((record.current_a[:cut], np.round(amps[1:], 5) + 0.0)),
        temperature_c=np.concatenate((record.temperature_c[:cut], np.round(temps[1:], 2) + 0.0)),
        step=step,
        cycle=np.repeat([t.cycle for t in run.truths], counts),
        steps=tuple(run.truths),
    )


def _grading_part(record: SimulatedRecord, cut: int) -> SimulatedRecord:
    """The whole record's rows from ``cut`` on: time from 0, steps and cycles from 1."""
    t0 = float(record.time_s[cut])
    first = record.step_named(SPLIT_REST_STEP)
    shift_step, shift_cycle = first.number - 1, first.cycle - 1
    # the rest loses only leakage: its state of charge at the cut, on a straight line
    share = (t0 - first.start_s) / (first.end_s - first.start_s)
    truths = [
        StepTruth(
            t.number - shift_step,
            t.cycle - shift_cycle,
            t.kind,
            max(t.start, cut) - cut,
            t.stop - cut,
            max(t.start_s, t0) - t0,
            t.end_s - t0,
            t.soc_start + share * (t.soc_end - t.soc_start) if t is first else t.soc_start,
            t.soc_end,
            t.charge_ah,
        )
        for t in record.steps
        if t.stop > cut
    ]
    return SimulatedRecord(
        recipe=record.recipe,
        time_s=np.round((record.time_s[cut:] - t0) * 10.0) / 10.0,
        voltage_v=record.voltage_v[cut:],
        current_a=record.current_a[cut:],
        temperature_c=record.temperature_c[cut:],
        step=record.step[cut:] - shift_step,
        cycle=record.cycle[cut:] - shift_cycle,
        steps=tuple(truths),
    )


def stage_metadata(metadata: Mapping[str, str], stage: str) -> dict[str, str]:
    """``metadata`` with the ``stage`` a record of one stage says it holds (after the rest)."""
    return {**{k: v for k, v in metadata.items() if k != "stage"}, "stage": stage}
