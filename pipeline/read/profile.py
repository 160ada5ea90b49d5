"""Import profiles: TOML text -> Profile, the description of one cycle-file layout.

A profile says how to read a file that is not laid out as cycle file v1 (DESIGN.md):
other column names, mV / mA / hours, the opposite current sign, semicolons, decimal
commas, another text encoding, metadata taken from the file name. Reading the file
itself is left to ``cyclefile.read_cycle_file``; choosing a profile for a file (by a
glob on its name) is left to the station settings.

Every key a profile may hold is listed once in ``PROFILE_KEYS``; loading checks
against that table and the documentation is generated from it.

>>> profile = load_profile('[units]\\nvoltage = "mV"\\n', "lab.toml")
>>> profile.voltage_unit, profile.current_unit
('mV', 'A')
"""

from __future__ import annotations

import datetime as dt
import difflib
import re
import tomllib
import zoneinfo
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

from pipeline.errors import ProfileError
from pipeline.model import SourceRef, frozen_mapping

QUANTITIES: tuple[str, ...] = ("time", "voltage", "current", "temperature", "step", "cycle")
# Columns a layout may have beyond cycle file v1, read only when the profile names them:
# the row's mode (charge, discharge or rest) when the current is written as a magnitude, and
# the cycler's own charge and energy counters (cross-checked against formgate's integral).
EXTRA_QUANTITIES: tuple[str, ...] = ("mode", "capacity", "energy")
V1_COLUMNS: Mapping[str, str] = frozen_mapping(
    {
        "time": "time_s",
        "voltage": "voltage_V",
        "current": "current_A",
        "temperature": "temperature_C",
        "step": "step",
        "cycle": "cycle",
    }
)
REQUIRED_METADATA: tuple[str, ...] = ("cell_id", "lot", "cell_type")
# ``stage``: the stage of the cell's making the file holds (model.CYCLE_FILE_STAGES); left
# out, the file holds the whole program.
V1_METADATA: tuple[str, ...] = (*REQUIRED_METADATA, "channel", "station", "program", "started_at", "stage")

# Factors that turn file units into the v1 units (s, V, A).
TIME_UNITS: Mapping[str, float] = frozen_mapping({"s": 1.0, "ms": 1e-3, "min": 60.0, "h": 3600.0})
VOLTAGE_UNITS: Mapping[str, float] = frozen_mapping({"V": 1.0, "mV": 1e-3})
CURRENT_UNITS: Mapping[str, float] = frozen_mapping({"A": 1.0, "mA": 1e-3})
CURRENT_SIGNS: Mapping[str, float] = frozen_mapping({"charge positive": 1.0, "discharge positive": -1.0})
FROM_MODE = "from mode"
SIGN_CHOICES: tuple[str, ...] = (*CURRENT_SIGNS, FROM_MODE)
# Factors that turn the cycler's counters into A·s and W·s.
CAPACITY_UNITS: Mapping[str, float] = frozen_mapping({"Ah": 3600.0, "mAh": 3.6, "As": 1.0})
ENERGY_UNITS: Mapping[str, float] = frozen_mapping({"Wh": 3600.0, "mWh": 3.6, "J": 1.0})
MODES: tuple[str, ...] = ("charge", "discharge", "rest")
FORMATS: tuple[str, ...] = ("text", "workbook", "parquet")
# How the time column counts: seconds (or the [units] time) since the record began, a
# date and time of day, or time since the current step began (restarting with each step).
TIME_KINDS: tuple[str, ...] = ("elapsed", "date-time", "step elapsed")
ISO_8601 = "ISO 8601"
DEFAULT_COUNTER_TOLERANCE_PERCENT = 1.0
DELIMITERS: Mapping[str, str] = frozen_mapping({"comma": ",", "semicolon": ";", "tab": "\t"})
DECIMALS: Mapping[str, str] = frozen_mapping({"point": ".", "comma": ","})
ENCODINGS: tuple[str, ...] = ("utf-8", "utf-8-sig", "latin-1")


