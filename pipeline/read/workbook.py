"""Workbooks -> RawTable: a record's rows on one sheet or continued over several, its metadata beside them.

Read through an import profile with ``[file] format = "workbook"``: an .xlsx, .xlsm,
.xls or .ods file. The data sheets are the profile's ``[workbook]
data_sheets`` (a sheet's name, or a pattern with ``*`` and ``?`` matched against the
sheets' names in the workbook's order; the first sheet when not given), each starting
with the same header row: the first row with a cell that holds the voltage column's
header. The metadata is on ``[workbook] metadata_sheet`` when the profile names one, else
in the rows above the first data sheet's header (after ``[file] skip_lines`` rows); on a
metadata row the first filled cell holds the key (a trailing colon is dropped) and the
cell right of it the value, or the first cell holds ``<metadata_prefix> key: value``. A
row with one cell and no colon is a title or a note, not metadata.

Cells keep their kind: numbers stay numbers, text stays text (so the converter names a
field that is not a number), date-time cells become naive datetime64 (a workbook keeps no
zone), a duration cell in the time column becomes a number in the profile's time unit, an
empty cell is missing. Metadata and header cells become text as the spreadsheet program
shows them (12, not 12.0; a date in ISO 8601). Every row is placed by its sheet and the
row number the spreadsheet program shows, for messages.

The workbook is read by python-calamine; openpyxl reads what calamine cannot (e.g. an
.xlsx packed with bzip2). Before either unpacks anything, the zip package's parts and each
sheet's span are measured against the unpacked-size cap (:mod:`pipeline.read.binaries`), so
a zip bomb or a sheet laid out over billions of cells is refused before it takes gigabytes.
"""

from __future__ import annotations

import datetime as dt
import io
import re
import warnings
from collections.abc import Sequence
from dataclasses import dataclass, replace
from itertools import repeat
from typing import Any, Protocol

import numpy as np
import pandas as pd

from pipeline.errors import InputError
from pipeline.model import RowPlaces, SourceRef, column_letters
from pipeline.read.binaries import AGAIN_HINT, check_unpacked_size, damaged, wrong_kind, zip_parts
from pipeline.read.bounds import MAX_METADATA_ENTRIES, check_length, fits, shown, too_long
from pipeline.read.cyclehead import CUT_SHORT_HINT, Head, collect_metadata
from pipeline.read.cyclenumbers import find_columns
from pipeline.read.profile import Profile
from pipeline.read.profile_keys import TIME_UNITS, V1_METADATA
from pipeline.read.sniff import binary_kind
from pipeline.read.table import RawTable

# A cell as the readers give it: float, int, str, bool, a date, time, date-time or duration;
# "" is an empty cell.
Cell = Any
_SHOWN_SHEETS = 12


# ---------------------------------------------------------------- the readers of workbooks


@dataclass(frozen=True)
class Grid:
    """A sheet's cells: ``rows[i][j]`` stands at 0-based row ``top + i``, column ``left + j``; "" is empty."""

    rows: Sequence[list[Cell]]
    top: int = 0
    left: int = 0


class _Unreadable(Exception):
    """The library at hand cannot read the workbook (the reason is its message)."""


class Book(Protocol):
    """An open workbook: its worksheets' names and each one's cells (see :func:`open_book`)."""

    names: list[str]  # the worksheets, in the workbook's order

    def grid(self, sheet: str) -> Grid: ...

    def close(self) -> None: ...


class _CalamineBook:
    def __init__(self, data: bytes, name: str) -> None:
        import python_calamine

        self._errors = python_calamine
        self._name = name
        try:
            self._book = python_calamine.CalamineWorkbook.from_filelike(io.BytesIO(data))
            worksheet = python_calamine.SheetTypeEnum.WorkSheet
            self.names = [s.name for s in self._book.sheets_metadata if s.typ == worksheet]
        except Exception as exc:
            raise self._failure(exc) from None

    def _failure(self, exc: Exception) -> Exception:
        if isinstance(exc, self._errors.PasswordError):
            return InputError(
                "the file is a password-protected workbook, which formgate cannot open",
                SourceRef(self._name),
                "Export it again without a password.",
            )
        return _Unreadable(str(exc) or type(exc).__name__)

    def grid(self, sheet: str) -> Grid:
        try:
            found = self._book.get_sheet_by_name(sheet)
            rows: list[list[Cell]] = found.to_python()
            top, left = found.start or (0, 0)
        except Exception as exc:
            raise self._failure(exc) from None
        return Grid(rows, top, left)

    def close(self) -> None:
        self._book.close()


