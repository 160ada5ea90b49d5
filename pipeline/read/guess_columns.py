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

Pure: a function of the cells.

>>> header_unit("Cell voltage (mV)"), header_unit("t_ms"), header_unit("Step no")
('mV', 'ms', None)
"""

from __future__ import annotations

import datetime as dt
import itertools
import math
import re
from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from pipeline.model import FloatArray
from pipeline.read.clock import localise
from pipeline.read.profile import (
    CAPACITY_UNITS,
    CURRENT_UNITS,
    ENERGY_UNITS,
    ISO_8601,
    TIME_UNITS,
    VOLTAGE_UNITS,
    parse_zone,
)

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
UNSURE = "unsure:"

# Unit text in a header -> (quantity, the profile's unit). Temperatures are read in °C.
_UNITS: dict[str, tuple[str, str]] = {
    "s": ("time", "s"),
    "sec": ("time", "s"),
    "secs": ("time", "s"),
    "second": ("time", "s"),
    "seconds": ("time", "s"),
    "ms": ("time", "ms"),
    "msec": ("time", "ms"),
    "min": ("time", "min"),
    "mins": ("time", "min"),
    "minute": ("time", "min"),
    "minutes": ("time", "min"),
    "h": ("time", "h"),
    "hr": ("time", "h"),
    "hrs": ("time", "h"),
    "hour": ("time", "h"),
    "hours": ("time", "h"),
    "v": ("voltage", "V"),
    "volt": ("voltage", "V"),
    "volts": ("voltage", "V"),
    "mv": ("voltage", "mV"),
    "a": ("current", "A"),
    "amp": ("current", "A"),
    "amps": ("current", "A"),
    "ma": ("current", "mA"),
    "°c": ("temperature", "°C"),
    "ºc": ("temperature", "°C"),
    "degc": ("temperature", "°C"),
    "c": ("temperature", "°C"),
    "celsius": ("temperature", "°C"),
    "ah": ("capacity", "Ah"),
    "mah": ("capacity", "mAh"),
    "as": ("capacity", "As"),
    "wh": ("energy", "Wh"),
    "mwh": ("energy", "mWh"),
    "j": ("energy", "J"),
}
# Units a header may name that no profile converts: the column is not read, and the
# comment says why.
_FOREIGN_UNITS: dict[str, str] = {
    "µa": "current",
    "ua": "current",
    "ka": "current",
    "kv": "voltage",
    "µv": "voltage",
    "k": "temperature",
    "°f": "temperature",
    "degf": "temperature",
    "kwh": "energy",
    "ws": "energy",
    "kah": "capacity",
    "d": "time",
    "days": "time",
}
# Words of a header (lower case) that point to a quantity: whole words, or parts of a
# longer word (e.g. "stepno") for the longer ones.
_WORDS: dict[str, tuple[str, ...]] = {
    "time": ("time", "elapsed", "duration", "date", "timestamp", "clock", "runtime", "t"),
    "voltage": ("voltage", "volt", "potential", "ecell", "vcell", "u", "v"),
    "current": ("current", "curr", "amp", "i"),
    "temperature": ("temperature", "temp", "celsius", "therm", "ntc"),
    "step": ("step", "stepno", "stp"),
    "cycle": ("cycle", "cyc", "loop"),
    "mode": ("mode", "state", "status", "type", "control", "md", "kind"),
    "capacity": ("capacity", "cap", "q"),
    "energy": ("energy", "wh"),
}
# A Li-ion or Na-ion cell's voltage, in V: anything outside is not a cell's voltage.
VOLTAGE_RANGE_V = (0.5, 5.5)
TEMPERATURE_RANGE_C = (-40.0, 150.0)
# A mode column holds a handful of words.
MAX_MODES = 20
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


@dataclass
class Cells:
    """One column of the sample: its header and each sampled cell (text, or a typed value)."""

    index: int
    header: str
    cells: list[object]


@dataclass
class Column:
    """One column as the guess sees it: its text, numbers or date-times, and header evidence."""

    index: int
    header: str
    texts: list[str]
    numbers: FloatArray | None = None  # every non-empty cell a number (NaN where empty)
    whole: bool = False  # numbers, all whole
    stamps: pd.Series | None = None  # every non-empty cell a date-time
    date_format: str | None = None  # ISO 8601 or a strftime pattern; None for typed date-times
    with_offset: bool = False
    durations: bool = False  # duration cells of a workbook, as seconds
    date_note: str = ""
    unit_text: str | None = None
    unit: tuple[str, str] | None = None  # (quantity, unit) from the header
    foreign_unit: str | None = None  # a unit no profile converts
    words: set[str] = field(default_factory=set)

    @property
    def empty(self) -> bool:
        return all(not t for t in self.texts)

    def distinct(self) -> list[str]:
        """The distinct non-empty texts, in order of first appearance."""
        return list(dict.fromkeys(t for t in self.texts if t))


@dataclass
class Decision:
    """A key's value and the reason written beside it (starting with 'unsure:' when unsure)."""

    value: str
    why: str = ""