@dataclass(frozen=True, slots=True)
class ProfileKey:
    """One key an import profile may hold: where it goes, what it takes, what it means."""

    table: str  # "" = top level
    key: str  # "*" = any name (the [metadata] table)
    allowed: str
    default: str
    meaning: str


PROFILE_KEYS: tuple[ProfileKey, ...] = (
    ProfileKey("", "description", "text", '""', "what the profile is for, shown in messages"),
    ProfileKey("file", "delimiter", "comma, semicolon, tab", "comma", "what separates fields"),
    ProfileKey("file", "decimal", "point, comma", "point", "the decimal mark in numbers"),
    ProfileKey(
        "file",
        "encoding",
        ", ".join(ENCODINGS),
        "utf-8",
        "text encoding; utf-8 also accepts a leading byte-order mark, utf-8-sig is the same",
    ),
    ProfileKey(
        "file",
        "format",
        ", ".join(FORMATS),
        "text",
        "text: delimited text (optionally gzip-compressed); workbook: an .xlsx, .xlsm, .xls or "
        ".ods file (see [workbook]); parquet: an Apache Parquet file, its metadata in the "
        "file's key/value metadata",
    ),
    ProfileKey(
        "file",
        "skip_lines",
        "whole number, 0 or more",
        "0",
        "lines ignored at the top (rows of the first data sheet, for a workbook)",
    ),
    ProfileKey(
        "file",
        "metadata_prefix",
        "text",
        '"#"',
        "lines starting with this, before the header, hold metadata as 'key: value'",
    ),
    ProfileKey(
        "file",
        "file_name_pattern",
        "regular expression with named groups",
        "none",
        "searched in the file's name; each named group becomes a metadata value "
        "(e.g. `(?P<lot>[^_]+)_(?P<cell_id>[^_.]+)`, or `_(?P<stage>formation|grading)[.]` for "
        "a file of one stage); a file whose name does not match is refused",
    ),
    *(
        ProfileKey(
            "columns",
            quantity,
            "header text",
            f'"{V1_COLUMNS[quantity]}"',
            f"the header of the {quantity} column",
        )
        for quantity in QUANTITIES
    ),
    ProfileKey(
        "columns",
        "mode",
        "header text",
        "none",
        "the header of a column that says, on each row, whether the cell charges, discharges "
        'or rests (read with current_sign = "from mode" and the [mode] table)',
    ),
    ProfileKey(
        "columns",
        "capacity",
        "header text",
        "none",
        "the header of the cycler's own charge counter, cross-checked against formgate's "
        "integral of the current (see [counters])",
    ),
    ProfileKey(
        "columns",
        "energy",
        "header text",
        "none",
        "the header of the cycler's own energy counter, cross-checked against formgate's "
        "integral of voltage times current (see [counters])",
    ),
    ProfileKey("units", "time", ", ".join(TIME_UNITS), "s", "unit of the time column"),
    ProfileKey("units", "voltage", ", ".join(VOLTAGE_UNITS), "V", "unit of the voltage column"),
    ProfileKey("units", "current", ", ".join(CURRENT_UNITS), "A", "unit of the current column"),
    ProfileKey(
        "units",
        "current_sign",
        ", ".join(SIGN_CHOICES),
        "charge positive",
        "which direction of current the file writes as positive; from mode: the current is a "
        "magnitude and the [columns] mode column gives its direction (rest rows keep their "
        "value as written)",
    ),
    ProfileKey("units", "capacity", ", ".join(CAPACITY_UNITS), "Ah", "unit of the capacity counter"),
    ProfileKey("units", "energy", ", ".join(ENERGY_UNITS), "Wh", "unit of the energy counter"),
    ProfileKey(
        "time",
        "stamps",
        ", ".join(TIME_KINDS),
        "elapsed",
        "elapsed: time since the record began, in [units] time; date-time: a date and time of "
        "day on each row (see date_format and zone); step elapsed: time since the current step "
        "began, restarting with each step (needs [columns] step), in [units] time",
    ),
    ProfileKey(
        "time",
        "date_format",
        f"{ISO_8601}, or a strftime pattern",
        ISO_8601,
        "how a date-time stamp is written: ISO 8601 (2024-06-02 08:26:00.00, a T or a space "
        "between date and time, an offset such as +02:00 or Z allowed) or a pattern such as "
        '"%d.%m.%Y %H:%M:%S" (%f for fractions of a second, %z for an offset)',
    ),
    ProfileKey(
        "time",
        "zone",
        'UTC, a zone name such as "Europe/Berlin", or an offset such as "+02:00"',
        "none",
        "the zone of the cycler's clock, for stamps written without an offset; a zone name "
        "follows its daylight-saving changes (the repeated hour in autumn is told apart by "
        "the order of the rows)",
    ),
    ProfileKey(
        "time",
        "zone_metadata",
        "a metadata key",
        "none",
        "the metadata entry that gives the zone (as zone does), for a cycler that writes its "
        "clock's zone into each file; wins over zone",
    ),
    ProfileKey(
        "mode",
        "charge",
        "list of texts",
        "none",
        'the values of the mode column that mean charging, e.g. ["C", "CCCV"]',
    ),
    ProfileKey(
        "mode",
        "discharge",
        "list of texts",
        "none",
        'the values of the mode column that mean discharging, e.g. ["D"]',
    ),
    ProfileKey(
        "mode",
        "rest",
        "list of texts",
        "none",
        'the values of the mode column that mean resting, e.g. ["R", "OCV"]; a value in no '
        "list is an error naming its line",
    ),
    ProfileKey(
        "counters",
        "compare",
        "true, false",
        "true",
        "compare the cycler's capacity and energy counters with formgate's integrals, step "
        "by step; false reads the file without looking at them",
    ),
    ProfileKey(
        "counters",
        "tolerance_percent",
        "number above 0",
        f"{DEFAULT_COUNTER_TOLERANCE_PERCENT:g}",
        "how far (in % of the larger) the counters' total may differ from formgate's integral "
        "before the certificate carries a data-quality note",
    ),
    ProfileKey(
        "workbook",
        "data_sheets",
        "a sheet name, or a pattern with * and ?",
        "the first sheet",
        "the sheets that hold the rows, read in the workbook's order and joined (a cycler that "
        "writes more rows than one sheet holds continues on the next); each repeats the header "
        "row",
    ),
    ProfileKey(
        "workbook",
        "metadata_sheet",
        "a sheet name",
        "none",
        "a sheet of metadata: a key in its first column, the value in the second; without it "
        "the rows above the first data sheet's header hold metadata in the same way",
    ),
    ProfileKey(
        "metadata",
        "*",
        "text",
        "none",
        'fixed metadata for every file read with the profile, e.g. cell_type = "DEMO-LFP-20A" '
        'or stage = "grading" (formation, grading or formation+grading; left out, a file holds '
        "the whole program); a value in the file or its name wins over it",
    ),
)
_KEYS_BY_TABLE: dict[str, tuple[str, ...]] = {}
for _k in PROFILE_KEYS:
    _KEYS_BY_TABLE[_k.table] = (*_KEYS_BY_TABLE.get(_k.table, ()), _k.key)