class _OpenpyxlBook:
    """openpyxl's read-only reader; its warnings about a file's styles or links are not the record's."""

    def __init__(self, data: bytes) -> None:
        import openpyxl

        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                self._book = openpyxl.load_workbook(io.BytesIO(data), read_only=True, data_only=True)
            self.names = [sheet.title for sheet in self._book.worksheets]
        except Exception as exc:  # a third-party parser on bytes from anywhere
            raise _Unreadable(str(exc) or type(exc).__name__) from None

    def grid(self, sheet: str) -> Grid:
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                cells = self._book[sheet].iter_rows(values_only=True)
                rows = [["" if v is None else v for v in row] for row in cells]
        except Exception as exc:
            raise _Unreadable(str(exc) or type(exc).__name__) from None
        width = max((len(r) for r in rows), default=0)
        for row in rows:
            if len(row) < width:
                row.extend([""] * (width - len(row)))
        return Grid(rows)

    def close(self) -> None:
        self._book.close()


def read_workbook_table(data: bytes, name: str, profile: Profile, max_uncompressed_bytes: int) -> RawTable:
    """The record in workbook ``data`` (named ``name``) as its raw columns. Raises InputError.

    The profile's [workbook] data_sheets and metadata_sheet say where the rows and the
    metadata are (module docstring); at most ``max_uncompressed_bytes`` are unpacked.
    """
    refused = wrong_kind(data, name, profile, "workbook")
    if refused is not None:
        raise refused
    kind = binary_kind(data)
    if kind == "zip archive":  # neither an .xlsx, .xlsm nor an .ods package, or a damaged one
        zip_parts(data, name)
        raise InputError(
            f"the file is a zip archive, not a workbook; its import profile {profile.name} says "
            '[file] format = "workbook"',
            SourceRef(name),
            "Unpack it and give formgate the files inside.",
        )
    fast = check_unpacked_size(data, name, kind, max_uncompressed_bytes)
    why = "its parts are packed in a way the workbook reader does not know"
    if fast:
        try:
            return _read_book(_CalamineBook(data, name), name, profile)
        except _Unreadable as exc:
            why = str(exc)
    if kind == "workbook (.xlsx)":
        try:
            return _read_book(_OpenpyxlBook(data), name, profile)
        except _Unreadable:
            pass
    raise damaged(name, why)


def open_book(data: bytes, name: str, cap: int) -> Book:
    """Workbook ``data`` opened as :func:`read_workbook_table` opens it, with the same cap on
    what is unpacked: python-calamine, else openpyxl for an .xlsx calamine cannot open.
    Raises InputError. Close it when done (profile guessing reads its sheets' cells)."""
    kind = binary_kind(data)
    fast = check_unpacked_size(data, name, kind, cap)
    why = "its parts are packed in a way the workbook reader does not know"
    if fast:
        try:
            return _CalamineBook(data, name)
        except _Unreadable as exc:
            why = str(exc)
    if kind == "workbook (.xlsx)":
        try:
            return _OpenpyxlBook(data)
        except _Unreadable:
            pass
    raise damaged(name, why)


def _read_book(book: Book, name: str, profile: Profile) -> RawTable:
    try:
        return _table(book, name, profile)
    finally:
        book.close()


# ---------------------------------------------------------------- sheets, metadata, header, rows


