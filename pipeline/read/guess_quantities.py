"""A guessed profile's decisions for the quantities besides time: units, sign, modes, counters.

Part of :mod:`pipeline.read.guess_columns`, given the column chosen for each quantity: the
voltage's unit (the header's, unless a cell's voltage cannot be in it) and the current's
(the header's, else what its largest value suggests); the reasons shown for temperature,
step and cycle; the current's sign convention from the first clearly non-zero current, which
in a formation program is a charge, or, for a current written as a magnitude beside a mode
column, which mode values mean charge, discharge and rest (by the voltage's trend in each);
and the units of the cycler's own capacity and energy counters, from the header or from the
unit in which they agree with formgate's integral. A column that cannot be read as chosen
(a counter that never changes, or agrees in no unit; a mode column beside a signed current)
is set aside, saying why.

Pure: a function of the columns.
"""

from __future__ import annotations

import math

import numpy as np

from pipeline.model import FloatArray
from pipeline.read.counters import compare_totals, same_step
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
from pipeline.read.profile_keys import (
    CAPACITY_UNITS,
    CURRENT_UNITS,
    ENERGY_UNITS,
    TIME_UNITS,
    VOLTAGE_UNITS,
)


def decide_voltage(guess: ColumnGuess, roles: dict[str, Column]) -> None:
    """The voltage column's unit: the header's, unless a cell's voltage cannot be in it."""
    column = roles.get("voltage")
    if column is None or column.numbers is None:
        return
    finite = np.abs(column.numbers[np.isfinite(column.numbers)])
    median = float(np.median(finite))
    by_range = "mV" if median > 100 else "V"
    guess.reasons["voltage"] = f"values {value_span(column.numbers)}"
    if column.unit and column.unit[0] == "voltage":
        unit = column.unit[1]
        if unit != by_range:
            guess.units["voltage"] = Decision(
                by_range,
                f"{UNSURE} the header says {column.unit_text!r}, but a cell's voltage of "
                f"{six_figures(median)} {unit} cannot be; the values say {by_range}",
            )
        else:
            guess.units["voltage"] = Decision(unit, unit_words(column))
        return
    guess.units["voltage"] = Decision(
        by_range, f"no unit in the header; a cell's voltage of {six_figures(median)} is in {by_range}"
    )


def decide_current(guess: ColumnGuess, roles: dict[str, Column]) -> FloatArray | None:
    """The current column's unit; returns the current in A (file sign) for the sign's guess."""
    column = roles.get("current")
    if column is None or column.numbers is None:
        return None
    values = column.numbers
    finite = np.abs(values[np.isfinite(values)])
    guess.reasons["current"] = f"values {value_span(values)}"
    if column.unit and column.unit[0] == "current":
        guess.units["current"] = Decision(column.unit[1], unit_words(column))
    else:
        largest = float(finite.max()) if finite.size else 0.0
        unit = "mA" if largest >= 200 else "A"
        guess.units["current"] = Decision(
            unit,
            f"{UNSURE} no unit in the header; the largest current is {six_figures(largest)}, "
            f"read as {unit}",
        )
    factor = CURRENT_UNITS[guess.units["current"].value]
    return values * factor


def decide_temperature(guess: ColumnGuess, roles: dict[str, Column]) -> None:
    """The temperature's reason: read in °C, unsure without a unit in the header."""
    column = roles.get("temperature")
    if column is None or column.numbers is None:
        return
    guess.reasons["temperature"] = f"values {value_span(column.numbers)} °C"
    if not (column.unit and column.unit[0] == "temperature"):
        guess.reasons["temperature"] = (
            f"{UNSURE} no unit in the header; read as °C ({value_span(column.numbers)})"
        )


def decide_steps(guess: ColumnGuess, roles: dict[str, Column]) -> None:
    """The reasons for the step and cycle columns."""
    for role in ("step", "cycle"):
        column = roles.get(role)
        if column is None or column.numbers is None:
            continue
        finite = column.numbers[np.isfinite(column.numbers)]
        guess.reasons[role] = f"whole numbers {value_span(column.numbers)}"
        if role == "step":
            guess.reasons[role] += f", {int((np.diff(finite) != 0).sum()) + 1} runs"