@dataclass
class ColumnGuess:
    """Everything the guess decided about the columns."""

    roles: dict[str, Column] = field(default_factory=dict)
    reasons: dict[str, str] = field(default_factory=dict)
    units: dict[str, Decision] = field(default_factory=dict)
    stamps: Decision = field(default_factory=lambda: Decision("elapsed"))
    date_format: Decision | None = None
    zone: Decision | None = None
    zone_metadata: str | None = None
    sign: Decision = field(default_factory=lambda: Decision("charge positive"))
    modes: dict[str, list[str]] = field(default_factory=dict)
    mode_reasons: dict[str, str] = field(default_factory=dict)
    unread: list[str] = field(default_factory=list)  # comments on columns left out
    aside: dict[int, str] = field(default_factory=dict)  # why a column first chosen was left out
    problems: list[str] = field(default_factory=list)  # what the profile cannot express


    def set_aside(self, roles: dict[str, Column], role: str, why: str) -> None:
        """Leave out the column first chosen for ``role``, saying why."""
        self.aside[roles.pop(role).index] = why


# ---------------------------------------------------------------- the header


def header_unit(header: str) -> str | None:
    """The unit text a header names: in brackets, after a slash, or its last word after _ or a space."""
    text = header.strip()
    found = re.search(r"[(\[{<]\s*([^()\[\]{}<>]*?)\s*[)\]}>]", text)
    if found and found[1]:
        return found[1]
    if "/" in text:
        return text.rsplit("/", 1)[1].strip() or None
    found = re.search(r"(?:[_ ]|^)(°C|ºC|°F|µA|µV|[A-Za-z]+)$", text)
    if found and found.start() > 0:
        tail = found[1]
        if tail.lower() in _UNITS or tail.lower() in _FOREIGN_UNITS:
            return tail
    return None


def _unit_of(text: str | None) -> tuple[tuple[str, str] | None, str | None]:
    """(quantity, unit) for a header's unit text, or the text of a unit no profile converts."""
    if text is None:
        return None, None
    key = text.strip().lower()
    for candidate in (key, key.replace(" ", "")):  # "deg C" as "degc"
        if candidate in _UNITS:
            return _UNITS[candidate], None
        if candidate in _FOREIGN_UNITS:
            return None, text.strip()
    return None, None


def _header_words(header: str, unit_text: str | None) -> set[str]:
    """The quantities the header's words name (its unit left out): "Step time" names step and time."""
    text = header
    if unit_text:
        cut = text.rfind(unit_text)
        if cut >= 0:
            text = text[:cut] + text[cut + len(unit_text) :]
    # split camel case (StepIndex -> Step Index) before lowering
    text = re.sub(r"(?<=[a-z])(?=[A-Z])", " ", text).lower()
    words = set(re.findall(r"[a-z]+", text))
    found: set[str] = set()
    for role, keys in _WORDS.items():
        for key in keys:
            if key in words or (len(key) >= 4 and any(key in w for w in words)):
                found.add(role)
    return found


# ---------------------------------------------------------------- values


_NUMBER = {
    ".": re.compile(r"[ \t]*[+-]?(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+)(?:[eE][+-]?[0-9]+)?[ \t]*"),
    ",": re.compile(r"[ \t]*[+-]?(?:[0-9]+(?:,[0-9]*)?|,[0-9]+)(?:[eE][+-]?[0-9]+)?[ \t]*"),
}
_COMMA_DECIMAL = re.compile(r"[+-]?[0-9]+,[0-9]+")
_POINT_DECIMAL = re.compile(r"[+-]?[0-9]*\.[0-9]+")


