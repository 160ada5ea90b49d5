"""What a cycle file's columns hold, guessed from their headers and values, for a guessed profile.

The second half of :mod:`pipeline.read.guess`: given a table of sampled cells (text from a
delimited file, or typed values from a workbook or a Parquet file), it decides which column
is time, voltage, current, temperature, step, cycle, mode, capacity and energy, each one's
unit, how the time counts (elapsed, date-time stamps with their pattern and zone, or time
since the step began), the current's sign convention and, for a current written as a
magnitude, which mode values mean charge, discharge and rest. Each decision carries the
reason a person checking the profile reads beside the key, and says when it is unsure.

The evidence, in order of weight: a unit in the header ("(mV)", "[s]", "_mA", "/V"), words
in the header (voltage, current, step, ...), then the values (a Li-ion or Na-ion cell's
voltage lies between about 0.5 and 5.5 V; step and cycle numbers are small whole numbers;
a mode column holds a handful of words). The sign comes from the first clearly non-zero
current, which in a formation program is a charge.

This module weighs that evidence to give each quantity its column (``assign_roles``) and
runs the decisions in turn (``guess_columns``). Reading a sampled column (its header, its
numbers or date-times) is left to :mod:`pipeline.read.guess_cells`; the time's decisions
(its kind, unit, date format and zone) to :mod:`pipeline.read.guess_time`; the other
quantities' (units, sign, modes, counters) to :mod:`pipeline.read.guess_quantities`.

Pure: a function of the cells.
"""

from __future__ import annotations

import itertools
import re
from collections import Counter
from collections.abc import Sequence

import numpy as np

from pipeline.read.guess_cells import FOREIGN_UNITS, Column, ColumnGuess, value_span
from pipeline.read.guess_quantities import (
    decide_counters,
    decide_current,
    decide_sign_and_modes,
    decide_steps,
    decide_temperature,
    decide_voltage,
)
from pipeline.read.guess_time import decide_time, time_problem

ROLES: tuple[str, ...] = (
    "time",
    "voltage",
    "current",
    "temperature",
    "step",
    "cycle",
    "mode",
    "capacity",
    "energy",
)
# A Li-ion or Na-ion cell's voltage, in V: anything outside is not a cell's voltage.
VOLTAGE_RANGE_V = (0.5, 5.5)
TEMPERATURE_RANGE_C = (-40.0, 150.0)
# A mode column holds a handful of words.
MAX_MODES = 20


# ---------------------------------------------------------------- roles


def _values_fit(column: Column, role: str) -> bool:
    """Whether the values could be the quantity at all."""
    numbers = column.numbers
    finite = numbers[np.isfinite(numbers)] if numbers is not None else np.array([])
    if role == "time":
        return column.stamps is not None or finite.size > 1
    if role == "mode":
        distinct = column.distinct()
        if numbers is not None:
            return column.whole and len(distinct) <= MAX_MODES and bool({"mode"} & column.words)
        words = all(re.search(r"[^\W\d_]", v) for v in distinct)  # not dates, times or numbers
        few = 1 <= len(distinct) <= MAX_MODES
        return column.stamps is None and words and few and _runs_long(column.texts)
    if numbers is None or finite.size == 0:
        return False
    if role == "voltage":
        median = float(np.median(np.abs(finite)))
        low, high = VOLTAGE_RANGE_V
        return low <= median <= high or 1000 * low <= median <= 1000 * high
    if role == "temperature":
        median = float(np.median(finite))
        return TEMPERATURE_RANGE_C[0] <= median <= TEMPERATURE_RANGE_C[1]
    if role in ("step", "cycle"):
        if not column.whole or finite.min() < 0 or finite.max() > 1e6:
            return False
        if role == "cycle" and bool(np.any(np.diff(finite) < 0)):
            return False
        return _runs_long(column.texts)
    return True  # current, capacity, energy: any numbers


def _runs_long(texts: Sequence[str]) -> bool:
    """Values that stay for a few rows at a time (a step's number, a mode), not each row's own."""
    if len(texts) < 4:
        return True
    changes = sum(1 for a, b in itertools.pairwise(texts) if a != b)
    return changes <= len(texts) / 3


def _score(column: Column, role: str) -> float:
    """How well the header and the values say that ``column`` is ``role`` (0: not at all)."""
    if not _values_fit(column, role):
        return 0.0
    score = 0.0
    quantity = column.unit[0] if column.unit else None
    if column.foreign_unit and FOREIGN_UNITS[column.foreign_unit.lower()] == role:
        return 0.0  # a unit no profile converts
    if quantity == role:
        score += 3.0
    elif quantity is not None and quantity not in ("time",) and role not in ("step", "cycle", "mode"):
        score -= 3.0  # the header's unit names another quantity
    if role in column.words:
        score += 2.0
    # a time column's word "t" against a temperature's °C
    if role == "time" and quantity == "temperature":
        score -= 5.0
    if role in ("step", "cycle") and ("time" in column.words or quantity is not None):
        score -= 3.0  # step time, step capacity: not the step's number
    if role == "mode" and "step" in column.words and "mode" not in column.words:
        score -= 1.0
    if role == "time" and "step" in column.words:
        score -= 0.5  # time since the step began, if nothing better
    if role == "capacity" and quantity != "capacity" and "capacity" not in column.words:
        score -= 1.0
    if score <= 0:
        return 0.0
    return score + _value_bonus(column, role)