def _threshold(current: FloatArray) -> float:
    """A current clearly above the channel's noise: a tenth of the record's large currents."""
    finite = np.abs(current[np.isfinite(current)])
    if not finite.size:
        return 0.0
    return 0.1 * float(np.quantile(finite, 0.99))


def _negatives_words(current: FloatArray, clear_negatives: int, threshold: float) -> str:
    """What the current's negative values are, as the reason for a magnitude says it.

    A magnitude's rest rows may read just below zero (the channel's offset), so where any
    value is negative the words speak of the values below minus the threshold.

    >>> _negatives_words(np.array([0.0, 5.0, 10.0]), 0, 1.0)
    'the current is never negative'
    >>> _negatives_words(np.array([-0.003, 5.0, 10.0]), 0, 1.0)
    'the current is negative only near zero, never below -1'
    >>> _negatives_words(np.array([-0.003, -5.0, 10.0]), 1, 1.0)
    'the current is below -1 on only 1 row'
    """
    if not (current[np.isfinite(current)] < 0).any():
        return "the current is never negative"
    if not clear_negatives:
        return f"the current is negative only near zero, never below -{six_figures(threshold)}"
    rows = f"{clear_negatives} row{'s' if clear_negatives > 1 else ''}"
    return f"the current is below -{six_figures(threshold)} on only {rows}"


def decide_sign_and_modes(guess: ColumnGuess, roles: dict[str, Column], current: FloatArray | None) -> None:
    """The current's sign convention; for a magnitude beside a mode column, what each mode means."""
    if current is None:
        return
    threshold = _threshold(current)
    if threshold <= 0:
        guess.sign = Decision("charge positive", f"{UNSURE} the current is zero throughout")
        return
    clear = np.isfinite(current) & (np.abs(current) > threshold)
    negatives = int((current[clear] < 0).sum())
    negative = negatives > 0
    # a magnitude beside a mode column may still show a few negative rows: the channel's
    # reading at a step's switch, written as measured on a rest row
    few = negatives <= max(3, 0.002 * int(clear.sum()))
    mode = roles.get("mode")
    if mode is not None and few and _modes(guess, mode, roles, current, threshold):
        guess.sign = Decision(
            "from mode",
            f"{_negatives_words(current, negatives, threshold)}: a magnitude, its direction in {mode.header}",
        )
        return
    if mode is not None:
        why = f"{mode.header!r} (a mode column; the current carries its own sign, so it is not needed)"
        guess.set_aside(roles, "mode", why)
    first = _first_clear(current, clear)
    where = f"the first clear current (row {first + 1} of the data) is "
    if current[first] < 0:
        guess.sign = Decision(
            "discharge positive",
            where + "negative, and a formation program starts with a charge",
        )
    elif negative:
        guess.sign = Decision(
            "charge positive", where + "positive, and a formation program starts with a charge"
        )
    else:
        guess.sign = Decision(
            "charge positive",
            f"{UNSURE} no current is negative: if discharges are written positive too, the "
            "file needs a mode column",
        )


def _first_clear(current: FloatArray, clear: np.ndarray) -> int:
    """The first row of the first run of three clear currents of one sign (else the first clear row)."""
    rows = np.flatnonzero(clear)
    for row in rows.tolist():
        window = current[row : row + 3]
        if window.size == 3 and bool(np.all(np.sign(window) == np.sign(current[row]))):
            return int(row)
    return int(rows[0])