_TABLES = tuple(t for t in _KEYS_BY_TABLE if t)


def describe_profile_keys() -> str:
    """Every profile key as a Markdown table, for the documentation (one row per key)."""
    rows = ["| table | key | allowed values | default | meaning |", "|---|---|---|---|---|"]
    for k in PROFILE_KEYS:
        cells = (
            f"[{k.table}]" if k.table else "(top level)",
            "any metadata name" if k.key == "*" else f"`{k.key}`",
            k.allowed,
            k.default,
            k.meaning,
        )
        rows.append("| " + " | ".join(c.replace("|", "\\|") for c in cells) + " |")
    return "\n".join(rows) + "\n"


@dataclass(frozen=True, slots=True)
class Profile:
    """How to read one cycle-file layout (see ``PROFILE_KEYS`` for each field's meaning).

    ``columns`` maps each quantity (time, voltage, ...) to its header text;
    ``metadata`` holds the fixed metadata values.
    """

    name: str
    description: str = ""
    delimiter: str = ","
    decimal: str = "."
    encoding: str = "utf-8"
    skip_lines: int = 0
    metadata_prefix: str = "#"
    file_name_pattern: re.Pattern[str] | None = None
    columns: Mapping[str, str] = field(default_factory=lambda: V1_COLUMNS)
    time_unit: str = "s"
    voltage_unit: str = "V"
    current_unit: str = "A"
    current_sign: str = "charge positive"
    metadata: Mapping[str, str] = field(default_factory=frozen_mapping)
    file_format: str = "text"
    time_stamps: str = "elapsed"
    date_format: str = ISO_8601
    zone: str | None = None
    zone_metadata: str | None = None
    # mode column value -> "charge" | "discharge" | "rest"
    modes: Mapping[str, str] = field(default_factory=frozen_mapping)
    capacity_unit: str = "Ah"
    energy_unit: str = "Wh"
    compare_counters: bool = True
    counter_tolerance_percent: float = DEFAULT_COUNTER_TOLERANCE_PERCENT
    data_sheets: str | None = None
    metadata_sheet: str | None = None

    def __post_init__(self) -> None:
        object.__setattr__(self, "columns", frozen_mapping({**V1_COLUMNS, **self.columns}))
        object.__setattr__(self, "metadata", frozen_mapping(self.metadata))
        object.__setattr__(self, "modes", frozen_mapping(self.modes))

    @property
    def signed_by_mode(self) -> bool:
        """True when the current column is a magnitude and the mode column gives its sign."""
        return self.current_sign == FROM_MODE

    @property
    def is_v1(self) -> bool:
        """True when the profile reads plain cycle file v1 (nothing remapped)."""
        return self == DEFAULT_PROFILE


