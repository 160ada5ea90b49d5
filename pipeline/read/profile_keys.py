"""The vocabulary of import profiles: every key a profile may hold, once, with what it takes.

``PROFILE_KEYS`` lists each key (its table, allowed values, default and meaning); loading a
profile (:mod:`pipeline.read.profile`) refuses any key not in it, and the documentation
(:mod:`pipeline.read.profile_docs`, docs/profiles.md) is generated from it. Beside it stand the
names and factors the keys choose among (units and their factors to the v1 units, current
signs, delimiters, decimal marks, encodings, file formats, time kinds) and cycle file v1's own
columns and metadata, which the readers and the profile guess use too. Parsing a zone is left
to :mod:`pipeline.read.zones`.

Constants only, and the Markdown table of the keys.

>>> "| [units] | `voltage` | V, mV | V | unit of the voltage column |" in describe_profile_keys()
True
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

from pipeline.model import frozen_mapping
from pipeline.read.accuracy import ACCURACY_KEYS, AccuracyKey, AccuracyValueError, accuracy_from
from pipeline.read.accuracy import describe as describe_accuracy

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
# ``stage``: the stage of the cell's making the file holds (acceptance.rules.CYCLE_FILE_STAGES); left
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


def _accuracy_allowed(key: AccuracyKey) -> str:
    """The values an [accuracy] key takes, as the reader decides them (accuracy.accuracy_from:
    a current range of 0 is refused, every other key takes 0)."""
    try:
        accuracy_from({key.name: 0}, "")
    except AccuracyValueError:
        return f"number above 0 ({key.unit})"
    return f"number, 0 or more ({key.unit})"


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
        "began, restarting with each step (needs [columns] step; a time that runs on across "
        "the step changes is refused), in [units] time",
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
    *(
        ProfileKey(
            "accuracy",
            k.name,
            _accuracy_allowed(k),
            describe_accuracy(k),
            k.meaning + " (the channels' accuracy class, from which every metric's uncertainty "
            "starts; a station's [accuracy.ID] for the inbox or channel wins over it)"
            if k is ACCURACY_KEYS[0]
            else k.meaning,
        )
        for k in ACCURACY_KEYS
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
# Each table's keys ("" = the top level), and the tables, in the order of PROFILE_KEYS: what
# loading a profile checks its tables and keys against.
KEYS_BY_TABLE: dict[str, tuple[str, ...]] = {}
for _k in PROFILE_KEYS:
    KEYS_BY_TABLE[_k.table] = (*KEYS_BY_TABLE.get(_k.table, ()), _k.key)
TABLES = tuple(t for t in KEYS_BY_TABLE if t)


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
