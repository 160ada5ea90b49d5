"""Data quality of a Trace before it is segmented: refuse what cannot be judged, note the rest.

``validate_trace`` raises InputError for a record nobody should judge (too short, time
running backwards, long runs of empty fields, no current, currents or voltages that do
not fit the cell type, which usually means a unit was read wrongly) and returns Notes for
what can be lived with (a few empty rows, repeated time stamps, gaps, missing
temperatures). ``drop_invalid_rows`` then removes the few rows with an empty time,
voltage or current so that later steps see only numbers.

Line numbers: validation runs on the Trace as read, so every line it names is exact.
After ``drop_invalid_rows`` the Trace keeps its ``first_data_line``; ``line_of(row)`` is
then exact up to the first dropped row and at most the number of dropped rows (never more
than ``MAX_EMPTY_FRACTION`` of the file) too low after it.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import numpy.typing as npt

from pipeline.acceptance.rules import CellType
from pipeline.errors import InputError
from pipeline.model import FloatArray, Note, SourceRef, Trace

Mask = npt.NDArray[np.bool_]
# Row numbers (0-based) into a Trace; a range when every row is kept (no array to build).
Rows = npt.NDArray[np.intp] | range

MIN_ROWS = 10  # common practice: fewer samples cannot show a charge, a rest and a discharge
MAX_EMPTY_RUN = 5  # rows; common practice: a longer hole hides what the cell did
MAX_EMPTY_FRACTION = 0.01  # common practice
# Formation and grading run at 0.02-1 C (common practice); a
# current above 20 C or never above 0.001 C is taken as a unit read wrongly or no program.
MAX_C_RATE = 20.0
MIN_C_RATE = 0.001
FLOWING_C_RATE = 0.01  # current counts as flowing across a gap above this (common practice)
MOST = 0.5  # a unit is suspected when at least this share of the samples is off by 1000
GAP_FACTOR = 10.0  # a gap is longer than this many median sampling intervals ...
GAP_MIN_S = 60.0  # ... and longer than this (common practice)
# Metrics integrated over time: a hole in the record while current flows leaves them guessed.
CAPACITY_METRICS: tuple[str, ...] = (
    "first_cycle_efficiency",
    "irreversible_capacity_Ah",
    "grading_capacity_Ah",
    "grading_energy_Wh",
    "grading_mean_voltage_V",
    "grading_coulombic_efficiency",
)


def validate_trace(trace: Trace, cell_type: CellType) -> tuple[Note, ...]:
    """Check that ``trace`` can be judged as a ``cell_type`` cell; return data-quality Notes.

    Raises InputError, naming the line, for anything that prevents judging.
    """
    return _validate(trace, cell_type, _empty_rows(trace))


def validated(trace: Trace, cell_type: CellType) -> tuple[Trace, tuple[Note, ...]]:
    """``drop_invalid_rows(trace)`` and ``validate_trace(trace, cell_type)``, looking for
    empty rows once (a pass over three columns of the record that both would make)."""
    empty = _empty_rows(trace)
    notes = _validate(trace, cell_type, empty)
    return _without(trace, empty), notes


def _validate(trace: Trace, cell_type: CellType, empty: Mask | None) -> tuple[Note, ...]:
    """validate_trace, ``empty`` its rows with an empty time, voltage or current (None: none)."""
    _refuse_short(trace, len(trace))
    notes: list[Note] = []
    rows: Rows = range(len(trace))
    if empty is not None:
        notes += _check_empty_rows(trace, empty)
        if empty.any():
            rows = np.flatnonzero(~empty)
    _refuse_short(trace, len(rows))
    if len(rows) == len(trace):  # every row kept: the columns as they are, not copies
        time_s, volts, amps = trace.time_s, trace.voltage_v, trace.current_a
    else:
        time_s, volts, amps = trace.time_s[rows], trace.voltage_v[rows], trace.current_a[rows]
    # Differences of absurdly large times may overflow to inf, which the checks handle.
    with np.errstate(over="ignore", invalid="ignore"):
        steps = np.diff(time_s)
        # The smallest step, in one pass: a record whose every step is forward (most are)
        # has neither a step back nor a repeated time to look for, and its gaps need no mask
        # of the steps forward. A NaN step (times beyond any clock) makes it NaN, and then
        # every check looks at every step.
        smallest = float(steps.min())
        _check_time_order(trace, rows, time_s, steps, smallest)
        _check_voltage(trace, rows, volts, cell_type)
        _check_current(trace, rows, amps, cell_type)
        notes += _note_repeated_times(trace, rows, steps, smallest)
        notes += _note_gaps(trace, rows, steps, amps, cell_type, forward=smallest > 0)
    notes += _note_temperature(trace)
    return tuple(notes)


def drop_invalid_rows(trace: Trace) -> Trace:
    """The same Trace without rows whose time, voltage or current is empty (NaN).

    Run it after ``validate_trace`` accepted the trace; see the module docstring for
    what happens to line numbers.
    """
    return _without(trace, _empty_rows(trace))


def _without(trace: Trace, empty: Mask | None) -> Trace:
    """``trace`` without the rows ``empty`` marks (None: none)."""
    if empty is None:
        return trace
    keep = ~empty
    if keep.all():
        return trace
    changes = {
        name: getattr(trace, name)[keep]
        for name in ("time_s", "voltage_v", "current_a", "temperature_c", "step", "cycle")
        if getattr(trace, name) is not None
    }
    return dataclasses.replace(trace, **changes)


def _may_have_empty_rows(trace: Trace) -> bool:
    """False when no time, voltage or current is NaN, as the sum of each column shows: a
    NaN makes its sum NaN. A sum that is not finite for another reason (an overflow) only
    sends the question on to :func:`_empty_rows`. Sums need no mask the size of the record."""
    with np.errstate(over="ignore", invalid="ignore"):
        total = sum(float(np.add.reduce(c)) for c in (trace.time_s, trace.voltage_v, trace.current_a))
    return not math.isfinite(total)


def _empty_rows(trace: Trace) -> Mask | None:
    """The rows whose time, voltage or current is empty (NaN); None when no row can be."""
    if not _may_have_empty_rows(trace):
        return None
    return np.isnan(trace.time_s) | np.isnan(trace.voltage_v) | np.isnan(trace.current_a)


def _refuse_short(trace: Trace, rows: int) -> None:
    if rows < MIN_ROWS:
        raise InputError(
            f"only {rows} data rows with a time, voltage and current; "
            f"at least {MIN_ROWS} are needed to judge a cell",
            SourceRef(trace.source),
            "Check that the file was copied whole once the channel had finished.",
        )


def _check_empty_rows(trace: Trace, empty: Mask) -> list[Note]:
    count = int(empty.sum())
    if not count:
        return []
    first = int(np.argmax(empty))
    what = " or ".join(
        word
        for word, values in (
            ("time", trace.time_s),
            ("voltage", trace.voltage_v),
            ("current", trace.current_a),
        )
        if np.isnan(values[empty]).any()
    )
    start, length = _longest_run(empty)
    if length > MAX_EMPTY_RUN:
        raise InputError(
            f"{length} rows in a row have an empty {what} field "
            f"({trace.span(start, start + length - 1)})",
            trace.where(start),
            f"formgate leaves out at most {MAX_EMPTY_RUN} rows in a row; check the channel's "
            "logging, or cut the damaged part out of the file.",
        )
    if count > MAX_EMPTY_FRACTION * len(trace):
        raise InputError(
            f"{count} of {len(trace)} rows ({100 * count / len(trace):.1f} %) have an empty "
            f"{what} field, the first on this line",
            trace.where(first),
            f"formgate leaves out at most {100 * MAX_EMPTY_FRACTION:g} % of the rows; "
            "check the channel's logging.",
        )
    rows = "row" if count == 1 else "rows"
    return [
        Note(
            "nan_rows",
            f"{count} {rows} with an empty {what} field left out "
            f"(first on {trace.place(first)})",
            trace.where(first),
        )
    ]


def _longest_run(mask: Mask) -> tuple[int, int]:
    """Start and length of the longest run of True in ``mask`` (first one on a tie)."""
    edges = np.diff(np.concatenate(([0], mask.astype(np.int8), [0])))
    starts = np.flatnonzero(edges == 1)
    lengths = np.flatnonzero(edges == -1) - starts
    best = int(np.argmax(lengths))
    return int(starts[best]), int(lengths[best])


def _check_time_order(
    trace: Trace, rows: Rows, time_s: FloatArray, steps: FloatArray, smallest: float
) -> None:
    if smallest >= 0:  # ``smallest``: steps.min(), NaN when a step is
        return
    back = np.flatnonzero(steps < 0)
    if back.size:
        k = int(back[0])
        before, after = int(rows[k]), int(rows[k + 1])
        raise InputError(
            f"time goes backwards, from {_fmt(time_s[k], 3)} s on {trace.place(before)} "
            f"to {_fmt(time_s[k + 1], 3)} s",
            trace.where(after),
            "Time must never decrease; check that the file is one run of one channel, "
            "not two records joined together.",
        )


def _check_voltage(trace: Trace, rows: Rows, volts: FloatArray, ct: CellType) -> None:
    if ct.min_voltage_v <= float(volts.min()) and float(volts.max()) <= ct.max_voltage_v:
        return  # every voltage inside the range (a NaN would fail these and be looked for)
    outside = np.flatnonzero((volts < ct.min_voltage_v) | (volts > ct.max_voltage_v))
    if not outside.size:
        return
    k = int(outside[0])
    scaled = volts / 1000
    fits_scaled = (scaled >= ct.min_voltage_v) & (scaled <= ct.max_voltage_v)
    if outside.size >= MOST * volts.size and fits_scaled.all():
        hint = (
            "The voltages look like millivolts: read the file through an import profile "
            'with [units] voltage = "mV".'
        )
    else:
        hint = (
            f"Check that the file is from a {ct.name} cell (cell_type in its metadata) "
            "and that the channel measured the cell's terminals."
        )
    raise InputError(
        f"voltage {_fmt(volts[k], 4)} V is outside what a {ct.name} cell can show "
        f"({_fmt(ct.min_voltage_v, 3)} to {_fmt(ct.max_voltage_v, 3)} V)",
        trace.where(int(rows[k])),
        hint,
    )


def _check_current(trace: Trace, rows: Rows, amps: FloatArray, ct: CellType) -> None:
    one_c_a = ct.nominal_capacity_ah  # 1 C in A is the nominal capacity in Ah (per hour)
    # the largest |I| from the extremes, without an array of magnitudes the size of the
    # record (the same number: negation is exact, and + 0.0 makes -0.0 the 0.0 abs gives)
    largest = max(float(amps.max()), -float(amps.min())) + 0.0
    rating = f"a {ct.name} cell ({_fmt(one_c_a, 3)} Ah nominal)"
    if largest > MAX_C_RATE * one_c_a:
        size = np.abs(amps)
        k = int(np.argmax(size > MAX_C_RATE * one_c_a))
        flowing = size[size > MIN_C_RATE * one_c_a]
        most_too_high = np.mean(flowing > MAX_C_RATE * one_c_a) >= MOST
        if most_too_high and largest / 1000 <= MAX_C_RATE * one_c_a:
            hint = (
                "The currents look like milliamperes read as amperes: read the file "
                'through an import profile with [units] current = "mA".'
            )
        else:
            hint = f"Check that the file is from a {ct.name} cell (cell_type in its metadata)."
        raise InputError(
            f"current {_fmt(amps[k], 4, significant=True)} A is "
            f"{_fmt(size[k] / one_c_a, 3, significant=True)} C for {rating}, "
            f"above the {MAX_C_RATE:g} C that is plausible",
            trace.where(int(rows[k])),
            hint,
        )
    if largest < MIN_C_RATE * one_c_a:
        if MIN_C_RATE * one_c_a <= largest * 1000 <= MAX_C_RATE * one_c_a:
            hint = (
                "The currents look 1000 times too small: if the file writes amperes, its "
                'import profile must say [units] current = "A".'
            )
        else:
            hint = (
                "Check that the channel ran its program; a record of rest alone cannot be judged."
            )
        raise InputError(
            f"no current flows: the largest is {_fmt(largest, 3, significant=True)} A, "
            f"below {MIN_C_RATE:g} C for {rating}",
            SourceRef(trace.source),
            hint,
        )


def _note_repeated_times(trace: Trace, rows: Rows, steps: FloatArray, smallest: float) -> list[Note]:
    if smallest > 0:  # ``smallest``: steps.min(), NaN when a step is
        return []
    same = np.flatnonzero(steps == 0)
    if not same.size:
        return []
    row = int(rows[same[0] + 1])
    rows_word = "row repeats" if same.size == 1 else "rows repeat"
    return [
        Note(
            "time_duplicates",
            f"{same.size} {rows_word} the time stamp of the row before "
            f"(first on {trace.place(row)})",
            trace.where(row),
        )
    ]


def _note_gaps(
    trace: Trace, rows: Rows, steps: FloatArray, amps: FloatArray, ct: CellType, *, forward: bool
) -> list[Note]:
    """A note on the gaps in the record (``steps``: the differences of its times; ``forward``:
    every step is above 0, so no mask of those that are is made)."""
    moving = None if forward else steps > 0
    count = len(steps) if moving is None else int(np.count_nonzero(moving))
    if not count:
        return []
    if _median_under(steps, moving, count, GAP_MIN_S / GAP_FACTOR):
        limit = GAP_MIN_S
    else:
        limit = max(GAP_FACTOR * float(np.median(steps if moving is None else steps[moving])), GAP_MIN_S)
    if forward and float(steps.max()) <= limit:
        return []  # no step longer than the limit, found in one pass without a mask
    gaps = np.flatnonzero(steps > limit)
    if not gaps.size:
        return []
    k = int(gaps[np.argmax(steps[gaps])])
    row = int(rows[k + 1])
    flowing = FLOWING_C_RATE * ct.nominal_capacity_ah
    during_flow = np.minimum(np.abs(amps[gaps]), np.abs(amps[gaps + 1])) > flowing
    text = (
        f"{gaps.size} {'gap' if gaps.size == 1 else 'gaps'} in the record longer than "
        f"{_fmt(limit, 1)} s; the longest is {_fmt(steps[k], 1)} s, before {trace.place(row)}"
    )
    blocks: tuple[str, ...] = ()
    if during_flow.any():
        text += "; current flowed across a gap, so capacities there are interpolated"
        blocks = CAPACITY_METRICS
    return [Note("time_gaps", text, trace.where(row), blocks)]


def _median_under(steps: FloatArray, moving: Mask | None, count: int, bound: float) -> bool:
    """Whether GAP_FACTOR times the median of the ``count`` steps forward (``moving``: the
    steps above 0, so none of them NaN; None when every step is) is sure to be at most
    GAP_MIN_S, as it is when more than half of them are at most ``bound``: then the middle
    value or values, and their mean, are at most ``bound`` too, and the median need not be
    found (a partition of every interval of the record). Counted in place: no copy of the
    steps forward."""
    if not GAP_FACTOR * bound <= GAP_MIN_S:
        return False
    at_most = steps <= bound
    if moving is not None:
        at_most &= moving
    return int(np.count_nonzero(at_most)) > count // 2


def _note_temperature(trace: Trace) -> list[Note]:
    if trace.temperature_c is None:
        return []
    with np.errstate(over="ignore", invalid="ignore"):  # a NaN makes the sum NaN (_may_have_empty_rows)
        if math.isfinite(float(np.add.reduce(trace.temperature_c))):
            return []
    missing = np.isnan(trace.temperature_c)
    if not missing.any():
        return []
    if missing.all():
        return [
            Note(
                "no_temperature",
                "the temperature column holds no values, so the temperature cannot be judged",
                SourceRef(trace.source),
                ("max_temperature_C",),
            )
        ]
    row = int(np.argmax(missing))
    count = int(missing.sum())
    rows_word = "row has" if count == 1 else "rows have"
    return [
        Note(
            "temperature_gaps",
            f"{count} {rows_word} no temperature (first on {trace.place(row)}); "
            "the highest temperature is taken over the others",
            trace.where(row),
        )
    ]


def _fmt(value: float, digits: int, significant: bool = False) -> str:
    """A number for a message: ``digits`` decimals (or significant digits), no trailing zeros."""
    return np.format_float_positional(
        float(value), precision=digits, unique=True, fractional=not significant, trim="-"
    )