DEFAULT_PROFILE = Profile(name="cycle file v1", description="cycle file version 1 (DESIGN.md)")


_Fail = Callable[..., ProfileError]


def load_profile(text: str, name: str) -> Profile:
    """Parse an import profile's TOML ``text``; ``name`` (its file name) appears in messages.

    Raises ProfileError with the line of the offending key for anything not valid.
    """
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        message = str(exc)
        found = re.search(r"\(at line (\d+), column (\d+)\)$", message)
        if found:
            where = SourceRef(name, int(found[1]), int(found[2]))
        else:
            found = re.search(r"\(at end of document\)$", message)
            last_line = len(text.rstrip("\n").split("\n"))
            where = SourceRef(name, last_line) if found else SourceRef(name)
        problem = message[: found.start()].strip() if found else message
        raise ProfileError(f"not valid TOML: {problem}", where) from None
    return _build(doc, text, name)


def _build(doc: dict[str, Any], text: str, name: str) -> Profile:
    def fail(problem: str, table: str, key: str | None, hint: str = "") -> ProfileError:
        return ProfileError(problem, SourceRef(name, _line_of(text, table, key)), hint)

    for key, value in doc.items():
        if key in _TABLES and not isinstance(value, dict):
            raise fail(f"'{key}' must be a table, written [{key}]", "", key)
        if isinstance(value, dict) and key not in _TABLES:
            hint = _suggest(key, _TABLES, "[{}]", known=True)
            raise fail(f"unknown table [{key}]", key, None, hint)
        if not isinstance(value, dict) and key not in _KEYS_BY_TABLE[""]:
            homes = [t for t in _TABLES if key in _KEYS_BY_TABLE[t]]
            hint = (
                "It belongs under " + " or ".join(f"[{t}]" for t in homes) + "."
                if homes
                else _suggest(key, _KEYS_BY_TABLE[""] + tuple(f"[{t}]" for t in _TABLES), known=True)
            )
            raise fail(f"unknown key '{key}'", "", key, hint)
    for table in _TABLES:
        for key in doc.get(table, {}):
            if "*" not in _KEYS_BY_TABLE[table] and key not in _KEYS_BY_TABLE[table]:
                hint = _suggest(key, _KEYS_BY_TABLE[table], known=True)
                raise fail(f"unknown key '{key}' in [{table}]", table, key, hint)

    def text_value(table: str, key: str, default: str) -> str:
        value = doc.get(table, {}).get(key, default) if table else doc.get(key, default)
        if not isinstance(value, str):
            raise fail(f"{_label(table, key)} must be text in quotes", table, key)
        return value

    def choice(table: str, key: str, default: str, allowed: tuple[str, ...]) -> str:
        value = text_value(table, key, default)
        if value not in allowed:
            listed = ", ".join(f'"{a}"' for a in allowed)
            # a stricter match for values, so that "kV" is not taken for "V"
            hint = _suggest(value, allowed, cutoff=0.75) or f"Use one of {listed}."
            raise fail(f'{_label(table, key)} = "{value}" is not one of {listed}', table, key, hint)
        return value

    delimiter = DELIMITERS[choice("file", "delimiter", "comma", tuple(DELIMITERS))]
    decimal = DECIMALS[choice("file", "decimal", "point", tuple(DECIMALS))]
    if delimiter == decimal:
        raise fail(
            '[file] decimal = "comma" cannot be read when the delimiter is also a comma',
            "file",
            "decimal",
            'Set delimiter = "semicolon" or "tab".',
        )
    skip = doc.get("file", {}).get("skip_lines", 0)
    if not isinstance(skip, int) or isinstance(skip, bool) or skip < 0:
        raise fail("[file] skip_lines must be a whole number, 0 or more", "file", "skip_lines")
    prefix = text_value("file", "metadata_prefix", "#")
    if not prefix.strip():
        raise fail("[file] metadata_prefix must not be empty", "file", "metadata_prefix")

    columns = {q: text_value("columns", q, V1_COLUMNS[q]).strip() for q in QUANTITIES}
    for extra in EXTRA_QUANTITIES:
        if extra in doc.get("columns", {}):
            columns[extra] = text_value("columns", extra, "").strip()
    seen: dict[str, str] = {}
    for quantity, header in columns.items():
        if not header:
            raise fail(f"[columns] {quantity} must not be empty", "columns", quantity)
        if header in seen:
            raise fail(
                f"[columns] {quantity} and {seen[header]} both name the column '{header}'",
                "columns",
                quantity,
            )
        seen[header] = quantity

    metadata: dict[str, str] = {}
    for key in doc.get("metadata", {}):
        hint = _near_miss(key)
        if hint:
            raise fail(f"unknown metadata key '{key}'", "metadata", key, hint)
        metadata[key] = text_value("metadata", key, "").strip()
    layout = _layout(doc, fail, text_value, choice, columns)
    return Profile(
        name=name,
        description=text_value("", "description", ""),
        delimiter=delimiter,
        decimal=decimal,
        encoding=choice("file", "encoding", "utf-8", ENCODINGS),
        skip_lines=skip,
        metadata_prefix=prefix.strip(),
        file_name_pattern=_compile_pattern(doc, fail),
        columns=columns,
        time_unit=choice("units", "time", "s", tuple(TIME_UNITS)),
        voltage_unit=choice("units", "voltage", "V", tuple(VOLTAGE_UNITS)),
        current_unit=choice("units", "current", "A", tuple(CURRENT_UNITS)),
        current_sign=choice("units", "current_sign", "charge positive", SIGN_CHOICES),
        metadata=metadata,
        **layout,
    )


