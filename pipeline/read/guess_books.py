"""Guessed profiles for workbooks and Parquet files: which sheets hold the rows, where the metadata is.

Part of :mod:`pipeline.read.guess`. A workbook is opened as its reader opens it
(:mod:`pipeline.read.workbook`: the same cells, the same cap on what is unpacked); on each
sheet the header is the first row of names followed by rows with numbers. The data
sheets are those whose header is the first data sheet's (a record longer than a sheet
continues on the next with the header repeated); more than one is written as a pattern
("Record*") that matches exactly those. A sheet of key/value rows (a key in the first
column, its value beside it) is the metadata sheet; without one, the rows above the
header hold the metadata, as the reader reads them. A Parquet file's columns are read
with pyarrow, its key/value metadata is its metadata.

What the columns hold is left to :mod:`pipeline.read.guess_columns`, writing the profile
to :mod:`pipeline.read.guess_write`. Pure: a function of the bytes and the name.
"""

from __future__ import annotations

import datetime as dt
import io
import re
from collections.abc import Sequence
from typing import Any

from pipeline.errors import InputError
from pipeline.model import SourceRef
from pipeline.read.cyclehead import MAX_UNCOMPRESSED_BYTES
from pipeline.read.guess_cells import Cells, Column, decimal_mark, make_column
from pipeline.read.guess_columns import guess_columns
from pipeline.read.guess_write import (
    Entry,
    Layout,
    data_sheets_pattern,
    toml_string,
    write_profile,
)

# Rows looked at: the first this many of the record.
SAMPLE_ROWS = 200_000
_NUMBER_TEXT = re.compile(r"\s*[+-]?(?:[0-9]+(?:[.,][0-9]*)?|[.,][0-9]+)(?:[eE][+-]?[0-9]+)?\s*")


def _is_number(cell: object) -> bool:
    if isinstance(cell, bool):
        return False
    if isinstance(cell, int | float):
        return True
    return isinstance(cell, str) and bool(_NUMBER_TEXT.fullmatch(cell))


def _is_data(row: Sequence[object]) -> bool:
    return any(_is_number(c) or isinstance(c, dt.datetime | dt.timedelta) for c in row)


def _texts(row: Sequence[object], left: int) -> list[str]:
    from pipeline.read.workbook import cell_text

    fields = [""] * left + [cell_text(cell) for cell in row]
    while fields and not fields[-1]:
        fields.pop()
    return fields


def _header_row(rows: Sequence[Sequence[object]]) -> int | None:
    """The index of the first row of names followed by rows of numbers, or None."""
    for index, row in enumerate(rows[:1000]):
        named = [c for c in row if isinstance(c, str) and c.strip()]
        if len(named) < 2 or any(_is_number(c) for c in row if c != ""):
            continue
        following = [r for r in rows[index + 1 : index + 40] if any(c != "" for c in r)][:3]
        if following and all(_is_data(r) for r in following):
            return index
    return None


def _key_values(rows: Sequence[Sequence[object]]) -> tuple[list[tuple[str, str]], str | None]:
    """The (key, value) rows of metadata as the workbook reader takes them, and their prefix if any.

    A key in the first filled cell and its value in the next; or "<prefix> key: value" in one
    cell ("# cell_id: C1"), whose prefix the profile then names.
    """
    from pipeline.read.workbook import cell_text

    found: list[tuple[str, str]] = []
    prefixes: list[str] = []
    for row in rows:
        filled = [j for j, cell in enumerate(row) if cell != ""]
        if not filled:
            continue
        j = filled[0]
        key = cell_text(row[j])
        value = cell_text(row[j + 1]) if j + 1 < len(row) else ""
        lead = re.match(r"[^\w\s]+", key)
        if lead and ":" in key[lead.end() :] and not value:
            prefixes.append(lead[0])
            key, _, value = key[lead.end() :].partition(":")
            key, value = key.strip(), value.strip()
        elif key.endswith(":"):
            key = key[:-1].rstrip()
        elif not value:
            continue
        if key:
            found.append((key, value))
    prefix = max(set(prefixes), key=prefixes.count) if prefixes else None
    return found, prefix


