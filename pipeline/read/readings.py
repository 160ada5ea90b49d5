"""OCV reading files, version 1: a tester's open-circuit voltage readings of many cells.

Between formation and grading, cells age on shelves for days; an OCV/IR tester reads each
cell's open-circuit voltage (and often its 1 kHz AC resistance) at the start and at the end
of aging. This module reads such a file into :class:`Reading` records. Pure: bytes in,
records out. What the readings mean (the K-value) is ``pipeline.judge.kvalue``'s job.

The format, our own:

* UTF-8 text (a byte-order mark is allowed), optionally gzip-compressed (told by the gzip
  magic bytes or a name ending in ``.gz``); LF, CRLF or CR line ends.
* Optional ``# key: value`` metadata lines before the header, e.g. ``# kind: ocv readings``,
  ``# tester``, ``# station``, ``# lot``, ``# cell_type``. A ``#`` line without a colon is a
  comment. Blank lines are skipped anywhere.
* One comma-separated header row, then one row per reading. Columns, in any order:
  ``cell_id``, ``time`` and ``ocv_V`` are required; ``acir_mOhm``, ``temperature_C``,
  ``lot`` and ``cell_type`` are optional; any other column is kept with each reading
  (:attr:`Reading.extra`). One file may carry many cells and several readings of a cell.
* ``time`` is ISO 8601 with a UTC offset or ``Z``. A time without an offset is refused:
  readings days apart, from several testers, must lie on one time line.
* A row's ``lot`` (or ``cell_type``) falls back to the ``# lot`` (``# cell_type``)
  metadata; a reading with no lot at all is refused, a cell type may be unknown (None).

Every problem is an InputError naming the file, the line and, for a field, its column
(the 1-based field number, as the cycle-file reader counts). Every text a reading keeps (its
cell_id, lot, cell_type and other columns), every metadata key and value and every column
name is refused past :mod:`pipeline.read.bounds`' limit in bytes, as is a head of more
metadata entries than it allows. The bounds checked here are
plausibility bounds (values no cell can show: a misread field, a wrong unit), never
acceptance limits; those belong to the rule files.

>>> text = (
...     "# kind: ocv readings\\n# lot: L7\\n"
...     "cell_id,time,ocv_V,acir_mOhm\\n"
...     "C1,2026-03-02T08:00:00Z,3.6512,21.4\\n"
...     "C1,2026-03-09T08:00:00+00:00,3.6470,\\n"
... )
>>> found = read_readings(text.encode(), "aging.csv")
>>> [(r.cell_id, r.lot, r.ocv_v, r.acir_mohm, r.line) for r in found.readings]
[('C1', 'L7', 3.6512, 21.4, 4), ('C1', 'L7', 3.647, None, 5)]
>>> looks_like_readings(text.encode()), looks_like_readings(b"time_s,voltage_V,current_A\\n")
(True, False)
"""

from __future__ import annotations

import csv
import datetime
import math
import re
import zlib
from collections.abc import Mapping
from dataclasses import dataclass

from pipeline.errors import InputError
from pipeline.model import SourceRef, frozen_mapping
from pipeline.read.bounds import MAX_METADATA_ENTRIES, check_length, fits, shown, too_long

KIND = "ocv readings"  # what ``# kind:`` says in a file of this format
REQUIRED_COLUMNS = ("cell_id", "time", "ocv_V")
OPTIONAL_COLUMNS = ("acir_mOhm", "temperature_C", "lot", "cell_type")
# Plausibility, not acceptance: no lithium- or sodium-ion cell rests outside these (a
# slightly reversed cell reads a little below zero; 5.5 V is above any charged cell's
# rest voltage). common practice; the temperature bounds are a shelf's, from memory.
OCV_PLAUSIBLE_V = (-0.1, 5.5)
TEMPERATURE_PLAUSIBLE_C = (-40.0, 100.0)
MAX_UNCOMPRESSED_BYTES = 256 * 2**20
GZIP_MAGIC = b"\x1f\x8b"