def _layout(
    doc: dict[str, Any],
    fail: _Fail,
    text_value: Callable[[str, str, str], str],
    choice: Callable[[str, str, str, tuple[str, ...]], str],
    columns: Mapping[str, str],
) -> dict[str, Any]:
    """The keys of the layouts beyond delimited text with elapsed seconds, checked together."""
    file_format = choice("file", "format", "text", FORMATS)
    time_doc = doc.get("time", {})
    stamps = choice("time", "stamps", "elapsed", TIME_KINDS)
    for key in ("date_format", "zone", "zone_metadata"):
        if key in time_doc and stamps != "date-time":
            raise fail(
                f'[time] {key} is read only with stamps = "date-time"',
                "time",
                key,
                'Set [time] stamps = "date-time", or remove the key.',
            )
    date_format = text_value("time", "date_format", ISO_8601).strip()
    if date_format != ISO_8601:
        _check_date_format(date_format, fail)
    zone = time_doc.get("zone")
    if zone is not None:
        zone = text_value("time", "zone", "").strip()
        problem = zone_problem(zone)
        if problem:
            raise fail(f'[time] zone = "{zone}" {problem}', "time", "zone", ZONE_HINT)
    zone_key = time_doc.get("zone_metadata")
    if zone_key is not None:
        zone_key = text_value("time", "zone_metadata", "").strip()
        if not zone_key:
            raise fail("[time] zone_metadata must not be empty", "time", "zone_metadata")

    signed_by_mode = choice("units", "current_sign", "charge positive", SIGN_CHOICES) == FROM_MODE
    modes: dict[str, str] = {}
    mode_doc = doc.get("mode", {})
    if signed_by_mode and "mode" not in columns:
        raise fail(
            'current_sign = "from mode" needs the mode column: set [columns] mode',
            "units",
            "current_sign",
            'e.g. [columns] mode = "State", and list its values under [mode].',
        )
    if not signed_by_mode and ("mode" in columns or mode_doc):
        raise fail(
            'a mode column is read only with [units] current_sign = "from mode"',
            "columns" if "mode" in columns else "mode",
            "mode" if "mode" in columns else None,
            'Set current_sign = "from mode", or remove the mode column and [mode].',
        )
    for kind in MODES:
        values = mode_doc.get(kind)
        if values is None:
            if signed_by_mode and kind != "rest":
                raise fail(
                    f"[mode] {kind} is missing: list the mode values that mean {kind}",
                    "mode",
                    None,
                    f'e.g. {kind} = ["{kind[0].upper()}"]',
                )
            continue
        if (
            not isinstance(values, list)
            or not values
            or not all(isinstance(v, str) and v.strip() for v in values)
        ):
            raise fail(
                f"[mode] {kind} must be a list of texts, none of them empty",
                "mode",
                kind,
                f'e.g. {kind} = ["{kind[0].upper()}"]',
            )
        for value in values:
            value = value.strip()
            if value in modes and modes[value] != kind:
                raise fail(
                    f"[mode] the value '{value}' means both {modes[value]} and {kind}",
                    "mode",
                    kind,
                    "Keep it in one list.",
                )
            modes[value] = kind

    for counter in ("capacity", "energy"):
        if counter in doc.get("units", {}) and counter not in columns:
            raise fail(
                f"[units] {counter} is read only with a [columns] {counter} column",
                "units",
                counter,
                f"Name the counter's column under [columns] {counter}, or remove the unit.",
            )
    counters = doc.get("counters", {})
    compare = counters.get("compare", True)
    if not isinstance(compare, bool):
        raise fail("[counters] compare must be true or false", "counters", "compare")
    tolerance = counters.get("tolerance_percent", DEFAULT_COUNTER_TOLERANCE_PERCENT)
    if isinstance(tolerance, bool) or not isinstance(tolerance, int | float) or not 0 < tolerance < 100:
        raise fail(
            "[counters] tolerance_percent must be a number above 0 and below 100",
            "counters",
            "tolerance_percent",
        )

    book = doc.get("workbook", {})
    if book and file_format != "workbook":
        raise fail(
            '[workbook] is read only with [file] format = "workbook"',
            "workbook",
            None,
            'Set [file] format = "workbook", or remove the table.',
        )
    sheets: dict[str, str | None] = {}
    for key in ("data_sheets", "metadata_sheet"):
        if key in book:
            value = text_value("workbook", key, "").strip()
            if not value:
                raise fail(f"[workbook] {key} must not be empty", "workbook", key)
            sheets[key] = value
    return {
        "file_format": file_format,
        "time_stamps": stamps,
        "date_format": date_format,
        "zone": zone,
        "zone_metadata": zone_key,
        "modes": modes,
        "capacity_unit": choice("units", "capacity", "Ah", tuple(CAPACITY_UNITS)),
        "energy_unit": choice("units", "energy", "Wh", tuple(ENERGY_UNITS)),
        "compare_counters": compare,
        "counter_tolerance_percent": float(tolerance),
        "data_sheets": sheets.get("data_sheets"),
        "metadata_sheet": sheets.get("metadata_sheet"),
    }