def guess_workbook(data: bytes, name: str) -> str:
    """The profile for a workbook (.xlsx, .xls, .ods). Raises InputError."""
    from pipeline.read.binaries import AGAIN_HINT

    book = _open_book(data, name)
    try:
        sheets = list(book.names)
        if not sheets:
            raise InputError("the workbook has no sheets", SourceRef(name), AGAIN_HINT)
        grids = {sheet: book.grid(sheet) for sheet in sheets}
    finally:
        book.close()
    headers: dict[str, tuple[int, list[str]]] = {}
    for sheet, grid in grids.items():
        at = _header_row(grid.rows)
        if at is not None:
            headers[sheet] = (at, _texts(grid.rows[at], grid.left))
    if not headers:
        raise InputError(
            "no sheet of the workbook holds a header row followed by rows of numbers",
            SourceRef(name),
            "Check that the workbook is a cycler's export of one cell's record.",
        )
    # the data sheets: those with the same header as the one holding the most rows
    rows_of = {sheet: len(grids[sheet].rows) - headers[sheet][0] - 1 for sheet in headers}
    main = max(headers, key=lambda s: (rows_of[s], -sheets.index(s)))
    fields = headers[main][1]
    data_sheets = [s for s in sheets if s in headers and headers[s][1] == fields]
    # the metadata sheet: of the other sheets, the one of key/value rows that holds the most
    pairs = {s: _key_values(grids[s].rows) for s in sheets if s not in data_sheets}
    info = max(pairs, key=lambda s: (len(pairs[s][0]), -sheets.index(s)), default=None)
    if info is not None and not pairs[info][0]:
        info = None
    first = data_sheets[0]
    first_grid = grids[first]
    at = headers[first][0]
    entries, prefix = pairs[info] if info is not None else _key_values(first_grid.rows[:at])
    metadata = dict(entries)
    # the record's cells, sheet after sheet
    width = len(fields)
    cells: list[list[object]] = [[] for _ in range(width)]
    count = 0
    for sheet in data_sheets:
        grid = grids[sheet]
        body = [r for r in grid.rows[headers[sheet][0] + 1 :]]
        while body and all(c == "" for c in body[-1]):
            body.pop()
        for row in body[: max(0, SAMPLE_ROWS - count)]:
            for index in range(width):
                j = index - grid.left
                cells[index].append(row[j] if 0 <= j < len(row) else "")
        count += len(body)
    decimal = decimal_mark([c for column in cells for c in column[:2000] if isinstance(c, str)])[0]
    columns = [make_column(Cells(i, fields[i], cells[i]), decimal) for i in range(width)]
    guess = guess_columns(columns, metadata, min(count, SAMPLE_ROWS))

    layout = Layout(kind="workbook", metadata=metadata, headers=fields)
    layout.description.append("workbook")
    layout.file.append(Entry("format", toml_string("workbook"), "a workbook (.xlsx, .xls or .ods)"))
    if decimal == ",":
        layout.file.append(
            Entry("decimal", toml_string("comma"), "numbers written as text look like 3,412")
        )
    others = [s for s in sheets if s != info]
    pattern = data_sheets_pattern(others, data_sheets)
    spread = f"{len(data_sheets)} sheets" if len(data_sheets) > 1 else "one sheet"
    layout.workbook.append(
        Entry(
            "data_sheets",
            toml_string(pattern),
            f"the header {_row_words(headers[first][0], first_grid.top)} and {count} rows, on {spread}"
            + (f": {', '.join(data_sheets)}" if len(data_sheets) > 1 else ""),
        )
    )
    if prefix is not None:
        layout.file.append(
            Entry("metadata_prefix", toml_string(prefix), f'metadata cells hold "{prefix} key: value"')
        )
    if info is not None:
        keys = ", ".join(k for k, _ in entries[:6]) + (", ..." if len(entries) > 6 else "")
        layout.workbook.append(
            Entry("metadata_sheet", toml_string(info), f"a key and its value on each row ({keys})")
        )
        layout.description.append(f"metadata on {info}")
    elif metadata:
        layout.notes.append(
            f"the metadata stands in the rows above the header on {first} ({', '.join(metadata)})"
        )
    layout.description.append(f"rows on {pattern}")
    return write_profile(name, layout, guess)


def _row_words(index: int, top: int) -> str:
    return f"(row {top + index + 1})"


def _open_book(data: bytes, name: str) -> Any:
    """The workbook, opened as its reader opens it (the same cap on what is unpacked)."""
    from pipeline.read.workbook import open_book

    return open_book(data, name, MAX_UNCOMPRESSED_BYTES)


# ---------------------------------------------------------------- Parquet


def guess_parquet(data: bytes, name: str) -> str:
    """The profile for a Parquet file. Raises InputError."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    try:
        parquet = pq.ParquetFile(io.BytesIO(data))
        schema = parquet.schema_arrow
        total = parquet.metadata.num_rows
        cells: list[list[object]] = [[] for _ in schema.names]
        count = 0
        for batch in parquet.iter_batches(batch_size=50_000):
            for index in range(batch.num_columns):
                cells[index].extend(batch.column(index).to_pylist())
            count += batch.num_rows
            if count >= SAMPLE_ROWS:
                break
    except (pa.ArrowException, OSError, ValueError) as exc:
        why = (str(exc).strip().splitlines() or ["no reason given"])[0][:160]
        raise InputError(
            f"the Parquet file cannot be read: it is damaged or cut short ({why})",
            SourceRef(name),
            "Copy the file again, or write it again as Parquet.",
        ) from None
    from pipeline.read.parquet import OWN_ENTRIES

    metadata: dict[str, str] = {}
    for key, value in (schema.metadata or {}).items():
        if key not in OWN_ENTRIES:
            metadata[key.decode("utf-8", "replace")] = value.decode("utf-8", "replace").strip()
    fields = [str(n) for n in schema.names]
    columns: list[Column] = [
        make_column(Cells(i, fields[i], [None if c is None else c for c in cells[i]]), ".")
        for i in range(len(fields))
    ]
    guess = guess_columns(columns, metadata, count)
    layout = Layout(kind="parquet", metadata=metadata, headers=fields)
    layout.description.append("Parquet")
    layout.file.append(
        Entry(
            "format",
            toml_string("parquet"),
            f"an Apache Parquet file: {len(fields)} columns, {total} rows"
            + (f"; its key/value metadata gives {', '.join(metadata)}" if metadata else ""),
        )
    )
    return write_profile(name, layout, guess)
