"""Time columns -> elapsed seconds: date-time stamps with their zone, and time that restarts each step.

A cycler writes time in one of three ways (the profile's ``[time] stamps``):

- elapsed: seconds (or ms, min, h) since the record began, converted by the caller;
- date-time: a date and a time of day on each row, as ISO 8601 or a strftime pattern.
  Stamps that carry a UTC offset are placed by it (so a record across a daylight-saving
  change, written +01:00 then +02:00, keeps its true elapsed time); stamps without one are
  read in the zone the profile or a metadata entry names. A zone name follows its
  daylight-saving changes: the hour skipped in spring cannot occur (a stamp in it is an
  error), and the hour repeated in autumn is told apart by the order of the rows. Elapsed
  seconds are counted from the first stamp, in exact integer nanoseconds;
- step elapsed: time since the current step began. Each step's first row continues from
  the previous step's last row, so a cycler that writes the time since the step's start
  (one sampling interval at its first row) gives back the record's elapsed time exactly.
  Such time starts again where the step changes; a column that runs on across most step
  changes is time since the record began, and is refused rather than added up step by step
  (which would make a record several times as long as it is).

A clock that goes back (after zones and offsets are applied) is an error naming both rows.
Pure functions of the raw column and the profile; messages come located through the
RawTable.
"""

from __future__ import annotations

import datetime as dt
import re

import numpy as np
import pandas as pd

from pipeline.errors import InputError
from pipeline.model import FloatArray, IntArray
from pipeline.read.bounds import shown_value
from pipeline.read.profile import Profile
from pipeline.read.profile_keys import ISO_8601
from pipeline.read.table import RawTable
from pipeline.read.zones import ZONE_HINT, parse_zone

_OFFSET_AT_END = re.compile(r"(?:[Zz]|[+-]\d{2}(?::?\d{2})?)\s*$")
_EMPTY = ("", "nan", "NaN", "NaT", "None")


def step_elapsed(step_time_s: FloatArray, step: IntArray) -> FloatArray:
    """Time since each step began -> time since the record began.

    Where the step number changes, the new step's times continue from the previous step's
    last (finite) time.

    >>> step_elapsed(np.array([0.0, 1, 2, 1, 2, 3, 1.0]), np.array([1, 1, 1, 2, 2, 2, 3]))
    array([0., 1., 2., 3., 4., 5., 6.])
    """
    n = len(step_time_s)
    if n == 0:
        return step_time_s
    starts = np.flatnonzero(np.diff(step) != 0) + 1
    bounds = np.concatenate(([0], starts, [n]))
    offsets = np.zeros(len(bounds) - 1)
    carried = 0.0
    for k in range(1, len(bounds) - 1):
        block = step_time_s[bounds[k - 1] : bounds[k]]
        finite = block[np.isfinite(block)]
        carried += float(finite[-1]) if finite.size else 0.0
        offsets[k] = carried
    lengths = np.diff(bounds)
    result: FloatArray = step_time_s + np.repeat(offsets, lengths)
    return result


def time_since_step_began(
    table: RawTable, profile: Profile, step_time_s: FloatArray, step: IntArray
) -> FloatArray:
    """The time column read as time since the step began -> time since the record began.

    Raises InputError at the first step change where the time runs on, when it runs on at
    more than half of the step changes (:func:`step_time_runs_on`).
    """
    _refuse_running_on(table, profile, step_time_s, step)
    return step_elapsed(step_time_s, step)


def step_time_runs_on(step_time_s: FloatArray, step: IntArray) -> tuple[IntArray, int]:
    """The rows that begin a step where the time runs on, and the number of step changes.

    The time runs on where a step's first row is later than the previous step's last row;
    time since the step began starts again there, except after a step shorter than the next
    step's first interval. Step changes with a time missing on either side are not counted.

    >>> step_time_runs_on(np.array([5.0, 10, 1, 2, 3, 4]), np.array([1, 1, 2, 2, 3, 3]))
    (array([4]), 2)
    """
    starts = np.flatnonzero(np.diff(step) != 0) + 1
    before, after = step_time_s[starts - 1], step_time_s[starts]
    counted = np.isfinite(before) & np.isfinite(after)
    runs_on: IntArray = starts[counted & (after > before)]
    return runs_on, int(counted.sum())


def _refuse_running_on(table: RawTable, profile: Profile, step_time_s: FloatArray, step: IntArray) -> None:
    runs_on, changes = step_time_runs_on(step_time_s, step)
    if not changes or 2 * len(runs_on) <= changes:
        return
    row = int(runs_on[0])
    index = table.columns["time"]
    raw = table.frame[index]
    raise InputError(
        f"{table.header(index)} does not restart with the step: it is {shown_value(str(raw.iloc[row]))} "
        f"where step {step[row]} begins, after {shown_value(str(raw.iloc[row - 1]))} at the end of "
        f"step {step[row - 1]} on {table.place(row - 1)}, and it runs on at {len(runs_on)} of "
        f"{changes} step changes",
        table.at(row, index),
        'The column reads as time since the record began: set [time] stamps = "elapsed" in '
        f'the import profile {profile.name} (stamps = "step elapsed" is for time that starts '
        "again with each step).",
    )