_NUMBER = re.compile(r"[+-]?(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+)(?:[eE][+-]?[0-9]+)?")
_CUT_SHORT_HINT = "Copy the file again once the tester has finished writing it."
_ROW_HINT = "Each row needs one field per header column; leave a missing value empty."


@dataclass(frozen=True, slots=True)
class Reading:
    """One open-circuit reading of one cell: when, the OCV, and what else the tester gave.

    ``at`` is timezone-aware; ``ocv_v`` in volts, ``acir_mohm`` the AC resistance in
    milliohms, ``temperature_c`` in degrees Celsius (None when the file does not give
    them). ``line`` is the reading's line in its file; ``extra`` the other columns'
    (name, text) pairs in header order.
    """

    cell_id: str
    lot: str
    cell_type: str | None
    at: datetime.datetime
    ocv_v: float
    acir_mohm: float | None
    temperature_c: float | None
    line: int
    extra: tuple[tuple[str, str], ...] = ()


@dataclass(frozen=True, slots=True)
class ReadingFile:
    """A reading file as read: its name, its ``# key: value`` metadata and its readings in file order."""

    source: str
    metadata: Mapping[str, str]
    readings: tuple[Reading, ...]
    columns: tuple[str, ...] = ()


def read_readings(data: bytes, name: str) -> ReadingFile:
    """Read one OCV reading file's bytes into its readings, in file order.

    ``name`` is the file's name: it appears in every message and marks gzip when the
    bytes are too short to tell. Raises InputError naming the file, line and column.
    """
    lines = _lines(_decode(_decompress(data, name), name))
    metadata, meta_lines, header_line = _read_head(lines, name)
    fields = _header_fields(lines[header_line - 1])
    _check_column_names(fields, header_line, name)
    columns = _find_columns(fields, header_line, name)
    layout = _layout(name, fields, columns, metadata, meta_lines)
    readings = tuple(
        _reading(_split(lines[n - 1]), n, layout)
        for n in range(header_line + 1, len(lines) + 1)
        if lines[n - 1].strip()
    )
    if not readings:
        raise InputError(
            "the header is not followed by any readings",
            SourceRef(name, header_line),
            _CUT_SHORT_HINT,
        )
    _refuse_two_lots(readings, name)
    return ReadingFile(name, frozen_mapping(metadata), readings, tuple(fields))


# The bytes of a file's head that tell an OCV reading file by its header.
READINGS_HEAD = 65536


def looks_like_readings(head: bytes) -> bool:
    """True when ``head`` (a file, or its first bytes) is the start of an OCV reading file.

    Only the first READINGS_HEAD bytes are looked at, so a caller may pass a whole file.

    Skips a byte-order mark, blank lines and ``#`` metadata lines, and asks whether the
    first other line (the header) names both ``cell_id`` and ``ocv_V``, which a cycle
    file's header never does together. Gzip is handled: a compressed head is inflated
    as far as its bytes go (a head cut mid-stream is fine). Never raises.
    """
    head = head[:READINGS_HEAD]
    if head[:2] == GZIP_MAGIC:
        try:
            head = zlib.decompressobj(wbits=31).decompress(head, 1 << 20)
        except zlib.error:
            return False
    text = head.removeprefix(b"\xef\xbb\xbf").decode("utf-8", errors="replace")
    for line in _lines(text):
        stripped = line.strip()
        if not stripped or stripped.startswith("#"):
            continue
        fields = set(_header_fields(line))
        return "cell_id" in fields and "ocv_V" in fields
    return False


def _decompress(data: bytes, name: str) -> bytes:
    """The file's bytes, inflated when they are gzip (one member after another)."""
    if not (data[:2] == GZIP_MAGIC or name.lower().endswith(".gz")):
        return data
    # imported here: the ledger keeps Reading records, and `formgate status` reading the ledger
    # need not import the cycle-file reader
    from pipeline.read.cyclehead import inflate

    too_large = InputError(
        f"the file holds more than {MAX_UNCOMPRESSED_BYTES // 2**20} MiB of text",
        SourceRef(name),
        "Split the tester's readings into several files.",
    )
    return inflate(data, name, MAX_UNCOMPRESSED_BYTES, too_large, _CUT_SHORT_HINT)