ZONE_HINT = 'Give "UTC", a zone name such as "Europe/Berlin", or an offset such as "+02:00".'
_OFFSET = re.compile(r"^(?:UTC)?([+-])(\d{2}):?(\d{2})$")


def zone_problem(zone: str) -> str:
    """Why ``zone`` is not a zone formgate can use ('' when it is one)."""
    try:
        parse_zone(zone)
    except ValueError as exc:
        return str(exc)
    return ""


def parse_zone(zone: str) -> dt.tzinfo:
    """A zone as written in a profile or a file's metadata -> tzinfo; ValueError if not one.

    >>> parse_zone("+02:00"), parse_zone("UTC"), str(parse_zone("Europe/Berlin"))
    (datetime.timezone(datetime.timedelta(seconds=7200)), datetime.timezone.utc, 'Europe/Berlin')
    """
    text = zone.strip()
    if text.upper() in ("UTC", "Z", "GMT"):
        return dt.UTC
    found = _OFFSET.match(text)
    if found:
        hours, minutes = int(found[2]), int(found[3])
        if hours > 14 or minutes > 59:
            raise ValueError("is not a UTC offset (at most +14:00 and -14:00)")
        offset = dt.timedelta(hours=hours, minutes=minutes)
        return dt.timezone(-offset if found[1] == "-" else offset)
    if not text or len(text) > 64 or ".." in text or text.startswith("/"):
        raise ValueError("is not a time zone")
    try:
        return zoneinfo.ZoneInfo(text)
    except (zoneinfo.ZoneInfoNotFoundError, ValueError):
        raise ValueError("is not a time zone this machine knows") from None