def decimal_mark(texts: Sequence[str]) -> tuple[str, int, int]:
    """',' when numbers look like 3,412 and none like 3.412; with the counts of each kind."""
    commas = sum(1 for t in texts if _COMMA_DECIMAL.fullmatch(t))
    points = sum(1 for t in texts if _POINT_DECIMAL.fullmatch(t))
    return ("," if commas > points else "."), commas, points


def _text_values(cells: list[object], decimal: str) -> tuple[list[str], FloatArray | None]:
    """Cells that are all text (a delimited file's): the texts, and their numbers when all are numbers."""
    series = pd.Series(cells, dtype=object).str.strip()
    texts: list[str] = series.tolist()
    empty = (series == "").to_numpy()
    numeric = series.str.fullmatch(_NUMBER[decimal].pattern).to_numpy(dtype=bool) | empty
    if not numeric.all():
        return texts, None
    plain = series.where(~empty, None)
    if decimal != ".":
        plain = plain.str.replace(decimal, ".", regex=False)
    values = pd.to_numeric(plain, errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan)
    return texts, values


def _text_column(cells: Cells, decimal: str) -> Column:
    texts, array = _text_values(cells.cells, decimal)
    column = _with_header(Column(cells.index, cells.header, texts))
    if array is not None and any(texts):
        _set_numbers(column, array)
    elif any(texts):
        _read_date_texts(column)
    return column


def make_column(cells: Cells, decimal: str) -> Column:
    """A sampled column with its numbers (under ``decimal``), date-times and header evidence."""
    if all(type(cell) is str for cell in cells.cells):
        return _text_column(cells, decimal)
    texts: list[str] = []
    values: list[float] = []
    numeric = True
    typed_dates: list[object] = []
    all_dates = True
    durations = False
    number = _NUMBER[decimal]
    for cell in cells.cells:
        if cell is None or (isinstance(cell, float) and math.isnan(cell)) or cell == "":
            texts.append("")
            values.append(math.nan)
            typed_dates.append(None)
            continue
        if isinstance(cell, dt.date | pd.Timestamp | np.datetime64):
            texts.append(str(cell))
            typed_dates.append(cell)
            numeric = False
            continue
        all_dates = False
        if isinstance(cell, dt.timedelta):  # a duration cell: the reader reads it as time
            texts.append(str(cell))
            values.append(cell.total_seconds())
            durations = True
            continue
        if isinstance(cell, bool):
            texts.append(str(cell))
            numeric = False
        elif isinstance(cell, int | float | np.integer | np.floating):
            texts.append(_number_text(cell))
            values.append(float(cell))
        else:
            text = str(cell).strip()
            texts.append(text)
            if numeric and number.fullmatch(text):
                values.append(float(text.strip().replace(decimal, ".")))
            else:
                numeric = False
    column = _with_header(Column(cells.index, cells.header, texts))
    if not any(texts):
        return column
    if numeric and len(values) == len(texts):
        _set_numbers(column, np.array(values, dtype=np.float64))
        column.durations = durations
    elif all_dates and any(d is not None for d in typed_dates):
        zoned = any(getattr(d, "tzinfo", None) is not None for d in typed_dates)
        stamps = pd.to_datetime(pd.Series(typed_dates, dtype=object), errors="coerce", utc=zoned)
        column.stamps = pd.Series(stamps)
        column.with_offset = zoned
    else:
        _read_date_texts(column)
    return column


def _with_header(column: Column) -> Column:
    """The column with what its header says: its unit and the quantities its words name."""
    column.unit_text = header_unit(column.header)
    column.unit, column.foreign_unit = _unit_of(column.unit_text)
    column.words = _header_words(column.header, column.unit_text)
    return column


def _set_numbers(column: Column, array: FloatArray) -> None:
    column.numbers = array
    finite = array[np.isfinite(array)]
    column.whole = bool(finite.size) and bool(np.all(finite == np.round(finite)))


def _number_text(value: object) -> str:
    number = float(value)  # type: ignore[arg-type]
    return str(int(number)) if number.is_integer() and abs(number) < 2**53 else repr(number)


# ---------------------------------------------------------------- date-time text

_STAMP = re.compile(
    r"(?P<a>\d{1,4})(?P<s>[./-])(?P<b>\d{1,2})(?P=s)(?P<c>\d{1,4})(?P<t>T|\s+)"
    r"(?P<H>\d{1,2}):(?P<M>\d{2})(?::(?P<S>\d{2})(?:(?P<fs>[.,])(?P<f>\d+))?)?"
    r"(?P<ps>\s*)(?P<p>[AaPp][Mm])?(?P<zs>\s*)(?P<z>Z|[+-]\d{2}:?\d{2})?"
)
_OFFSET_AT_END = re.compile(r"(?:[Zz]|[+-]\d{2}(?::?\d{2})?)\s*$")


