"""How a guessed profile reads the time: elapsed, since the step began, or date-times in a zone.

Part of :mod:`pipeline.read.guess_columns`, given the column chosen as the time. Numbers that
count up are the time elapsed since the record began, in the unit the header names (else
the one their span suggests); numbers that start again where the step changes are the time
since the step began. Date-times (read by :mod:`pipeline.read.guess_cells`) carry their UTC
offset, or take their zone from the file's metadata, or from the hour their clock repeats
or skips at a daylight-saving change (tried against ``DST_ZONES``, localised as the reader
localises them); else UTC, marked unsure. ``time_problem`` says why no column could be the
time when the file writes one formgate cannot read (a date and a time of day in two
columns, hours:minutes:seconds).

Pure: a function of the columns and the file's metadata.
"""

from __future__ import annotations

import re
from collections.abc import Sequence

import numpy as np
import pandas as pd

from pipeline.model import FloatArray
from pipeline.read.clock import localise
from pipeline.read.guess_cells import (
    NAT,
    UNSURE,
    Column,
    ColumnGuess,
    Decision,
    as_nanos,
    six_figures,
    unit_words,
    value_span,
)
from pipeline.read.zones import parse_zone

# Zones whose daylight-saving changes a clock without offsets is tried against, one per
# set of rules (any zone of the same offsets and changes reads the same elapsed time).
DST_ZONES: tuple[str, ...] = (
    "Europe/London",
    "Europe/Berlin",
    "Europe/Helsinki",
    "America/New_York",
    "America/Chicago",
    "America/Denver",
    "America/Los_Angeles",
    "Australia/Sydney",
    "Pacific/Auckland",
)
_ZONE_KEYS = ("zone", "time_zone", "timezone", "tz", "utc_offset", "clock_zone")

_DATE_ONLY = re.compile(r"\d{1,4}[./-]\d{1,2}[./-]\d{1,4}")
_CLOCK = re.compile(r"(?:\d+\s*d(?:ays?)?,?\s*)?\d{1,3}:\d{2}(?::\d{2}(?:[.,]\d+)?)?(?:\s*[AaPp][Mm])?")


def time_problem(columns: Sequence[Column]) -> str:
    """Why no column is the time, when a column shows a time formgate cannot read."""
    dates = [c for c in columns if c.distinct() and all(_DATE_ONLY.fullmatch(t) for t in c.distinct()[:50])]
    clocks = [c for c in columns if c.distinct() and all(_CLOCK.fullmatch(t) for t in c.distinct()[:50])]
    if dates and clocks:
        return (
            f"the date ({dates[0].header}) and the time of day ({clocks[0].header}) stand in two "
            "columns, which formgate does not read as one; have the cycler write them in one "
            "column (e.g. 2024-06-02 08:26:00), or export the elapsed time in seconds"
        )
    if clocks:
        return (
            f"the time ({clocks[0].header}) is written as hours:minutes:seconds "
            f"(e.g. {clocks[0].distinct()[0]!r}), which formgate does not read; have the cycler "
            "export it in seconds (or minutes, hours), or as a date and time"
        )
    return ""


def decide_time(guess: ColumnGuess, roles: dict[str, Column], metadata: dict[str, str]) -> None:
    """How the time column counts, its unit, and, for date-times, their pattern and zone."""
    column = roles.get("time")
    if column is None:
        return
    if column.stamps is not None:
        _date_time(guess, column, metadata)
        return
    if column.numbers is None:
        note = column.date_note or f"its values are not numbers (e.g. {column.distinct()[0]!r})"
        guess.problems.append(f"the time column {column.header!r} cannot be read: {note}")
        guess.reasons["time"] = "the header names a time, but " + note
        return
    values = column.numbers
    finite = values[np.isfinite(values)]
    back = np.flatnonzero(np.diff(finite) < 0)
    kind = "elapsed"
    reason = f"the header names a time; its values rise from {value_span(values)}"
    if back.size:
        step = roles.get("step")
        if step is not None and step.numbers is not None and _restarts_with_step(values, step.numbers):
            kind = "step elapsed"
            reason = (
                f"the header names a time that starts again where {step.header} changes: "
                "time since the step began"
            )
            guess.stamps = Decision(kind, "the time starts again with each step (see [columns] time)")
        else:
            reason = f"{UNSURE} the time goes back {back.size} times; check that this is the record's time"
            if step is None and "step" in column.words:
                guess.problems.append(
                    f"{column.header} seems to count from the start of each step, which needs a step "
                    "column; none was found"
                )
    guess.reasons["time"] = reason
    guess.units["time"] = _time_unit(column, finite)
    if kind == "elapsed":
        guess.stamps = Decision("elapsed", "numbers that count up from the start of the record")


