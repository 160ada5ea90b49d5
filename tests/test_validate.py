"""Validation of traces: what is refused with a located error, what passes with a note."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.acceptance.rules import CellType
from pipeline.errors import InputError
from pipeline.judge.metricdefs import METRIC_NAMES
from pipeline.model import Note, SourceRef, Trace
from pipeline.read.validate import CAPACITY_METRICS, drop_invalid_rows, validate_trace, validated

# Invented cell type; plausibility bounds as a rule set would give them.
CELL = CellType("DEMO-LFP-20A", 20.0, -0.1, 4.5)
NAN = math.nan


def make_trace(
    n: int = 200,
    *,
    dt_s: float = 10.0,
    amps: float = 10.0,
    temperature: bool = False,
    first_line: int = 5,
    changes: dict[str, dict[int, float]] | None = None,
) -> Trace:
    """A clean charge-then-discharge record of ``n`` rows at ``dt_s``, then edited by ``changes``.

    ``changes`` maps a field (``t``, ``v``, ``i``, ``T``) to {row: new value}.
    """
    time_s = np.arange(n) * dt_s
    half = n // 2
    current_a = np.where(np.arange(n) < half, amps, -amps)
    current_a[:2] = 0.0
    voltage_v = np.where(
        np.arange(n) < half, 3.3 + 0.1 * np.arange(n) / n, 3.35 - 0.2 * np.arange(n) / n
    )
    temperature_c = 25.0 + 0.01 * np.arange(n) if temperature else None
    columns = {"t": time_s, "v": voltage_v, "i": current_a, "T": temperature_c}
    for field, edits in (changes or {}).items():
        column = columns[field]
        assert column is not None
        for row, value in edits.items():
            column[row] = value
    return Trace(
        source="c.csv",
        metadata={"cell_id": "C1", "lot": "L1", "cell_type": CELL.name},
        time_s=time_s,
        voltage_v=voltage_v,
        current_a=current_a,
        temperature_c=temperature_c,
        first_data_line=first_line,
    )


def message_of(trace: Trace, cell: CellType = CELL) -> str:
    with pytest.raises(InputError) as caught:
        validate_trace(trace, cell)
    return str(caught.value)


def test_clean_trace_has_no_notes() -> None:
    assert validate_trace(make_trace(temperature=True), CELL) == ()


# ---------------------------------------------------------------- empty fields


def test_one_empty_voltage_is_a_note_naming_its_line() -> None:
    notes = validate_trace(make_trace(changes={"v": {40: NAN}}), CELL)
    assert notes == (
        Note(
            "nan_rows",
            "1 row with an empty voltage field left out (first on line 45)",
            SourceRef("c.csv", 45),
        ),
    )


def test_five_empty_rows_in_a_row_in_a_long_record_are_a_note() -> None:
    trace = make_trace(1000, changes={"i": dict.fromkeys(range(300, 305), NAN), "t": {700: NAN}})
    assert validate_trace(trace, CELL) == (
        Note(
            "nan_rows",
            "6 rows with an empty time or current field left out (first on line 305)",
            SourceRef("c.csv", 305),
        ),
    )


def test_six_empty_rows_in_a_row_are_refused() -> None:
    trace = make_trace(1000, changes={"v": dict.fromkeys(range(300, 306), NAN)})
    assert message_of(trace) == (
        "c.csv, line 305: 6 rows in a row have an empty voltage field (lines 305 to 310).\n"
        "  formgate leaves out at most 5 rows in a row; check the channel's logging, "
        "or cut the damaged part out of the file."
    )


def test_more_than_one_percent_empty_rows_are_refused() -> None:
    trace = make_trace(200, changes={"v": {10: NAN, 50: NAN, 90: NAN}})
    assert message_of(trace) == (
        "c.csv, line 15: 3 of 200 rows (1.5 %) have an empty voltage field, "
        "the first on this line.\n"
        "  formgate leaves out at most 1 % of the rows; check the channel's logging."
    )


def test_empty_time_rows_do_not_count_as_time_going_backwards() -> None:
    notes = validate_trace(make_trace(changes={"t": {100: NAN}}), CELL)
    assert [n.code for n in notes] == ["nan_rows"]


def test_drop_invalid_rows_removes_them_and_keeps_the_first_line() -> None:
    trace = make_trace(temperature=True, changes={"v": {3: NAN}, "i": {7: NAN}, "T": {9: NAN}})
    kept = drop_invalid_rows(trace)
    assert len(kept) == len(trace) - 2
    assert kept.first_data_line == trace.first_data_line
    assert kept.metadata == trace.metadata
    assert not np.isnan(kept.voltage_v).any() and not np.isnan(kept.current_a).any()
    assert kept.temperature_c is not None and np.isnan(kept.temperature_c).sum() == 1
    np.testing.assert_array_equal(kept.time_s, np.delete(trace.time_s, [3, 7]))


def test_drop_invalid_rows_returns_a_clean_trace_unchanged() -> None:
    trace = make_trace()
    assert drop_invalid_rows(trace) is trace


@pytest.mark.parametrize(
    "changes",
    [
        {},
        {"v": {3: NAN}, "i": {7: NAN}, "T": {9: NAN}},
        {"t": {50: 490.0, 51: 490.0}},  # a repeated time stamp
        {"t": {k: 10.0 * k + 600.0 for k in range(120, 200)}},  # a gap
        {"T": {k: NAN for k in range(200)}},
    ],
)
def test_validated_is_validate_then_drop(changes: dict[str, dict[int, float]]) -> None:
    trace = make_trace(temperature=True, changes=changes)
    kept, notes = validated(trace, CELL)
    assert notes == validate_trace(trace, CELL)
    expected = drop_invalid_rows(trace)
    assert (kept is trace) == (expected is trace)
    for name in ("time_s", "voltage_v", "current_a", "temperature_c"):
        assert getattr(kept, name).tobytes() == getattr(expected, name).tobytes()


def test_drop_invalid_rows_keeps_step_and_cycle_aligned() -> None:
    base = make_trace(20, changes={"v": {5: NAN}})
    trace = Trace(
        source=base.source,
        metadata=base.metadata,
        time_s=base.time_s,
        voltage_v=base.voltage_v,
        current_a=base.current_a,
        step=np.arange(20),
        cycle=np.ones(20, dtype=np.int64),
    )
    kept = drop_invalid_rows(trace)
    assert kept.step is not None and kept.step.tolist() == [r for r in range(20) if r != 5]
    assert kept.cycle is not None and len(kept.cycle) == 19


# ---------------------------------------------------------------- time


def test_time_going_backwards_is_refused_with_both_values() -> None:
    assert message_of(make_trace(changes={"t": {50: 480.0}})) == (
        "c.csv, line 55: time goes backwards, from 490 s on line 54 to 480 s.\n"
        "  Time must never decrease; check that the file is one run of one channel, "
        "not two records joined together."
    )


def test_repeated_time_stamps_are_a_note() -> None:
    notes = validate_trace(make_trace(changes={"t": {50: 490.0, 51: 490.0}}), CELL)
    assert notes == (
        Note(
            "time_duplicates",
            "2 rows repeat the time stamp of the row before (first on line 55)",
            SourceRef("c.csv", 55),
        ),
    )


def test_a_gap_during_rest_is_a_note_that_blocks_nothing() -> None:
    trace = make_trace()
    time_s = trace.time_s.copy()
    time_s[1:] += 3600.0  # one hour lost between the two rest rows
    gapped = Trace(trace.source, trace.metadata, time_s, trace.voltage_v, trace.current_a)
    assert validate_trace(gapped, CELL) == (
        Note(
            "time_gaps",
            "1 gap in the record longer than 100 s; the longest is 3610 s, before line 3",
            SourceRef("c.csv", 3),
        ),
    )


def test_a_gap_while_current_flows_blocks_the_capacity_metrics() -> None:
    trace = make_trace()
    time_s = trace.time_s.copy()
    time_s[150:] += 600.0
    gapped = Trace(trace.source, trace.metadata, time_s, trace.voltage_v, trace.current_a)
    assert validate_trace(gapped, CELL) == (
        Note(
            "time_gaps",
            "1 gap in the record longer than 100 s; the longest is 610 s, before line 152; "
            "current flowed across a gap, so capacities there are interpolated",
            SourceRef("c.csv", 152),
            CAPACITY_METRICS,
        ),
    )


def test_a_gap_shorter_than_a_minute_is_not_noted() -> None:
    trace = make_trace(dt_s=1.0)
    time_s = trace.time_s.copy()
    time_s[100:] += 40.0  # 41 times the sampling interval, but under 60 s
    gapped = Trace(trace.source, trace.metadata, time_s, trace.voltage_v, trace.current_a)
    assert validate_trace(gapped, CELL) == ()


def test_a_record_whose_time_never_moves_has_only_the_duplicates_note() -> None:
    trace = make_trace(12, dt_s=0.0)
    assert [n.code for n in validate_trace(trace, CELL)] == ["time_duplicates"]


def test_blocked_metrics_are_real_metric_names() -> None:
    assert set(CAPACITY_METRICS) <= set(METRIC_NAMES)
    assert "max_temperature_C" in METRIC_NAMES


# ---------------------------------------------------------------- temperature


def test_no_temperature_at_all_blocks_the_temperature_metric() -> None:
    trace = make_trace(temperature=True, changes={"T": dict.fromkeys(range(200), NAN)})
    assert validate_trace(trace, CELL) == (
        Note(
            "no_temperature",
            "the temperature column holds no values, so the temperature cannot be judged",
            SourceRef("c.csv"),
            ("max_temperature_C",),
        ),
    )


def test_some_missing_temperatures_are_a_note_that_blocks_nothing() -> None:
    trace = make_trace(temperature=True, changes={"T": {20: NAN, 30: NAN}})
    assert validate_trace(trace, CELL) == (
        Note(
            "temperature_gaps",
            "2 rows have no temperature (first on line 25); "
            "the highest temperature is taken over the others",
            SourceRef("c.csv", 25),
        ),
    )


# ---------------------------------------------------------------- length and current


def test_too_few_rows_are_refused() -> None:
    assert message_of(make_trace(9)) == (
        "c.csv: only 9 data rows with a time, voltage and current; "
        "at least 10 are needed to judge a cell.\n"
        "  Check that the file was copied whole once the channel had finished."
    )


def test_a_current_spike_above_20_c_is_refused_without_a_unit_hint() -> None:
    assert message_of(make_trace(changes={"i": {120: -450.0}})) == (
        "c.csv, line 125: current -450 A is 22.5 C for a DEMO-LFP-20A cell (20 Ah nominal), "
        "above the 20 C that is plausible.\n"
        "  Check that the file is from a DEMO-LFP-20A cell (cell_type in its metadata)."
    )


def test_currents_in_milliamperes_read_as_amperes_are_named() -> None:
    assert message_of(make_trace(amps=4000.0)) == (
        "c.csv, line 7: current 4000 A is 200 C for a DEMO-LFP-20A cell (20 Ah nominal), "
        "above the 20 C that is plausible.\n"
        "  The currents look like milliamperes read as amperes: read the file through an "
        'import profile with [units] current = "mA".'
    )


def test_a_record_of_rest_alone_is_refused() -> None:
    assert message_of(make_trace(amps=0.0)) == (
        "c.csv: no current flows: the largest is 0 A, below 0.001 C for a DEMO-LFP-20A cell "
        "(20 Ah nominal).\n"
        "  Check that the channel ran its program; a record of rest alone cannot be judged."
    )


# ---------------------------------------------------------------- voltage


def test_voltage_below_the_plausible_bound_is_refused() -> None:
    assert message_of(make_trace(changes={"v": {60: -1.5}})) == (
        "c.csv, line 65: voltage -1.5 V is outside what a DEMO-LFP-20A cell can show "
        "(-0.1 to 4.5 V).\n"
        "  Check that the file is from a DEMO-LFP-20A cell (cell_type in its metadata) and "
        "that the channel measured the cell's terminals."
    )


# ---------------------------------------------------------------- properties


@st.composite
def traces(draw: st.DrawFn) -> Trace:
    n = draw(st.integers(1, 60))
    floats = st.floats(allow_infinity=False, width=64)
    time_s = draw(st.lists(floats, min_size=n, max_size=n))
    if draw(st.booleans()):
        time_s = sorted(t for t in time_s if not math.isnan(t)) + [NAN] * sum(
            math.isnan(t) for t in time_s
        )
    volts = draw(st.lists(st.one_of(st.floats(-1, 6), floats), min_size=n, max_size=n))
    amps = draw(st.lists(st.one_of(st.floats(-30, 30), floats), min_size=n, max_size=n))
    temps = draw(st.none() | st.lists(floats, min_size=n, max_size=n))
    return Trace("p.csv", {}, time_s, volts, amps, temps, first_data_line=draw(st.integers(1, 9)))


@settings(max_examples=400, deadline=None)
@given(trace=traces())
def test_validation_returns_notes_or_a_located_input_error(trace: Trace) -> None:
    try:
        notes = validate_trace(trace, CELL)
    except InputError as error:
        assert error.where is not None and error.where.path == "p.csv"
        return
    assert all(isinstance(n, Note) and set(n.blocks) <= set(METRIC_NAMES) for n in notes)
    kept = drop_invalid_rows(trace)
    for values in (kept.time_s, kept.voltage_v, kept.current_a):
        assert not np.isnan(values).any()
    assert "nan_rows" not in [n.code for n in validate_trace(kept, CELL)]


@settings(max_examples=100, deadline=None)
@given(
    volts=st.lists(st.floats(1.0, 4.5), min_size=12, max_size=40),
    c_rate=st.floats(0.05, 2.0),  # x 1000 is above 20 C (grading runs at 0.2-1 C: practice)
)
def test_millivolts_and_milliamperes_read_as_volts_and_amperes_are_always_named(
    volts: list[float], c_rate: float
) -> None:
    n = len(volts)
    amps = [c_rate * CELL.nominal_capacity_ah * (1 if k < n // 2 else -1) for k in range(n)]
    time_s = [10.0 * k for k in range(n)]
    good = Trace("p.csv", {}, time_s, volts, amps)
    assert validate_trace(good, CELL) == ()
    in_mv = Trace("p.csv", {}, time_s, [v * 1000 for v in volts], amps)
    assert message_of(in_mv).endswith('with [units] voltage = "mV".')
    in_ma = Trace("p.csv", {}, time_s, volts, [a * 1000 for a in amps])
    assert message_of(in_ma).endswith('with [units] current = "mA".')