def _read_date_texts(column: Column) -> None:
    """Find the date-time pattern every sampled text of ``column`` is written in, if any."""
    present = [t for t in column.texts if t]
    first = _STAMP.fullmatch(present[0])
    if first is None:
        return
    series = pd.Series([t if t else None for t in column.texts], dtype=object)
    candidates = _date_candidates(first)
    fits: list[tuple[str, pd.Series]] = []
    for fmt in candidates:
        with_offset = bool(_OFFSET_AT_END.search(present[0])) if fmt == ISO_8601 else "%z" in fmt
        parsed = _parse_dates(series, fmt, with_offset)
        if parsed is not None:
            fits.append((fmt, parsed))
            if fmt == ISO_8601:
                break  # ISO 8601 read: nothing else is tried
    if not fits:
        column.date_note = (
            f"the texts look like dates and times ({present[0]!r}) but no pattern reads all of them"
        )
        return
    fmt, parsed = _best_dates(fits, column)
    column.stamps = parsed
    column.date_format = fmt
    column.with_offset = (fmt == ISO_8601 and bool(_OFFSET_AT_END.search(present[0]))) or "%z" in fmt


def _date_candidates(first: re.Match[str]) -> list[str]:
    sep = first["s"]
    between = "T" if first["t"] == "T" else " "
    if first["p"]:
        clock = "%I:%M"
    else:
        clock = "%H:%M"
    if first["S"] is not None:
        clock += ":%S"
        if first["f"] is not None:
            clock += f"{first['fs']}%f"
    if first["p"]:
        clock += (" " if first["ps"] else "") + "%p"
    if first["z"]:
        clock += (" " if first["zs"] else "") + "%z"
    if len(first["a"]) == 4:  # year first
        candidates = [f"%Y{sep}%m{sep}%d"]
        if sep == "-" and not first["p"]:
            return [ISO_8601, *(d + between + clock for d in candidates)]
        candidates.append(f"%Y{sep}%d{sep}%m")
    else:
        year = "%Y" if len(first["c"]) == 4 else "%y"
        # the usual order for the separator first: day.month.year, month/day/year
        if sep == "/":
            candidates = [f"%m/%d/{year}", f"%d/%m/{year}"]
        else:
            candidates = [f"%d{sep}%m{sep}{year}", f"%m{sep}%d{sep}{year}"]
    return [d + between + clock for d in candidates]


def _parse_dates(series: pd.Series, fmt: str, with_offset: bool) -> pd.Series | None:
    """The texts as date-times in ``fmt`` (as the reader parses them), None unless all are read."""
    try:
        parsed = pd.to_datetime(
            series,
            format="ISO8601" if fmt == ISO_8601 else fmt,
            errors="coerce",
            utc=with_offset,
        )
    except (ValueError, TypeError, OverflowError):
        return None
    if bool((parsed.isna() & series.notna()).any()):
        return None
    return pd.Series(parsed)


def _best_dates(fits: list[tuple[str, pd.Series]], column: Column) -> tuple[str, pd.Series]:
    """Of the patterns that read every stamp, the one whose clock runs forward in the smallest steps."""
    if len(fits) == 1:
        return fits[0]

    def disorder(parsed: pd.Series) -> tuple[int, float]:
        ns = _nanos(parsed)
        ns = ns[ns != _NAT]
        steps = np.diff(ns)
        return int((steps < 0).sum()), float(np.abs(steps).max()) if steps.size else 0.0

    ranked = sorted(fits, key=lambda fit: disorder(fit[1]))
    best, runner = ranked[0], ranked[1]
    if disorder(best[1]) == disorder(runner[1]):
        same = bool((_nanos(best[1]) == _nanos(runner[1])).all())
        if not same:
            column.date_note = (
                f"{UNSURE} the day and the month cannot be told apart in this file (no day "
                f"after the 12th); {best[0]} is the usual order for these stamps"
            )
        else:
            column.date_note = (
                f"{UNSURE} the day and the month cannot be told apart in this file; "
                f"{best[0]} is the usual order for these stamps"
            )
        first = fits[0]  # the usual order was tried first
        return first
    return best


_NAT = np.iinfo(np.int64).min


