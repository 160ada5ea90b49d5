"""The cycler's own charge and energy counters, compared with formgate's integrals.

Cyclers integrate current (and power) themselves and write the running total: per step,
per cycle or for the whole record, counting charge and discharge apart or netting them.
Whatever the cycler's convention, the counter changes within one step by as much charge
(or energy) as flowed, so the comparison adds up the size of each change from one row to
the next within a step (the change across a step boundary, where a counter may restart,
is left out) and sets it beside formgate's trapezoid integral of |I| (or |V·I|) over the
same pairs of rows. Steps come from the file's step column, else from its mode column,
else from where the current changes direction. Totals further apart than the profile's
tolerance give a data-quality note (not a blocking one: the counters are the cycler's
arithmetic, the judged values formgate's own, from the same samples).
"""

from __future__ import annotations

import numpy as np

from pipeline.model import FloatArray, IntArray, Note, SourceRef
from pipeline.read.cyclenumbers import numbers
from pipeline.read.profile import Profile
from pipeline.read.profile_keys import CAPACITY_UNITS, ENERGY_UNITS
from pipeline.read.table import RawTable

# a current below this share of the record's largest counts as no current (rest)
_REST_SHARE = 0.01


def counter_notes(
    table: RawTable,
    profile: Profile,
    time_s: FloatArray,
    voltage_v: FloatArray,
    current_a: FloatArray,
    step: IntArray | None,
    modes: np.ndarray | None = None,
) -> tuple[Note, ...]:
    """One note per counter whose total differs from formgate's by more than the tolerance.

    ``modes`` is each row's mode (charge, discharge, rest) where the file has a mode column.
    """
    pairs = same_step(current_a, step, modes)
    dt = np.diff(time_s)
    amps = np.abs(current_a)
    watts = np.abs(current_a * voltage_v)
    notes: list[Note] = []
    for counter, units, unit, integrand, word, shown_unit, scale in (
        ("capacity", CAPACITY_UNITS, profile.capacity_unit, amps, "charge", "Ah", 3600.0),
        ("energy", ENERGY_UNITS, profile.energy_unit, watts, "energy", "Wh", 3600.0),
    ):
        if counter not in table.columns:
            continue
        values = numbers(table, table.columns[counter], profile, units[unit])
        theirs, ours = compare_totals(values, integrand, dt, pairs)
        if theirs is None or ours is None:
            continue
        larger = max(abs(theirs), abs(ours))
        if larger == 0:
            continue
        apart = 100 * abs(theirs - ours) / larger
        if apart > profile.counter_tolerance_percent:
            header = table.header(table.columns[counter])
            notes.append(
                Note(
                    f"{counter}_counter_differs",
                    f"the cycler's {word} counter ({header}) adds up to "
                    f"{theirs / scale:.4g} {shown_unit} over the record's steps, formgate's "
                    f"integral to {ours / scale:.4g} {shown_unit}: {apart:.2g} % apart, more "
                    f"than the {profile.counter_tolerance_percent:g} % the import profile "
                    "allows; check the channel's calibration and the file's sampling",
                    SourceRef(table.name),
                )
            )
    return tuple(notes)


def compare_totals(
    counter: FloatArray, integrand: FloatArray, dt: FloatArray, pairs: np.ndarray
) -> tuple[float | None, float | None]:
    """(the counter's total change, the trapezoid integral) over the pairs within a step.

    >>> t = np.array([0.0, 1, 2, 3]); i = np.array([2.0, 2, 2, 2])
    >>> compare_totals(np.array([0.0, 2, 4, 6]), i, np.diff(t), np.array([True, True, True]))
    (6.0, 6.0)
    """
    pair = pairs & np.isfinite(dt) & np.isfinite(counter[1:]) & np.isfinite(counter[:-1])
    pair &= np.isfinite(integrand[1:]) & np.isfinite(integrand[:-1])
    if not pair.any():
        return None, None
    theirs = float(np.abs(np.diff(counter))[pair].sum())
    ours = float((0.5 * (integrand[1:] + integrand[:-1]) * dt)[pair].sum())
    return theirs, ours


def same_step(
    current_a: FloatArray, step: IntArray | FloatArray | None, modes: np.ndarray | None = None
) -> np.ndarray:
    """For each pair of neighbouring rows, whether both are in one step: by the step numbers,
    else the modes, else the direction of the current (a hundredth of its largest value
    counts as none). Profile guessing asks the same of a file it has not read yet."""
    if step is not None:
        return np.asarray(step[1:] == step[:-1])
    if modes is not None:
        return np.asarray(modes[1:] == modes[:-1])
    finite = np.abs(current_a[np.isfinite(current_a)])
    band = _REST_SHARE * (float(finite.max()) if finite.size else 0.0)
    direction = np.where(current_a > band, 1, np.where(current_a < -band, -1, 0))
    return np.asarray(direction[1:] == direction[:-1])