def _decode(raw: bytes, name: str) -> str:
    """The bytes as UTF-8 text (without a byte-order mark); the first bad byte is located."""
    bom = 3 if raw.startswith(b"\xef\xbb\xbf") else 0
    try:
        return raw[bom:].decode("utf-8")
    except UnicodeDecodeError as exc:
        at = bom + exc.start
        line_start = max(raw.rfind(b"\n", 0, at), raw.rfind(b"\r", 0, at)) + 1
        column = len(raw[max(line_start, bom) : at].decode("utf-8", errors="replace")) + 1
        line = len(_lines(raw[bom:at].decode("utf-8", errors="replace")))
        raise InputError(
            f"byte 0x{raw[at]:02X} is not UTF-8 text",
            SourceRef(name, max(line, 1), column),
            "Have the tester write its files as UTF-8 text.",
        ) from None


def _lines(text: str) -> list[str]:
    """The text's lines as an editor counts them (LF, CRLF or CR ends); no trailing empty one."""
    if "\r" in text:
        text = text.replace("\r\n", "\n").replace("\r", "\n")
    lines = text.split("\n")
    if lines and lines[-1] == "":
        lines.pop()
    return lines


def _read_head(lines: list[str], name: str) -> tuple[dict[str, str], dict[str, int], int]:
    """The metadata, the line of each key, and the header's line number (1-based)."""
    metadata: dict[str, str] = {}
    where: dict[str, int] = {}
    for number, line in enumerate(lines, start=1):
        stripped = line.strip()
        if not stripped:
            continue
        if not stripped.startswith("#"):
            return metadata, where, number
        key, colon, value = stripped[1:].partition(":")
        key, value = key.strip(), value.strip()
        if not colon or not key:
            continue  # a plain comment
        if not fits(key):
            raise too_long(f"the metadata key {shown(key)}", key, SourceRef(name, number))
        check_length(value, f"metadata {key}", SourceRef(name, number))
        if key in where:
            raise InputError(
                f"metadata {key} is given twice (lines {where[key]} and {number})",
                SourceRef(name, number),
                "Keep one of the two lines.",
            )
        if len(metadata) >= MAX_METADATA_ENTRIES:
            raise InputError(
                f"metadata {key} is one entry more than the {MAX_METADATA_ENTRIES} formgate reads",
                SourceRef(name, number),
                "Check that the lines before the header are the tester's metadata: a reading "
                "file needs a handful (kind, lot, tester, ...).",
            )
        metadata[key], where[key] = value, number
    if not any(line.strip() for line in lines):
        raise InputError("the file is empty", SourceRef(name), _CUT_SHORT_HINT)
    raise InputError(
        "no header row: the file ends before any line of column names",
        SourceRef(name, len(lines)),
        "A reading file needs a header row (e.g. cell_id,time,ocv_V) and one row per reading.",
    )


def _split(line: str) -> list[str]:
    """One line's comma-separated fields (quoted fields allowed, on one line)."""
    if '"' not in line:
        return line.split(",")
    try:
        return next(csv.reader([line]), [""])
    except csv.Error:  # e.g. a field longer than the csv module allows
        return line.split(",")


def _header_fields(line: str) -> list[str]:
    return [f.strip() for f in _split(line)]


def _check_column_names(fields: list[str], header_line: int, name: str) -> None:
    for index, field in enumerate(fields):
        if not fits(field):
            raise too_long(
                f"the name of column {index + 1} ({shown(field)})",
                field,
                SourceRef(name, header_line, index + 1),
                "Check the header row: a column name needs a few dozen bytes at most.",
            )


