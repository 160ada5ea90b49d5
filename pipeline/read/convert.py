"""RawTable -> Trace: units, the current's sign, the time base and the cycler's counters applied.

The same for every layout (text, workbook, Parquet): voltage in V, current in A with
positive = charge, time in seconds since the record began (from elapsed time, date-time
stamps or time since the step began, :mod:`pipeline.read.clock`), step and cycle numbers
whole. A current written as a magnitude takes its sign from the mode column (charge +,
discharge -, rest rows as written, so that the rest band still sees the channel's zero
offset); a mode value the profile does not list is an error naming its row. The cycler's
own capacity and energy counters, where the profile names them, are compared with
formgate's integrals (:mod:`pipeline.read.counters`) and a disagreement becomes a
data-quality note. Pure: a function of the table and the profile.
"""

from __future__ import annotations

import numpy as np

from pipeline.errors import InputError
from pipeline.model import FloatArray, Note, Trace
from pipeline.read.bounds import shown_value
from pipeline.read.clock import date_time_elapsed, time_since_step_began
from pipeline.read.counters import counter_notes
from pipeline.read.cyclenumbers import numbers, whole_numbers
from pipeline.read.profile import Profile
from pipeline.read.profile_keys import CURRENT_SIGNS, CURRENT_UNITS, TIME_UNITS, VOLTAGE_UNITS
from pipeline.read.table import RawTable


def to_trace(table: RawTable, profile: Profile) -> Trace:
    """The record in v1 units (s, V, A; positive = charge). Raises InputError."""
    columns = table.columns
    whole = {q: whole_numbers(table, i, profile, q) for q, i in columns.items() if q in ("step", "cycle")}
    metadata = dict(table.metadata)
    if profile.time_stamps == "date-time":
        time_s, started = date_time_elapsed(table, columns["time"], profile)
        if started:
            metadata.setdefault("started_at", started)
    else:
        time_s = numbers(table, columns["time"], profile, TIME_UNITS[profile.time_unit])
        if profile.time_stamps == "step elapsed":
            time_s = time_since_step_began(table, profile, time_s, whole["step"])
    voltage = numbers(table, columns["voltage"], profile, VOLTAGE_UNITS[profile.voltage_unit])
    modes = mode_kinds(table, profile) if profile.signed_by_mode else None
    if modes is not None:
        current = _signed_by_mode(table, profile, modes)
    else:
        factor = CURRENT_UNITS[profile.current_unit] * CURRENT_SIGNS[profile.current_sign]
        current = numbers(table, columns["current"], profile, factor)
    temperature = None
    if "temperature" in columns:
        temperature = numbers(table, columns["temperature"], profile, 1.0)
    notes: tuple[Note, ...] = ()
    if profile.compare_counters and ("capacity" in columns or "energy" in columns):
        notes = counter_notes(table, profile, time_s, voltage, current, whole.get("step"), modes)
    return Trace(
        source=table.name,
        metadata=metadata,
        time_s=time_s,
        voltage_v=voltage,
        current_a=current,
        temperature_c=temperature,
        step=whole.get("step"),
        cycle=whole.get("cycle"),
        first_data_line=table.first_data_line,
        notes=notes,
        places=table.places,
    )


def _signed_by_mode(table: RawTable, profile: Profile, kinds: np.ndarray) -> FloatArray:
    index = table.columns["current"]
    magnitude = numbers(table, index, profile, CURRENT_UNITS[profile.current_unit])
    sign = np.where(kinds == "charge", 1.0, np.where(kinds == "discharge", -1.0, np.nan))
    rest = kinds == "rest"
    empty = kinds == ""
    signed: FloatArray = np.where(rest, magnitude, np.abs(magnitude) * sign)
    signed[empty] = np.nan  # a row whose mode is missing is a row with no current
    signed.setflags(write=False)
    return signed


def mode_kinds(table: RawTable, profile: Profile) -> np.ndarray:
    """Each row's mode as "charge", "discharge", "rest", or "" where the field is empty."""
    index = table.columns["mode"]
    series = table.frame[index]
    if series.dtype.kind == "f":  # numbers: 1.0 is written 1 in a profile
        as_text = [
            "" if np.isnan(v) else (str(int(v)) if float(v).is_integer() else repr(v))
            for v in series.to_numpy()
        ]
    else:
        as_text = ["" if v is None or v != v else str(v).strip() for v in series.to_list()]
    values = np.array(as_text, dtype=object)
    kinds = np.full(len(values), "", dtype=object)
    for value in np.unique(values):
        if value == "":
            continue
        kind = profile.modes.get(value)
        if kind is None:
            row = int(np.flatnonzero(values == value)[0])
            listed = ", ".join(f"'{v}' ({k})" for v, k in profile.modes.items())
            shown = shown_value(value)
            raise InputError(
                f"{table.header(index)} is '{shown}', not a mode the import profile lists",
                table.at(row, index),
                f"The profile {profile.name} knows {listed}; add the value to the list under "
                "[mode] that it means.",
            )
        kinds[values == value] = kind
    return kinds