def date_time_elapsed(table: RawTable, index: int, profile: Profile) -> tuple[FloatArray, str]:
    """The date-time stamps of column ``index`` -> seconds since the first, and that stamp (ISO 8601, UTC).

    Raises InputError naming the row for a stamp that cannot be read, a stamp without an
    offset where no zone is named, a local time that does not exist or cannot be told
    apart, and a clock that goes back.
    """
    raw = table.frame[index]
    header = table.header(index)
    zone_used: dt.tzinfo | None = None  # the zone stamps without an offset are read in
    if isinstance(raw.dtype, pd.DatetimeTZDtype):
        stamps = raw.dt.tz_convert("UTC")
    elif raw.dtype.kind == "M":
        zone_used = _zone(table, profile)
        stamps = _localised(pd.Series(raw), table, index, zone_used)
    else:
        text = raw.astype("string").str.strip()
        empty = text.isna() | text.isin(_EMPTY)
        present = text[~empty]
        if present.empty:
            return np.full(len(raw), np.nan), ""
        with_offset = _carries_offset(str(present.iloc[0]), profile)
        parsed = _parse(text.where(~empty), profile, with_offset)
        bad = np.flatnonzero(parsed.isna().to_numpy() & ~empty.to_numpy())
        if bad.size:
            row = int(bad[0])
            raise InputError(
                f"{header} is '{shown_value(str(text.iloc[row]))}', not a date and time "
                f"written as {_format_words(profile)}",
                table.at(row, index),
                f"Check the [time] date_format of the import profile {profile.name}, or fix the stamp.",
            )
        if with_offset:
            stamps = parsed
        else:
            zone_used = _zone(table, profile)
            stamps = _localised(parsed, table, index, zone_used)
    nanos = stamps.to_numpy(dtype="datetime64[ns]", na_value=np.datetime64("NaT")).view(np.int64)
    valid = ~np.isnat(nanos.view("datetime64[ns]"))
    if not valid.any():
        return np.full(len(raw), np.nan), ""
    first = int(np.argmax(valid))
    _refuse_backwards(nanos, valid, table, index, zone_used)
    elapsed = np.where(valid, (nanos - nanos[first]) / 1e9, np.nan)
    start = pd.Timestamp(nanos[first], tz="UTC").isoformat().replace("+00:00", "Z")
    return elapsed, start


def _carries_offset(sample: str, profile: Profile) -> bool:
    if profile.date_format == ISO_8601:
        return bool(_OFFSET_AT_END.search(sample))
    return "%z" in profile.date_format or "%Z" in profile.date_format


def _parse(text: pd.Series, profile: Profile, with_offset: bool) -> pd.Series:
    fmt = "ISO8601" if profile.date_format == ISO_8601 else profile.date_format
    try:
        parsed = pd.to_datetime(text, format=fmt, errors="coerce", utc=with_offset)
    except (ValueError, TypeError, OverflowError):  # mixed offsets without utc, odd objects
        parsed = pd.Series(pd.NaT, index=text.index, dtype="datetime64[ns]")
    return parsed


def _zone(table: RawTable, profile: Profile) -> dt.tzinfo:
    if profile.zone_metadata is not None:
        written = table.metadata.get(profile.zone_metadata)
        if written:
            try:
                return parse_zone(written)
            except ValueError as exc:
                line = table.head.metadata_lines.get(profile.zone_metadata)
                raise InputError(
                    f"metadata {profile.zone_metadata} is '{shown_value(written)}', which {exc}",
                    table.head.ref(table.name, line),
                    ZONE_HINT,
                ) from None
    if profile.zone is not None:
        return parse_zone(profile.zone)
    where = (
        f"the metadata entry {profile.zone_metadata}, which the file lacks"
        if (profile.zone_metadata)
        else "no [time] zone"
    )
    raise InputError(
        f"the time stamps carry no UTC offset, and the import profile {profile.name} gives {where}",
        table.at(0, table.columns["time"]),
        'Set [time] zone to the zone of the cycler\'s clock (e.g. "Europe/Berlin", or "UTC" '
        "if it keeps UTC).",
    )