def _modes(
    guess: ColumnGuess,
    column: Column,
    roles: dict[str, Column],
    current: FloatArray,
    threshold: float,
) -> bool:
    """Which mode values mean charge, discharge and rest; False when it cannot be told."""
    voltage = roles.get("voltage")
    volts = voltage.numbers if voltage is not None and voltage.numbers is not None else None
    texts = np.array(column.texts, dtype=object)
    kinds: dict[str, str] = {}
    reasons: dict[str, str] = {}
    carrying: list[str] = []
    for value in column.distinct():
        rows = texts == value
        size = np.abs(current[rows])
        size = size[np.isfinite(size)]
        if not size.size or float(np.median(size)) <= 0.5 * threshold:
            kinds[value] = "rest"
        else:
            carrying.append(value)
    if not carrying:
        return False
    trends = {value: _trend(texts == value, volts) for value in carrying}
    for order, value in enumerate(carrying):
        trend = trends[value]
        if order == 0:
            kinds[value] = "charge"
            reasons[value] = "the first current-carrying mode: a formation program starts with a charge"
            if trend < 0:
                reasons[value] = f"{UNSURE} " + reasons[value] + ", though the voltage falls in it"
        elif trend > 0:
            kinds[value] = "charge"
            reasons[value] = "the voltage rises in it"
        elif trend < 0:
            kinds[value] = "discharge"
            reasons[value] = "the voltage falls in it"
        else:
            kinds[value] = _by_level(texts == value, texts, kinds, volts)
            reasons[value] = (
                f"{UNSURE} the voltage holds still in it (constant voltage), at the level of the "
                f"{kinds[value]} rows"
            )
    if "discharge" not in kinds.values():
        return False
    for kind in ("charge", "discharge", "rest"):
        values = [v for v, k in kinds.items() if k == kind]
        if values:
            guess.modes[kind] = values
    rest_values = guess.modes.get("rest", [])
    if rest_values:
        guess.mode_reasons["rest"] = "the current is about zero in " + ", ".join(repr(v) for v in rest_values)
    guess.mode_reasons["charge"] = "; ".join(
        f"{v!r}: {reasons[v]}" for v in guess.modes["charge"] if v in reasons
    )
    guess.mode_reasons["discharge"] = "; ".join(
        f"{v!r}: {reasons[v]}" for v in guess.modes["discharge"] if v in reasons
    )
    guess.reasons["mode"] = f"{len(kinds)} values: " + ", ".join(repr(v) for v in kinds)
    return True


def _trend(rows: np.ndarray, volts: FloatArray | None) -> int:
    """+1 when the voltage rises over the runs of ``rows``, -1 when it falls, 0 when it holds."""
    if volts is None:
        return 0
    change = 0.0
    total = 0.0
    idx = np.flatnonzero(rows)
    if idx.size < 2:
        return 0
    breaks = np.flatnonzero(np.diff(idx) != 1) + 1
    for run in np.split(idx, breaks):
        if run.size < 2:
            continue
        segment = volts[run]
        segment = segment[np.isfinite(segment)]
        if segment.size < 2:
            continue
        change += float(segment[-1] - segment[0])
        total += float(np.ptp(segment))
    scale = float(np.nanmedian(np.abs(volts))) if np.isfinite(volts).any() else 1.0
    # a constant-voltage hold moves less than a few thousandths of the cell's voltage
    if abs(change) <= 0.003 * scale or total == 0:
        return 0
    return 1 if change > 0 else -1


def _by_level(rows: np.ndarray, texts: np.ndarray, kinds: dict[str, str], volts: FloatArray | None) -> str:
    """Charge or discharge for a mode whose voltage holds: the one whose rows sit nearer its level."""
    if volts is None:
        return "charge"
    level = float(np.nanmedian(volts[rows]))
    best, distance = "charge", math.inf
    for kind in ("charge", "discharge"):
        members = [v for v, k in kinds.items() if k == kind]
        if not members:
            continue
        mask = np.isin(texts, members)
        if not mask.any():
            continue
        near = abs(float(np.nanmax(volts[mask]) if kind == "charge" else np.nanmin(volts[mask])) - level)
        if near < distance:
            best, distance = kind, near
    return best