def _nanos(stamps: pd.Series) -> np.ndarray:
    """Date-times as int64 nanoseconds (UTC when they carry a zone); NaT as the int64 minimum."""
    values = stamps
    if isinstance(values.dtype, pd.DatetimeTZDtype):
        values = values.dt.tz_convert("UTC").dt.tz_localize(None)
    array: np.ndarray = values.to_numpy(dtype="datetime64[ns]", na_value=np.datetime64("NaT"))
    return array.view(np.int64)


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
    if column.foreign_unit and _FOREIGN_UNITS[column.foreign_unit.lower()] == role:
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
            why = _time_problem(columns) if role == "time" else ""
            guess.problems.append(
                why
                or f"no column was found for {role} (headers: {', '.join(c.header for c in columns)}); "
                f"name it under [columns] {role}"
            )
    _time(guess, roles, metadata)
    _voltage(guess, roles)
    current = _current(guess, roles)
    _temperature(guess, roles)
    _steps(guess, roles)
    _sign_and_modes(guess, roles, current)
    _counters(guess, roles, current, contiguous)
    guess.roles = roles
    chosen = {c.index for c in roles.values()}
    for column in columns:
        if column.index in chosen:
            continue
        guess.unread.append(guess.aside.get(column.index) or _why_unread(column))
    return guess


_DATE_ONLY = re.compile(r"\d{1,4}[./-]\d{1,2}[./-]\d{1,4}")
_CLOCK = re.compile(r"(?:\d+\s*d(?:ays?)?,?\s*)?\d{1,3}:\d{2}(?::\d{2}(?:[.,]\d+)?)?(?:\s*[AaPp][Mm])?")


def _time_problem(columns: Sequence[Column]) -> str:
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


def _span(values: FloatArray) -> str:
    finite = values[np.isfinite(values)]
    if not finite.size:
        return "no values"
    return f"{_g(float(finite.min()))} to {_g(float(finite.max()))}"


def _g(value: float) -> str:
    return f"{value:.6g}"


def _unit_words(column: Column) -> str:
    return f'the header says "{column.unit_text}"'


def _time(guess: ColumnGuess, roles: dict[str, Column], metadata: dict[str, str]) -> None:
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
    reason = f"the header names a time; its values rise from {_span(values)}"
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
        return Decision(column.unit[1], _unit_words(column))
    span = float(finite.max() - finite.min()) if finite.size else 0.0
    # a formation and grading record lasts hours to days: its span says the unit
    if span > 3e6:
        unit, why = "ms", f"the values span {_g(span)}: milliseconds over hours to days"
    elif 0 < span < 500 and finite.size > 100:
        unit, why = "h", f"the values span {_g(span)} over {finite.size} rows: hours"
    else:
        unit, why = "s", f"the values span {_g(span)}: seconds"
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
    nanos = _nanos(stamps)
    nanos = nanos[nanos != _NAT]
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
        moved = np.diff(_nanos(local))
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


def _voltage(guess: ColumnGuess, roles: dict[str, Column]) -> None:
    column = roles.get("voltage")
    if column is None or column.numbers is None:
        return
    finite = np.abs(column.numbers[np.isfinite(column.numbers)])
    median = float(np.median(finite))
    by_range = "mV" if median > 100 else "V"
    guess.reasons["voltage"] = f"values {_span(column.numbers)}"
    if column.unit and column.unit[0] == "voltage":
        unit = column.unit[1]
        if unit != by_range:
            guess.units["voltage"] = Decision(
                by_range,
                f"{UNSURE} the header says {column.unit_text!r}, but a cell's voltage of "
                f"{_g(median)} {unit} cannot be; the values say {by_range}",
            )
        else:
            guess.units["voltage"] = Decision(unit, _unit_words(column))
        return
    guess.units["voltage"] = Decision(
        by_range, f"no unit in the header; a cell's voltage of {_g(median)} is in {by_range}"
    )


def _current(guess: ColumnGuess, roles: dict[str, Column]) -> FloatArray | None:
    """The current column's unit; returns the current in A (file sign) for the sign's guess."""
    column = roles.get("current")
    if column is None or column.numbers is None:
        return None
    values = column.numbers
    finite = np.abs(values[np.isfinite(values)])
    guess.reasons["current"] = f"values {_span(values)}"
    if column.unit and column.unit[0] == "current":
        guess.units["current"] = Decision(column.unit[1], _unit_words(column))
    else:
        largest = float(finite.max()) if finite.size else 0.0
        unit = "mA" if largest >= 200 else "A"
        guess.units["current"] = Decision(
            unit, f"{UNSURE} no unit in the header; the largest current is {_g(largest)}, read as {unit}"
        )
    factor = CURRENT_UNITS[guess.units["current"].value]
    return values * factor