def _find_columns(fields: list[str], header_line: int, name: str) -> dict[str, int]:
    """Where each known column is (0-based); duplicate or missing required columns refused."""
    columns: dict[str, int] = {}
    for index, field in enumerate(fields):
        if field in columns:
            raise InputError(
                f"the column {field} appears twice (columns {columns[field] + 1} and {index + 1})",
                SourceRef(name, header_line, index + 1),
                "Rename or remove one of them.",
            )
        columns[field] = index
    missing = [c for c in REQUIRED_COLUMNS if c not in columns]
    if missing:
        raise InputError(
            f"no column {', '.join(missing)} (found: {', '.join(fields)})",
            SourceRef(name, header_line),
            "A reading file needs the columns cell_id, time and ocv_V, named exactly so.",
        )
    return columns


@dataclass(frozen=True, slots=True)
class _Layout:
    """What every row is read by: the file's name, its columns and the metadata fallbacks."""

    name: str
    fields: tuple[str, ...]
    columns: Mapping[str, int]  # column name -> 0-based field index
    extra: tuple[int, ...]  # indexes of the columns this format does not know
    kept: tuple[int, ...]  # indexes of the columns a reading keeps as text, bounded in bytes
    lot: str  # the ``# lot`` metadata ("" when absent or empty)
    lot_line: int | None  # the line of ``# lot``, when there is one
    cell_type: str | None

    def where(self, line: int, column: str | None = None) -> SourceRef:
        """A row's place, with the column's 1-based number when the file has that column."""
        index = self.columns.get(column) if column else None
        return SourceRef(self.name, line, None if index is None else index + 1)


def _layout(
    name: str, fields: list[str], columns: dict[str, int], metadata: dict[str, str],
    meta_lines: dict[str, int],
) -> _Layout:
    known = set(REQUIRED_COLUMNS) | set(OPTIONAL_COLUMNS)
    extra = tuple(i for i, f in enumerate(fields) if f not in known)
    named = tuple(columns[c] for c in ("cell_id", "lot", "cell_type") if c in columns)
    return _Layout(
        name=name,
        fields=tuple(fields),
        columns=columns,
        extra=extra,
        kept=tuple(sorted(named + extra)),
        lot=metadata.get("lot", ""),
        lot_line=meta_lines.get("lot"),
        cell_type=metadata.get("cell_type") or None,
    )


def _reading(row: list[str], line: int, layout: _Layout) -> Reading:
    """One data row as a Reading, every field checked where it stands.

    Places (SourceRef) are built only for an error: a tester file has thousands of rows.
    """
    if len(row) != len(layout.fields):
        raise InputError(
            f"{len(row)} fields where the header has {len(layout.fields)}",
            SourceRef(layout.name, line),
            _ROW_HINT,
        )
    for index in layout.kept:
        if not fits(row[index]):
            value = row[index].strip()
            check_length(value, layout.fields[index], SourceRef(layout.name, line, index + 1))
    columns = layout.columns

    def text(column: str) -> str:
        index = columns.get(column)
        return "" if index is None else row[index].strip()

    cell_id = text("cell_id")
    if not cell_id:
        raise InputError(
            "cell_id is empty", layout.where(line, "cell_id"), "Every reading needs its cell's id."
        )
    ocv = _number(text("ocv_V"), "ocv_V", layout, line)
    if ocv is None:
        raise InputError("ocv_V is empty", layout.where(line, "ocv_V"), "Every reading needs its OCV.")
    _plausible(ocv, "ocv_V", "V", OCV_PLAUSIBLE_V, layout, line)
    acir = _number(text("acir_mOhm"), "acir_mOhm", layout, line)
    if acir is not None and acir < 0:
        raise InputError(
            f"acir_mOhm is {acir:g} mOhm, negative: not a plausible resistance",
            layout.where(line, "acir_mOhm"),
            "Check the tester's resistance range and wiring; a resistance is never negative.",
        )
    temperature = _number(text("temperature_C"), "temperature_C", layout, line)
    if temperature is not None:
        _plausible(temperature, "temperature_C", "degC", TEMPERATURE_PLAUSIBLE_C, layout, line)
    return Reading(
        cell_id=cell_id,
        lot=_lot(text("lot"), layout, line),
        cell_type=text("cell_type") or layout.cell_type,
        at=_time(text("time"), layout, line),
        ocv_v=ocv,
        acir_mohm=acir,
        temperature_c=temperature,
        line=line,
        extra=tuple((layout.fields[i], row[i].strip()) for i in layout.extra),
    )


