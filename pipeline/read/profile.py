"""Import profiles: TOML text -> Profile, the description of one cycle-file layout.

A profile says how to read a file that is not laid out as cycle file v1 (README.md, docs/profiles.md):
other column names, mV / mA / hours, the opposite current sign, semicolons, decimal
commas, another text encoding, metadata taken from the file name. Reading the file
itself is left to ``cyclefile.read_cycle_file``; choosing a profile for a file (by a
glob on its name) is left to the station settings.

Every key a profile may hold is listed once in ``PROFILE_KEYS``
(:mod:`pipeline.read.profile_keys`, with the names and units the keys choose among);
loading checks against that table, and the documentation is generated from it. This
module holds the Profile, loading and checking a profile's TOML (each problem located
at its key's line), and finding that line; a zone's text is parsed by
:mod:`pipeline.read.zones`.

>>> profile = load_profile('[units]\\nvoltage = "mV"\\n', "lab.toml")
>>> profile.voltage_unit, profile.current_unit
('mV', 'A')
"""

from __future__ import annotations

import datetime as dt
import difflib
import re
import tomllib
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

from pipeline.errors import ProfileError
from pipeline.model import AccuracyClass, SourceRef, frozen_mapping
from pipeline.read.accuracy import AccuracyValueError, accuracy_from
from pipeline.read.profile_keys import (
    CAPACITY_UNITS,
    CURRENT_UNITS,
    DECIMALS,
    DEFAULT_COUNTER_TOLERANCE_PERCENT,
    DELIMITERS,
    ENCODINGS,
    ENERGY_UNITS,
    EXTRA_QUANTITIES,
    FORMATS,
    FROM_MODE,
    ISO_8601,
    KEYS_BY_TABLE,
    MODES,
    QUANTITIES,
    SIGN_CHOICES,
    TABLES,
    TIME_KINDS,
    TIME_UNITS,
    V1_COLUMNS,
    V1_METADATA,
    VOLTAGE_UNITS,
)
from pipeline.read.zones import ZONE_HINT, zone_problem


@dataclass(frozen=True, slots=True)
class Profile:
    """How to read one cycle-file layout (see ``PROFILE_KEYS`` in :mod:`pipeline.read.profile_keys`
    for each field's meaning).

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
    accuracy: AccuracyClass | None = None  # the channels' accuracy class ([accuracy]), if given

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


DEFAULT_PROFILE = Profile(name="cycle file v1", description="cycle file version 1 (README.md)")


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
        if key in TABLES and not isinstance(value, dict):
            raise fail(f"'{key}' must be a table, written [{key}]", "", key)
        if isinstance(value, dict) and key not in TABLES:
            hint = _suggest(key, TABLES, "[{}]", known=True)
            raise fail(f"unknown table [{key}]", key, None, hint)
        if not isinstance(value, dict) and key not in KEYS_BY_TABLE[""]:
            homes = [t for t in TABLES if key in KEYS_BY_TABLE[t]]
            hint = (
                "It belongs under " + " or ".join(f"[{t}]" for t in homes) + "."
                if homes
                else _suggest(key, KEYS_BY_TABLE[""] + tuple(f"[{t}]" for t in TABLES), known=True)
            )
            raise fail(f"unknown key '{key}'", "", key, hint)
    for table in TABLES:
        for key in doc.get(table, {}):
            if "*" not in KEYS_BY_TABLE[table] and key not in KEYS_BY_TABLE[table]:
                hint = _suggest(key, KEYS_BY_TABLE[table], known=True)
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
    accuracy = None
    if "accuracy" in doc:
        try:
            accuracy = accuracy_from(doc["accuracy"], f"import profile {name}")
        except AccuracyValueError as exc:
            raise fail(f"[accuracy] {exc}", "accuracy", exc.key) from None
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
        accuracy=accuracy,
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