def _restarts_with_step(time: FloatArray, step: FloatArray) -> bool:
    """True when the time drops back only where the step changes, and at most step changes."""
    drops = set(np.flatnonzero(np.diff(time) < 0).tolist())
    changes = set(np.flatnonzero(np.diff(step) != 0).tolist())
    return bool(drops) and drops <= changes and len(drops) >= len(changes) / 2


def _time_unit(column: Column, finite: FloatArray) -> Decision:
    if column.durations:
        return Decision("s", "its cells are durations, which formgate reads in the time unit")
    if column.unit and column.unit[0] == "time":
        return Decision(column.unit[1], unit_words(column))
    span = float(finite.max() - finite.min()) if finite.size else 0.0
    # a formation and grading record lasts hours to days: its span says the unit
    if span > 3e6:
        unit, why = "ms", f"the values span {six_figures(span)}: milliseconds over hours to days"
    elif 0 < span < 500 and finite.size > 100:
        unit, why = "h", f"the values span {six_figures(span)} over {finite.size} rows: hours"
    else:
        unit, why = "s", f"the values span {six_figures(span)}: seconds"
    return Decision(unit, f"{UNSURE} no unit in the header; {why}")


def _date_time(guess: ColumnGuess, column: Column, metadata: dict[str, str]) -> None:
    assert column.stamps is not None
    guess.stamps = Decision("date-time", "a date and a time of day on each row")
    if column.date_format is None:
        guess.reasons["time"] = "its cells are dates and times"
    else:
        guess.reasons["time"] = f"dates and times such as {column.distinct()[0]!r}"
        why = column.date_note or "reads every sampled stamp"
        guess.date_format = Decision(column.date_format, why)
    if column.with_offset:
        guess.reasons["time"] += ", each with its UTC offset"
        return
    for key, value in metadata.items():
        if key.lower().replace(" ", "_") in _ZONE_KEYS:
            try:
                parse_zone(value)
            except ValueError:
                continue
            guess.zone_metadata = key
            why = f"the file's metadata {key} says {value!r}; used for a file without it"
            guess.zone = Decision(value, why)
            return
    guess.zone = _zone_guess(column.stamps)


def _zone_guess(stamps: pd.Series) -> Decision:
    """UTC, or a zone with daylight-saving changes when the stamps repeat or skip an hour."""
    nanos = as_nanos(stamps)
    nanos = nanos[nanos != NAT]
    steps = np.diff(nanos)
    plain = Decision(
        "UTC",
        f"{UNSURE} the stamps carry no UTC offset; set the zone of the cycler's clock "
        '(e.g. "Europe/Berlin")',
    )
    if steps.size == 0:
        return plain
    positive = steps[steps > 0]
    typical = float(np.median(positive)) if positive.size else 0.0
    hour = 3600e9
    jumps = (steps < 0) | (np.abs(steps - hour) <= max(2 * typical, 60e9))
    if not jumps.any():
        return plain
    naive = pd.Series(nanos.view("datetime64[ns]"))
    for zone in DST_ZONES:
        try:
            local = localise(naive, zone)  # as the reader will, a stamp written twice allowed
        except (ValueError, TypeError):
            continue
        moved = np.diff(as_nanos(local))
        if (moved < 0).any() or (moved.max() > steps.max() - 1800e9 and not (steps < 0).any()):
            continue
        at = pd.Timestamp(nanos[int(np.flatnonzero(jumps)[0]) + 1])
        what = "repeat" if (steps < 0).any() else "skip"
        return Decision(
            zone,
            f"{UNSURE} the stamps carry no UTC offset and {what} an hour at {at:%Y-%m-%d %H:%M} "
            f"as a clock on {zone} time does; set the zone of the cycler's clock",
        )
    if (steps < 0).any():
        at = pd.Timestamp(nanos[int(np.flatnonzero(steps < 0)[0]) + 1])
        return Decision(
            "UTC",
            f"{UNSURE} the stamps carry no UTC offset and go back at {at:%Y-%m-%d %H:%M} in no "
            "known zone's daylight-saving change; set the zone of the cycler's clock",
        )
    return plain