def _number(cell: str, column: str, layout: _Layout, line: int) -> float | None:
    """The field as a finite float; None when it is empty (or the file has no such column)."""
    if not cell:
        return None
    if not _NUMBER.fullmatch(cell):
        shown = cell if len(cell) <= 40 else cell[:37] + "..."
        hint = "Write the value with a decimal point, or leave it empty if it is missing."
        if re.fullmatch(r"[+-]?[0-9]+,[0-9]+", cell):
            hint = "The value has a decimal comma: a reading file uses a decimal point."
        raise InputError(f"{column} is {shown!r}, not a number", layout.where(line, column), hint)
    value = float(cell)
    if not math.isfinite(value):
        raise InputError(f"{column} is {cell}, too large", layout.where(line, column), "Fix the value.")
    return value


def _plausible(
    value: float, column: str, unit: str, bounds: tuple[float, float], layout: _Layout, line: int
) -> None:
    low, high = bounds
    if not low <= value <= high:
        raise InputError(
            f"{column} is {value:g} {unit}, outside the plausible range {low:g} to {high:g} {unit} "
            "(a plausibility bound, not an acceptance limit)",
            layout.where(line, column),
            "Check the tester's units and the column; no cell at rest reads this.",
        )


def _time(cell: str, layout: _Layout, line: int) -> datetime.datetime:
    """The field as a timezone-aware time; a time without a UTC offset is refused."""
    try:
        at = datetime.datetime.fromisoformat(cell) if cell else None
    except ValueError:
        at = None
    example = "2026-03-02T08:00:00+01:00 or 2026-03-02T07:00:00Z"
    if at is None:
        shown = cell if len(cell) <= 40 else cell[:37] + "..."
        raise InputError(
            f"time is {shown!r}, not an ISO 8601 time" if cell else "time is empty",
            layout.where(line, "time"),
            f"Write the time as ISO 8601 with its UTC offset, e.g. {example}.",
        )
    if at.utcoffset() is None:
        raise InputError(
            f"time {cell!r} has no UTC offset",
            layout.where(line, "time"),
            f"Add the offset the tester's clock keeps, e.g. {example}: readings days apart, "
            "from several testers, can only be compared on one time line.",
        )
    return at


def _lot(cell: str, layout: _Layout, line: int) -> str:
    """The row's lot, else the file's ``# lot``; a reading without either is refused."""
    lot = cell or layout.lot
    if lot:
        return lot
    if layout.lot_line is not None:
        where = SourceRef(layout.name, layout.lot_line)
        raise InputError("metadata lot is empty", where, "Give it a value: '# lot: ...'.")
    raise InputError(
        "this reading has no lot, and the file has no '# lot' line",
        layout.where(line, "lot"),
        "Fill in the row's lot column, or add a line '# lot: ...' before the header.",
    )


def _refuse_two_lots(readings: tuple[Reading, ...], name: str) -> None:
    """One cell belongs to one lot: a file that puts it in two is refused at the second."""
    first: dict[str, Reading] = {}
    for reading in readings:
        seen = first.setdefault(reading.cell_id, reading)
        if seen.lot != reading.lot:
            raise InputError(
                f"cell {reading.cell_id} is in lot {seen.lot} on line {seen.line} "
                f"but in lot {reading.lot} here",
                SourceRef(name, reading.line),
                "Correct whichever lot is wrong.",
            )