def _check_date_format(pattern: str, fail: _Fail) -> None:
    """Refuse a strftime pattern that cannot write and read back a date and a time."""
    hint = (
        'Write it with strftime codes, e.g. "%d.%m.%Y %H:%M:%S" or "%Y/%m/%d %I:%M:%S %p", '
        f'or use "{ISO_8601}".'
    )
    if "%" not in pattern:
        raise fail(f'[time] date_format "{pattern}" holds no % codes', "time", "date_format", hint)
    missing = [code for code in ("%d", "%H|%I", "%M") if not any(c in pattern for c in code.split("|"))]
    if not any(c in pattern for c in ("%Y", "%y")) or missing:
        raise fail(
            f'[time] date_format "{pattern}" does not give the year, day, hour and minute',
            "time",
            "date_format",
            hint,
        )
    sample = dt.datetime(2024, 10, 27, 14, 26, 7, 250000, tzinfo=dt.UTC)
    try:
        back = dt.datetime.strptime(sample.strftime(pattern), pattern)
    except ValueError as exc:
        raise fail(
            f'[time] date_format "{pattern}" cannot be read back ({exc})',
            "time",
            "date_format",
            hint,
        ) from None
    if (back.year, back.day, back.minute) != (2024, 27, 26):
        raise fail(
            f'[time] date_format "{pattern}" does not give the year, day, hour and minute',
            "time",
            "date_format",
            hint,
        )