def _table(book: Book, name: str, profile: Profile) -> RawTable:
    sheets = book.names
    if not sheets:
        raise InputError("the workbook has no sheets", SourceRef(name), AGAIN_HINT)
    info = profile.metadata_sheet
    if info is not None and info not in sheets:
        raise _no_sheet(info, sheets, name, profile, "metadata_sheet", "no metadata sheet named")
    data_sheets = _data_sheets(sheets, name, profile)
    first = data_sheets[0]
    grid = book.grid(first)
    if not grid.rows:
        if len(sheets) == 1:
            raise InputError(
                f"the workbook is empty: its one sheet, '{first}', holds no cells",
                SourceRef(name),
                CUT_SHORT_HINT,
            )
        raise InputError(
            "the sheet is empty",
            SourceRef(name, sheet=first),
            f"Check [workbook] data_sheets in the import profile {profile.name}: it must name "
            "the sheet of the header and the rows.",
        )
    at = _header_at(grid, first, name, profile, profile.skip_lines)
    header_row = grid.top + at + 1
    fields = _fields(grid.rows[at], grid.left)
    _check_column_names(fields, header_row, first, name)
    if info is None:
        head = Head(block_line=profile.skip_lines + 1, unit="row", sheet=first)
        above = range(max(profile.skip_lines - grid.top, 0), at)
        _read_metadata(head, grid, above, name, profile)
    else:
        head = Head(block_line=1, unit="row", sheet=info)
        if info == first:  # one sheet named for both: its metadata is above the header
            _read_metadata(head, grid, range(at), name, profile)
        else:
            meta = book.grid(info)
            _read_metadata(head, meta, range(len(meta.rows)), name, profile)
    head.header_line, head.fields = header_row, fields
    metadata = collect_metadata(head, name, profile)
    columns = find_columns(replace(head, sheet=first), name, profile)
    wanted = sorted(set(columns.values()))
    values: dict[int, list[Cell]] = {index: [] for index in wanted}
    spans: list[tuple[int, str | None, int]] = []
    count = 0
    for k, sheet in enumerate(data_sheets):
        if k:
            grid = book.grid(sheet)
            at = _header_at(grid, sheet, name, profile, 0)
            _same_header(_fields(grid.rows[at], grid.left), fields, grid.top + at + 1, sheet, first, name)
        body = _body(grid, at, sheet, name)
        if not body:
            continue
        spans.append((count, sheet, grid.top + at + 2))
        count += len(body)
        for index in wanted:
            j = index - grid.left
            if 0 <= j < len(body[0]):
                values[index].extend([row[j] for row in body])
            else:
                values[index].extend([""] * len(body))
    if not count:
        raise InputError(
            "the header is not followed by any data rows",
            SourceRef(name, header_row, sheet=first, unit="row"),
            CUT_SHORT_HINT,
        )
    time_index = columns["time"]
    frame = pd.DataFrame({i: _column(values[i], profile, i == time_index) for i in wanted})
    return RawTable(name, head, metadata, columns, frame, RowPlaces(name, tuple(spans)))


def _data_sheets(sheets: list[str], name: str, profile: Profile) -> list[str]:
    """The data sheets the profile names, in the workbook's order (never the metadata sheet)."""
    wanted = profile.data_sheets
    others = [s for s in sheets if s != profile.metadata_sheet]
    if wanted is None:
        if not others:
            raise InputError(
                f"the workbook has no sheet besides its metadata sheet '{profile.metadata_sheet}'",
                SourceRef(name),
                "The rows must be on a sheet of their own.",
            )
        return others[:1]
    if "*" not in wanted and "?" not in wanted:
        if wanted not in sheets:
            raise _no_sheet(wanted, sheets, name, profile, "data_sheets", "no sheet named")
        return [wanted]
    pattern = sheet_pattern(wanted)
    matched = [s for s in others if pattern.fullmatch(s)]
    if not matched:
        raise _no_sheet(wanted, sheets, name, profile, "data_sheets", "no sheet matches")
    return matched