def decide_counters(
    guess: ColumnGuess,
    roles: dict[str, Column],
    current: FloatArray | None,
    contiguous: int,
) -> None:
    """The units of the cycler's own counters, from the header or from formgate's integral."""
    time = roles.get("time")
    time_s = _seconds(guess, time)
    for role, units in (("capacity", CAPACITY_UNITS), ("energy", ENERGY_UNITS)):
        column = roles.get(role)
        if column is None or column.numbers is None:
            continue
        finite = column.numbers[np.isfinite(column.numbers)]
        if not finite.size or float(finite.min()) == float(finite.max()):
            guess.set_aside(roles, role, f"{column.header!r} (a {role} counter that never changes)")
            continue
        word = "charge" if role == "capacity" else "energy"
        guess.reasons[role] = f"the cycler's own {word} counter, {value_span(column.numbers)}"
        ratio: dict[str, float] = {}
        volts = _volts(guess, roles)
        if time_s is not None and current is not None and (role == "capacity" or volts is not None):
            n = min(contiguous, len(time_s))
            step = roles.get("step")
            numbers = None if step is None else step.numbers
            same = _usual_pairs(time_s[:n], same_step(current[:n], None if numbers is None else numbers[:n]))
            integrand = np.abs(current[:n])
            if role == "energy" and volts is not None:
                integrand = integrand * np.abs(volts[:n])
            theirs_raw, ours = compare_totals(column.numbers[:n], integrand, np.diff(time_s[:n]), same)
            if ours is not None and theirs_raw is not None and ours > 0 and theirs_raw > 0:
                ratio = {unit: theirs_raw * factor / ours for unit, factor in units.items()}
        if column.unit and column.unit[0] == role:
            unit = column.unit[1]
            why = unit_words(column)
            if unit in ratio:
                apart = abs(ratio[unit] - 1) * 100
                if apart > 10:
                    # a counter of one direction only, or of another convention: read, it
                    # would put a data-quality note on every certificate
                    guess.set_aside(
                        roles,
                        role,
                        f"{column.header!r} (the cycler's {role} counter in {unit}, "
                        f"{apart:.3g} % apart from formgate's integral: counting one direction "
                        "only, or in its own way)",
                    )
                    continue
                why += f"; it agrees with formgate's integral within {apart:.2g} %"
            guess.units[role] = Decision(unit, why)
            continue
        if not ratio:
            why = f"{column.header!r} (it may be the cycler's {role} counter; no unit in its header)"
            guess.set_aside(roles, role, why)
            continue
        unit, value = min(ratio.items(), key=lambda item: abs(math.log(item[1])) if item[1] > 0 else math.inf)
        if not 0.9 <= value <= 1.1:
            guess.set_aside(
                roles,
                role,
                f"{column.header!r} (it may be the cycler's {role} counter, but in no unit does it "
                "agree with formgate's integral)",
            )
            continue
        guess.units[role] = Decision(
            unit,
            f"{UNSURE} no unit in the header; in {unit} it agrees with formgate's integral within "
            f"{abs(value - 1) * 100:.2g} %",
        )


def _seconds(guess: ColumnGuess, time: Column | None) -> FloatArray | None:
    if time is None:
        return None
    if time.stamps is not None:
        nanos = as_nanos(time.stamps).astype(np.float64)
        nanos[as_nanos(time.stamps) == NAT] = np.nan
        return (nanos - np.nanmin(nanos)) / 1e9
    if time.numbers is None or "time" not in guess.units:
        return None
    seconds = time.numbers * TIME_UNITS[guess.units["time"].value]
    if guess.stamps.value == "step elapsed":
        return None  # integrals within steps would need the step's own time: not worth it here
    return seconds


def _volts(guess: ColumnGuess, roles: dict[str, Column]) -> FloatArray | None:
    column = roles.get("voltage")
    if column is None or column.numbers is None or "voltage" not in guess.units:
        return None
    return column.numbers * VOLTAGE_UNITS[guess.units["voltage"].value]


def _usual_pairs(time_s: FloatArray, same: np.ndarray) -> np.ndarray:
    """Pairs of rows within a step and at most ten sampling intervals apart.

    A gap (the hour a local clock skips, a pause of the channel) is left out of both sides:
    the unit is told by the ratio, and a gap's integral depends on the clock.
    """
    dt_s = np.diff(time_s)
    finite = np.isfinite(dt_s)
    positive = dt_s[finite & (dt_s > 0)]
    usual = 10 * float(np.median(positive)) if positive.size else np.inf
    return np.asarray(same & finite & (dt_s <= usual))