def _value_bonus(column: Column, role: str) -> float:
    numbers = column.numbers
    if role == "time":
        if column.stamps is not None:
            return 1.0
        if numbers is not None:
            finite = numbers[np.isfinite(numbers)]
            return 1.5 if finite.size > 1 and bool(np.all(np.diff(finite) >= 0)) else 0.5
    if role == "voltage" and numbers is not None:
        finite = np.abs(numbers[np.isfinite(numbers)])
        low, high = VOLTAGE_RANGE_V
        inside = ((finite >= low) & (finite <= high)) | ((finite >= 1000 * low) & (finite <= 1000 * high))
        return 1.0 if bool(inside.all()) else 0.0
    return 0.5


def _value_only_score(column: Column, role: str) -> float:
    """For headers that say nothing: values alone, weaker than any header."""
    if not _values_fit(column, role) or column.unit or column.foreign_unit:
        return 0.0
    numbers = column.numbers
    if role == "voltage" and numbers is not None:
        return 0.5 * _value_bonus(column, role)
    if role == "time" and (column.stamps is not None or numbers is not None):
        if column.stamps is not None:
            return 0.6
        assert numbers is not None
        finite = numbers[np.isfinite(numbers)]
        rising = finite.size > 2 and bool(np.all(np.diff(finite) > 0))
        return 0.4 if rising else 0.0
    if role == "current" and numbers is not None:
        finite = numbers[np.isfinite(numbers)]
        return 0.3 if finite.size and finite.min() < 0 < finite.max() else 0.0
    if role == "mode" and numbers is None:
        return 0.3
    return 0.0


def assign_roles(columns: Sequence[Column]) -> dict[str, Column]:
    """Each quantity -> the column that best shows it: header evidence first, each column once."""
    pairs: list[tuple[float, int, Column, str]] = []
    for column in columns:
        if column.empty:
            continue
        for order, role in enumerate(ROLES):
            score = _score(column, role) or _value_only_score(column, role)
            if score > 0:
                pairs.append((score, -order, column, role))
    pairs.sort(key=lambda p: (p[0], p[1], -p[2].index), reverse=True)
    roles: dict[str, Column] = {}
    used: set[int] = set()
    for _, _, column, role in pairs:
        if role in roles or column.index in used:
            continue
        roles[role] = column
        used.add(column.index)
    return roles


# ---------------------------------------------------------------- the guess


def guess_columns(
    columns: Sequence[Column],
    metadata: dict[str, str],
    contiguous: int,
) -> ColumnGuess:
    """Roles, units, time, sign and modes of ``columns``.

    ``contiguous``: how many of the first sampled rows follow each other in the file.
    """
    guess = ColumnGuess()
    roles = assign_roles(columns)
    headers = Counter(c.header for c in columns)
    for role, column in list(roles.items()):
        if headers[column.header] < 2:
            continue
        # the reader finds a column by its header: one written twice cannot be read
        twice = f"{column.header!r} (its header stands over {headers[column.header]} columns)"
        if role in ("time", "voltage", "current"):
            guess.problems.append(
                f"the header {column.header} stands over {headers[column.header]} columns, so "
                f"formgate cannot tell which is the {role}; have the export name them apart"
            )
        else:
            guess.set_aside(roles, role, twice)
    for role in ("time", "voltage", "current"):
        if role not in roles:
            why = time_problem(columns) if role == "time" else ""
            guess.problems.append(
                why
                or f"no column was found for {role} (headers: {', '.join(c.header for c in columns)}); "
                f"name it under [columns] {role}"
            )
    decide_time(guess, roles, metadata)
    decide_voltage(guess, roles)
    current = decide_current(guess, roles)
    decide_temperature(guess, roles)
    decide_steps(guess, roles)
    decide_sign_and_modes(guess, roles, current)
    decide_counters(guess, roles, current, contiguous)
    guess.roles = roles
    chosen = {c.index for c in roles.values()}
    for column in columns:
        if column.index in chosen:
            continue
        guess.unread.append(guess.aside.get(column.index) or _why_unread(column))
    return guess


def _why_unread(column: Column) -> str:
    if column.empty:
        return f"{column.header!r} (empty)"
    if column.foreign_unit:
        quantity = FOREIGN_UNITS[column.foreign_unit.lower()]
        return (
            f"{column.header!r} (a {quantity} in {column.foreign_unit}, which a profile cannot "
            "convert)"
        )
    if column.numbers is None and column.stamps is None:
        distinct = column.distinct()
        shown = ", ".join(repr(v) for v in distinct[:3]) + (", ..." if len(distinct) > 3 else "")
        return f"{column.header!r} (text: {shown})"
    if column.stamps is not None:
        return f"{column.header!r} (dates and times; another column is the time)"
    return f"{column.header!r} (numbers {value_span(column.numbers) if column.numbers is not None else ''})"


def most_common(values: Sequence[int]) -> int:
    """The most common of ``values`` (the larger on a tie)."""
    counts = Counter(values)
    return max(counts, key=lambda v: (counts[v], v))
