"""A sampled column as the profile guess sees it: the column model, its header, its values.

Part of :mod:`pipeline.read.guess_columns`. ``make_column`` turns one column of the sample
(text from a delimited file, or typed values from a workbook or a Parquet file) into a
:class:`Column`: the unit its header names ("(mV)", "[s]", "_mA", "/V"), the quantities its
words name (voltage, current, step, ...), its numbers (under the file's decimal mark, which
``decimal_mark`` tells), or its date-times with the pattern that reads every sampled stamp
(ISO 8601, else a strftime pattern; when the day and the month cannot be told apart, the
usual order for the separator, marked unsure). Here too are the records the decisions are
written into (:class:`Decision`, :class:`ColumnGuess`) and the words their reasons share.

Which column is which quantity is left to :mod:`pipeline.read.guess_columns`; the time's
decisions to :mod:`pipeline.read.guess_time`; the other quantities' to
:mod:`pipeline.read.guess_quantities`.

Pure: a function of the cells.

>>> header_unit("Cell voltage (mV)"), header_unit("t_ms"), header_unit("Step no")
('mV', 'ms', None)
"""

from __future__ import annotations

import datetime as dt
import math
import re
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from pipeline.model import FloatArray
from pipeline.read.profile_keys import ISO_8601

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
FOREIGN_UNITS: dict[str, str] = {
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
        if tail.lower() in _UNITS or tail.lower() in FOREIGN_UNITS:
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
        if candidate in FOREIGN_UNITS:
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
        ns = as_nanos(parsed)
        ns = ns[ns != NAT]
        steps = np.diff(ns)
        return int((steps < 0).sum()), float(np.abs(steps).max()) if steps.size else 0.0

    ranked = sorted(fits, key=lambda fit: disorder(fit[1]))
    best, runner = ranked[0], ranked[1]
    if disorder(best[1]) == disorder(runner[1]):
        same = bool((as_nanos(best[1]) == as_nanos(runner[1])).all())
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


NAT = np.iinfo(np.int64).min


def as_nanos(stamps: pd.Series) -> np.ndarray:
    """Date-times as int64 nanoseconds (UTC when they carry a zone); NaT as the int64 minimum."""
    values = stamps
    if isinstance(values.dtype, pd.DatetimeTZDtype):
        values = values.dt.tz_convert("UTC").dt.tz_localize(None)
    array: np.ndarray = values.to_numpy(dtype="datetime64[ns]", na_value=np.datetime64("NaT"))
    return array.view(np.int64)


# ---------------------------------------------------------------- words of the reasons


def value_span(values: FloatArray) -> str:
    """The least and the largest of the finite values, as a reason shows them."""
    finite = values[np.isfinite(values)]
    if not finite.size:
        return "no values"
    return f"{six_figures(float(finite.min()))} to {six_figures(float(finite.max()))}"


def six_figures(value: float) -> str:
    """A number as a reason shows it: six significant digits at most."""
    return f"{value:.6g}"


def unit_words(column: Column) -> str:
    """The reason for a unit the header names."""
    return f'the header says "{column.unit_text}"'
