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

import difflib
import re
import tomllib
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

from pipeline.errors import ProfileError
from pipeline.model import SourceRef, frozen_mapping

QUANTITIES: tuple[str, ...] = ("time", "voltage", "current", "temperature", "step", "cycle")
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
V1_METADATA: tuple[str, ...] = (
    *REQUIRED_METADATA, "channel", "station", "program", "started_at", "stage"
)

# Factors that turn file units into the v1 units (s, V, A).
TIME_UNITS: Mapping[str, float] = frozen_mapping({"s": 1.0, "ms": 1e-3, "min": 60.0, "h": 3600.0})
VOLTAGE_UNITS: Mapping[str, float] = frozen_mapping({"V": 1.0, "mV": 1e-3})
CURRENT_UNITS: Mapping[str, float] = frozen_mapping({"A": 1.0, "mA": 1e-3})
CURRENT_SIGNS: Mapping[str, float] = frozen_mapping(
    {"charge positive": 1.0, "discharge positive": -1.0}
)
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
    ProfileKey("file", "skip_lines", "whole number, 0 or more", "0", "lines ignored at the top"),
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
    ProfileKey("units", "time", ", ".join(TIME_UNITS), "s", "unit of the time column"),
    ProfileKey("units", "voltage", ", ".join(VOLTAGE_UNITS), "V", "unit of the voltage column"),
    ProfileKey("units", "current", ", ".join(CURRENT_UNITS), "A", "unit of the current column"),
    ProfileKey(
        "units",
        "current_sign",
        ", ".join(CURRENT_SIGNS),
        "charge positive",
        "which direction of current the file writes as positive",
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

    def __post_init__(self) -> None:
        object.__setattr__(self, "columns", frozen_mapping({**V1_COLUMNS, **self.columns}))
        object.__setattr__(self, "metadata", frozen_mapping(self.metadata))

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
                else _suggest(
                    key, _KEYS_BY_TABLE[""] + tuple(f"[{t}]" for t in _TABLES), known=True
                )
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
        current_sign=choice("units", "current_sign", "charge positive", tuple(CURRENT_SIGNS)),
        metadata=metadata,
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
            "Check its brackets; write it in single quotes ('...') so that backslashes stay "
            "as they are.",
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