def _compile_pattern(doc: dict[str, Any], fail: _Fail) -> re.Pattern[str] | None:
    pattern = doc.get("file", {}).get("file_name_pattern")
    if pattern is None:
        return None
    if not isinstance(pattern, str):
        raise fail("[file] file_name_pattern must be text in quotes", "file", "file_name_pattern")
    try:
        compiled = re.compile(pattern)
    except re.error as exc:
        raise fail(
            f"[file] file_name_pattern is not a valid regular expression: {exc.msg} "
            f"at character {(exc.pos or 0) + 1}",
            "file",
            "file_name_pattern",
            "Check its brackets; write it in single quotes ('...') so that backslashes stay as they are.",
        ) from None
    if not compiled.groupindex:
        raise fail(
            "[file] file_name_pattern has no named groups, so it gives no metadata",
            "file",
            "file_name_pattern",
            "Name each group, e.g. (?P<lot>[^_]+)_(?P<cell_id>[^_.]+).",
        )
    for group in compiled.groupindex:
        hint = _near_miss(group)
        if hint:
            problem = f"[file] file_name_pattern has a group '{group}', not a metadata key"
            raise fail(problem, "file", "file_name_pattern", hint)
    return compiled


def _near_miss(key: str) -> str:
    """A suggestion when ``key`` is not a v1 metadata key but close to one (a typo)."""
    return "" if key in V1_METADATA else _suggest(key, V1_METADATA)


def _label(table: str, key: str) -> str:
    return f"[{table}] {key}" if table else key


def _suggest(
    word: str,
    choices: tuple[str, ...],
    shape: str = "'{}'",
    known: bool = False,
    cutoff: float = 0.6,
) -> str:
    """'Did you mean ...?' for a close match (case ignored); else, if ``known``, the choices."""
    lowered = {choice.lower(): choice for choice in choices}
    close = difflib.get_close_matches(word.lower(), list(lowered), n=1, cutoff=cutoff)
    if close:
        return f"Did you mean {shape.format(lowered[close[0]])}?"
    if known:
        return "Known names: " + ", ".join(shape.format(c) for c in choices if c != "*") + "."
    return ""


_TABLE_LINE = re.compile(r"\[\s*([A-Za-z0-9_.\"' -]+?)\s*\]\s*(#.*)?$")
_KEY_LINE = re.compile(r"""^\s*(?:"([^"]*)"|'([^']*)'|([A-Za-z0-9_.-]+))\s*=""")


def _line_of(text: str, table: str, key: str | None) -> int | None:
    """The 1-based line where ``key`` of ``table`` (or the table itself) is written, if found."""
    current = ""
    table_line: int | None = None
    for number, line in enumerate(text.split("\n"), 1):
        header = _TABLE_LINE.match(line.strip())
        if header:
            current = header[1].replace('"', "").replace("'", "").replace(" ", "")
            if current == table:
                table_line = number
                if key is None:
                    return number
            continue
        found = _KEY_LINE.match(line)
        if not found:
            continue
        written = next(g for g in found.groups() if g is not None).strip()
        if current == table and written == key:
            return number
        if current == "" and table and written in (table, f"{table}.{key}"):
            return number  # inline table or dotted key at the top level
    return table_line