def sheet_pattern(pattern: str) -> re.Pattern[str]:
    """A sheet-name pattern as a regular expression: * is any text, ? any one character.

    >>> bool(sheet_pattern("Record*").fullmatch("Record_2")), bool(sheet_pattern("R?").fullmatch("R10"))
    (True, False)
    """
    parts = {"*": ".*", "?": "."}
    return re.compile("".join(parts.get(c, re.escape(c)) for c in pattern), re.DOTALL)


def _no_sheet(
    wanted: str, sheets: list[str], name: str, profile: Profile, key: str, problem: str
) -> InputError:
    listed = ", ".join(shown(s) for s in sheets[:_SHOWN_SHEETS])
    if len(sheets) > _SHOWN_SHEETS:
        listed += f" and {len(sheets) - _SHOWN_SHEETS} more"
    hint = f"Correct [workbook] {key} in the import profile {profile.name}, or check the file."
    near = [s for s in sheets if s.casefold() == wanted.casefold()]
    if near:
        hint = f"Sheet names are matched exactly: did you mean '{near[0]}'? " + hint
    return InputError(f"{problem} {shown(wanted)} (the workbook has: {listed})", SourceRef(name), hint)


def _header_at(grid: Grid, sheet: str, name: str, profile: Profile, skip: int) -> int:
    """The index in ``grid.rows`` of the header: the first row (below ``skip``) with the voltage header."""
    header = profile.columns["voltage"]
    for i in range(max(skip - grid.top, 0), len(grid.rows)):
        if any(isinstance(cell, str) and cell.strip() == header for cell in grid.rows[i]):
            return i
    raise InputError(
        f"no header row with {header} on sheet '{sheet}'",
        SourceRef(name),
        f"Each data sheet starts with the header row, which holds the voltage column's header "
        f"{header} ([columns] voltage in the import profile {profile.name}).",
    )


def _fields(row: list[Cell], left: int) -> list[str]:
    fields = [""] * left + [cell_text(cell) for cell in row]
    while fields and not fields[-1]:
        fields.pop()
    return fields


def _check_column_names(fields: list[str], row: int, sheet: str, name: str) -> None:
    for index, field_name in enumerate(fields):
        if not fits(field_name):
            raise too_long(
                f"the name of column {column_letters(index + 1)} ({shown(field_name)})",
                field_name,
                SourceRef(name, row, index + 1, sheet=sheet, unit="row"),
                "Check the header row: a column name needs a few dozen bytes at most.",
            )


def _same_header(
    fields: list[str], first: list[str], row: int, sheet: str, first_sheet: str, name: str
) -> None:
    if fields == first:
        return
    width = max(len(fields), len(first))
    here = fields + [""] * (width - len(fields))
    there = first + [""] * (width - len(first))
    index = next(i for i in range(width) if here[i] != there[i])
    raise InputError(
        f"the header differs from the one on sheet '{first_sheet}': column "
        f"{column_letters(index + 1)} is {shown(here[index]) if here[index] else 'empty'} here, "
        f"{shown(there[index]) if there[index] else 'empty'} there",
        SourceRef(name, row, index + 1, sheet=sheet, unit="row"),
        "Every data sheet repeats the first one's header row: check that the sheets hold one record.",
    )


def _body(grid: Grid, at: int, sheet: str, name: str) -> Sequence[list[Cell]]:
    """The data rows below the header at ``at``: trailing empty rows dropped, none empty inside."""
    rows = grid.rows
    width = len(rows[at])  # a grid's rows are all as wide
    end = len(rows)
    while end > at + 1 and rows[end - 1].count("") == width:
        end -= 1
    body = rows[at + 1 : end]
    empties = list(map(list.count, body, repeat("")))  # one C call a row, for 100,000s of rows
    if width in empties:
        raise InputError(
            "blank row inside the data",
            SourceRef(name, grid.top + at + 2 + empties.index(width), sheet=sheet, unit="row"),
            "Remove the blank row; every row after the header must be a data row.",
        )
    return body