def localise(naive: pd.Series, zone: dt.tzinfo | str) -> pd.Series:
    """Naive local stamps read in ``zone`` -> stamps that know their zone.

    Raises ValueError (or TypeError) for a local time the zone skips, or one of a repeated
    hour whose pass the order of the rows cannot tell (pandas' inference, else
    :func:`_repeated_hour_by_order`, which allows a stamp written twice).
    """
    if isinstance(zone, dt.timezone):  # a fixed offset: nothing is skipped or repeated
        return naive.dt.tz_localize(zone)
    try:
        return naive.dt.tz_localize(zone, ambiguous="infer", nonexistent="raise")
    except (ValueError, TypeError):  # pytz-style errors are ValueErrors
        order = _repeated_hour_by_order(naive, zone)
        if order is None:
            raise
        return naive.dt.tz_localize(zone, ambiguous=order, nonexistent="raise")


def _localised(naive: pd.Series, table: RawTable, index: int, zone: dt.tzinfo) -> pd.Series:
    try:
        return localise(naive, zone).dt.tz_convert("UTC")
    except (ValueError, TypeError) as exc:
        row, why = _local_time_fault(naive, zone)
        raise InputError(
            f"{table.header(index)} is {naive.iloc[row]}, {why} in the zone {zone}",
            table.at(row, index),
            "Check the zone of the cycler's clock ([time] zone), or have the cycler write "
            "stamps with their UTC offset.",
        ) from exc


def _repeated_hour_by_order(naive: pd.Series, zone: dt.tzinfo | str) -> np.ndarray | None:
    """For each row, True when its local time is the first (summer) of a repeated hour.

    pandas tells the two passes through the repeated hour apart only when the stamps rise
    strictly; a cycler that writes whole seconds repeats a stamp now and then. Here, in each
    run of rows whose local time is repeated, the rows before the clock first goes back are
    its first pass and the rest its second. None when some run never goes back (the order
    cannot tell which pass it is).
    """
    try:
        marked = naive.dt.tz_localize(zone, ambiguous="NaT", nonexistent="NaT")
    except (ValueError, TypeError):
        return None
    repeated = (marked.isna() & naive.notna()).to_numpy()
    first_pass = np.zeros(len(naive), dtype=bool)
    if not repeated.any():
        return first_pass
    values = naive.to_numpy(dtype="datetime64[ns]")
    edges = np.flatnonzero(np.diff(np.concatenate(([0], repeated.astype(np.int8), [0]))))
    for start, end in zip(edges[::2], edges[1::2], strict=True):
        back = np.flatnonzero(np.diff(values[start:end]) < np.timedelta64(0, "ns"))
        if not back.size:
            return None
        first_pass[start : start + int(back[0]) + 1] = True
    return first_pass


def _local_time_fault(naive: pd.Series, zone: dt.tzinfo) -> tuple[int, str]:
    """The first row whose local time does not exist, or is repeated and cannot be told apart."""
    values = naive.to_list()
    for row, value in enumerate(values):
        if value is pd.NaT or value is None:
            continue
        plain = value.to_pydatetime()
        early = plain.replace(tzinfo=zone, fold=0)
        late = plain.replace(tzinfo=zone, fold=1)
        if early.utcoffset() != late.utcoffset():
            if early.astimezone(dt.UTC).astimezone(zone).replace(tzinfo=None) != plain:
                return row, "a time the clock skips when daylight-saving time begins"
            return row, (
                "in the hour the clock repeats when daylight-saving time ends, and the order "
                "of the rows does not tell which of the two it is"
            )
    return 0, "not a local time that can be placed"


def _refuse_backwards(
    nanos: IntArray, valid: np.ndarray, table: RawTable, index: int, zone: dt.tzinfo | None
) -> None:
    rows = np.flatnonzero(valid)
    steps = np.diff(nanos[rows])
    back = np.flatnonzero(steps < 0)
    if not back.size:
        return
    k = int(back[0])
    before, after = int(rows[k]), int(rows[k + 1])
    raw = table.frame[index]
    hint = "Time must never go back; check that the file is one run of one channel."
    if isinstance(zone, dt.timezone):  # the zone actually used, from the profile or the file
        hint = (
            f"The stamps were read at the fixed offset {zone}; if the cycler's clock follows "
            'daylight-saving time, give its zone name (e.g. "Europe/Berlin"); otherwise check '
            "that the file is one run of one channel."
        )
    raise InputError(
        f"the clock goes back {_seconds(-int(steps[k]))}, from {shown_value(str(raw.iloc[before]))} "
        f"on {table.place(before)} to {shown_value(str(raw.iloc[after]))}",
        table.at(after, index),
        hint,
    )


def _seconds(nanos: int) -> str:
    seconds = nanos / 1e9
    if seconds >= 120:
        return f"{seconds / 60:.4g} min"
    return f"{seconds:.6g} s"


def _format_words(profile: Profile) -> str:
    return ISO_8601 if profile.date_format == ISO_8601 else f'"{profile.date_format}"'