def _temperature(guess: ColumnGuess, roles: dict[str, Column]) -> None:
    column = roles.get("temperature")
    if column is None or column.numbers is None:
        return
    guess.reasons["temperature"] = f"values {_span(column.numbers)} °C"
    if not (column.unit and column.unit[0] == "temperature"):
        guess.reasons["temperature"] = (
            f"{UNSURE} no unit in the header; read as °C ({_span(column.numbers)})"
        )


def _steps(guess: ColumnGuess, roles: dict[str, Column]) -> None:
    for role in ("step", "cycle"):
        column = roles.get(role)
        if column is None or column.numbers is None:
            continue
        finite = column.numbers[np.isfinite(column.numbers)]
        guess.reasons[role] = f"whole numbers {_span(column.numbers)}"
        if role == "step":
            guess.reasons[role] += f", {int((np.diff(finite) != 0).sum()) + 1} runs"


def _threshold(current: FloatArray) -> float:
    """A current clearly above the channel's noise: a tenth of the record's large currents."""
    finite = np.abs(current[np.isfinite(current)])
    if not finite.size:
        return 0.0
    return 0.1 * float(np.quantile(finite, 0.99))


def _sign_and_modes(guess: ColumnGuess, roles: dict[str, Column], current: FloatArray | None) -> None:
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
            f"the current is {'almost ' if negative else ''}never negative: a magnitude, its "
            f"direction in {mode.header}",
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


def _counters(
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
        guess.reasons[role] = f"the cycler's own {word} counter, {_span(column.numbers)}"
        ratio: dict[str, float] = {}
        volts = _volts(guess, roles)
        if time_s is not None and current is not None and (role == "capacity" or volts is not None):
            n = min(contiguous, len(time_s))
            step = roles.get("step")
            same = _usual_pairs(time_s[:n], _same_step(step, current, n))
            integrand = np.abs(current[:n])
            if role == "energy" and volts is not None:
                integrand = integrand * np.abs(volts[:n])
            ours = _integral(integrand, time_s[:n], same)
            theirs_raw = _total_change(column.numbers[:n], same)
            if ours > 0 and theirs_raw > 0:
                ratio = {unit: theirs_raw * factor / ours for unit, factor in units.items()}
        if column.unit and column.unit[0] == role:
            unit = column.unit[1]
            why = _unit_words(column)
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
        nanos = _nanos(time.stamps).astype(np.float64)
        nanos[_nanos(time.stamps) == _NAT] = np.nan
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


def _same_step(step: Column | None, current: FloatArray, n: int) -> np.ndarray:
    if step is not None and step.numbers is not None:
        numbers = step.numbers[:n]
        return np.asarray(numbers[1:] == numbers[:-1])
    finite = np.abs(current[:n][np.isfinite(current[:n])])
    band = 0.01 * (float(finite.max()) if finite.size else 0.0)
    part = current[:n]
    direction = np.where(part > band, 1, np.where(part < -band, -1, 0))
    return np.asarray(direction[1:] == direction[:-1])


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


def _integral(integrand: FloatArray, time_s: FloatArray, pairs: np.ndarray) -> float:
    pair = pairs & np.isfinite(integrand[1:]) & np.isfinite(integrand[:-1])
    return float((0.5 * (integrand[1:] + integrand[:-1]) * np.diff(time_s))[pair].sum())


def _total_change(counter: FloatArray, pairs: np.ndarray) -> float:
    pair = pairs & np.isfinite(counter[1:]) & np.isfinite(counter[:-1])
    return float(np.abs(np.diff(counter))[pair].sum())


def _why_unread(column: Column) -> str:
    if column.empty:
        return f"{column.header!r} (empty)"
    if column.foreign_unit:
        quantity = _FOREIGN_UNITS[column.foreign_unit.lower()]
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
    return f"{column.header!r} (numbers {_span(column.numbers) if column.numbers is not None else ''})"


def most_common(values: Sequence[int]) -> int:
    """The most common of ``values`` (the larger on a tie)."""
    counts = Counter(values)
    return max(counts, key=lambda v: (counts[v], v))