def _read_metadata(head: Head, grid: Grid, rows: range, name: str, profile: Profile) -> None:
    """Each metadata row among ``rows`` of ``grid`` into ``head`` (module docstring: which rows are)."""
    prefix = profile.metadata_prefix
    for i in rows:
        row = grid.rows[i]
        j = next((j for j, cell in enumerate(row) if cell != ""), None)
        if j is None:
            continue
        first = cell_text(row[j])
        number = grid.top + i + 1
        value_at = grid.left + j + 2
        if prefix and first.startswith(prefix):
            key, colon, value = first[len(prefix) :].partition(":")
            if not colon:
                continue  # a note
            key, value, value_at = key.strip(), value.strip(), value_at - 1
            if not value and j + 1 < len(row):
                value, value_at = cell_text(row[j + 1]), value_at + 1
        else:
            value = cell_text(row[j + 1]) if j + 1 < len(row) else ""
            if first.endswith(":"):
                key = first[:-1].rstrip()
            elif value:
                key = first
            else:
                continue  # a title or a note
        if key:
            _add_entry(head, key, value, number, grid.left + j + 1, value_at, name)


def _add_entry(head: Head, key: str, value: str, row: int, key_at: int, value_at: int, name: str) -> None:
    sheet = head.sheet
    if not fits(key):
        raise too_long(
            f"the metadata key {shown(key)}", key, SourceRef(name, row, key_at, sheet=sheet, unit="row")
        )
    check_length(value, f"metadata {key}", SourceRef(name, row, value_at, sheet=sheet, unit="row"))
    if key in head.metadata_lines:
        if key in V1_METADATA:
            raise InputError(
                f"metadata {key} is given twice (rows {head.metadata_lines[key]} and {row})",
                SourceRef(name, row, sheet=sheet, unit="row"),
                "Keep one of the two rows.",
            )
        return
    if len(head.metadata) >= MAX_METADATA_ENTRIES:
        raise InputError(
            f"metadata {key} is one entry more than the {MAX_METADATA_ENTRIES} formgate reads",
            SourceRef(name, row, sheet=sheet, unit="row"),
            "Check that the rows read as metadata are the cycler's metadata: a record needs a "
            "handful (cell_id, lot, cell_type, ...).",
        )
    if not head.metadata_lines:
        head.block_line = row
    head.metadata[key] = value
    head.metadata_lines[key] = row


def cell_text(cell: Cell) -> str:
    """A cell as text, as the spreadsheet program shows it: 12 (not 12.0), a date in ISO 8601.

    >>> cell_text(12.0), cell_text(0.1), cell_text(True), cell_text(dt.date(2024, 6, 2)), cell_text(" C1 ")
    ('12', '0.1', 'TRUE', '2024-06-02', 'C1')
    """
    if isinstance(cell, str):
        return cell.strip()
    if isinstance(cell, bool):
        return "TRUE" if cell else "FALSE"
    if isinstance(cell, float):
        if cell.is_integer() and abs(cell) < 2**53:
            return str(int(cell))
        return repr(cell)
    if isinstance(cell, dt.datetime | dt.date | dt.time):
        return cell.isoformat()
    return str(cell)


def _column(values: list[Cell], profile: Profile, is_time: bool) -> pd.Series:
    """One column's cells as a Series: float64 for numbers, datetime64 for dates, else objects."""
    cells = [None if v == "" else v for v in values]
    kinds = set(map(type, cells)) - {type(None)}
    if kinds <= {float, int}:
        return pd.Series(np.array(cells, dtype=np.float64))
    if kinds <= {dt.datetime, dt.date}:
        try:
            return pd.Series(pd.to_datetime(pd.Series(cells, dtype=object)))
        except (ValueError, TypeError, OverflowError):  # e.g. a year pandas cannot hold
            pass
    if is_time and dt.timedelta in kinds and kinds <= {dt.timedelta, float, int}:
        unit = TIME_UNITS[profile.time_unit]
        if profile.time_stamps != "date-time":
            seconds = [v.total_seconds() / unit if isinstance(v, dt.timedelta) else v for v in cells]
            return pd.Series(np.array(seconds, dtype=np.float64))
    return pd.Series(cells, dtype=object)
