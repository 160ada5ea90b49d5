"""Parquet files -> RawTable: the profile's columns of an Apache Parquet file, its metadata beside them.

Read through an import profile with ``[file] format = "parquet"``. The header is the
file's schema (its top-level column names, matched against the profile's [columns] like
a text file's header); only the columns the profile maps are read. The metadata is the
file's key/value metadata, UTF-8 text (the entries pandas and Arrow write for their own
use are left out). Values keep their kind: numbers stay numbers, text stays text (so the
converter names a field that is not a number), timestamps stay datetime64 (with their
zone when the file gives one), a duration in the time column becomes a number in the
profile's time unit. A row is placed by its 1-based row number in the table.

Before any column is read, what the mapped columns unpack to (their pages' uncompressed
size, and at least eight bytes a value) is checked against the unpacked-size cap, from
the file's own footer.
"""

from __future__ import annotations

from typing import Any

import pandas as pd

from pipeline.errors import InputError
from pipeline.model import RowPlaces, SourceRef
from pipeline.read.binaries import damaged, size_words, wrong_kind
from pipeline.read.bounds import MAX_METADATA_ENTRIES, check_length, fits, shown, too_long
from pipeline.read.cyclehead import CUT_SHORT_HINT, Head, collect_metadata
from pipeline.read.cyclenumbers import find_columns
from pipeline.read.profile import Profile
from pipeline.read.profile_keys import TIME_UNITS
from pipeline.read.sniff import PARQUET_MAGIC
from pipeline.read.table import RawTable

# Key/value entries that pandas and Arrow write to rebuild their own types: not the record's.
OWN_ENTRIES = (b"pandas", b"ARROW:schema")
AGAIN_HINT = "Copy the file again, or have it written again."


def read_parquet_table(data: bytes, name: str, profile: Profile, max_uncompressed_bytes: int) -> RawTable:
    """The record in Parquet ``data`` (named ``name``) as its raw columns. Raises InputError."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    if data.startswith(b"PARE"):
        raise InputError(
            "the Parquet file is encrypted, which formgate cannot read",
            SourceRef(name),
            "Have it written again without encryption.",
        )
    refused = wrong_kind(data, name, profile, "Parquet file")
    if refused is not None:
        raise refused
    if not data.endswith(PARQUET_MAGIC) or len(data) < 12:
        raise InputError(
            "the Parquet file is cut short: it does not end with its footer",
            SourceRef(name),
            CUT_SHORT_HINT,
        )
    if len(data) > max_uncompressed_bytes:
        raise _too_large(name, max_uncompressed_bytes)
    try:
        file = pq.ParquetFile(pa.BufferReader(data))
        footer = file.metadata
        names = list(file.schema_arrow.names)
        # the schema's metadata keeps the writer's order; the footer's may hold entries beyond it
        entries: dict[bytes, bytes] = {**(file.schema_arrow.metadata or {})}
        entries.update((k, v) for k, v in (footer.metadata or {}).items() if k not in entries)
    except (pa.ArrowException, OSError, ValueError, TypeError, KeyError, IndexError) as exc:
        raise _damaged(name, exc) from None
    head = Head(header_line=0, fields=[str(n).strip() for n in names], unit="", block_line=0)
    _check_column_names(head.fields, name)
    _read_metadata(head, entries, name)
    metadata = collect_metadata(head, name, profile)
    columns = find_columns(head, name, profile)
    wanted = sorted(set(columns.values()))
    read = [names[i] for i in wanted]
    try:
        size, rows = _unpacked_size(footer, read), footer.num_rows
    except (pa.ArrowException, OSError, ValueError, TypeError, KeyError, IndexError) as exc:
        raise _damaged(name, exc) from None  # e.g. a column path that is not UTF-8
    if size > max_uncompressed_bytes:
        raise _too_large(name, max_uncompressed_bytes)
    if rows == 0:
        raise InputError("the Parquet file holds no rows", SourceRef(name), CUT_SHORT_HINT)
    try:
        table = file.read(columns=read)
        time_index = columns["time"]
        frame = pd.DataFrame({i: _series(table.column(names[i]), profile, i == time_index) for i in wanted})
    except (pa.ArrowException, OSError, ValueError, TypeError, KeyError, IndexError) as exc:
        raise _damaged(name, exc) from None
    return RawTable(name, head, metadata, columns, frame, RowPlaces(name, ((0, None, 1),)))


def _too_large(name: str, cap: int) -> InputError:
    return InputError(
        f"the Parquet file's columns hold more than {size_words(cap)} once unpacked, the most formgate reads",
        SourceRef(name),
        "Check that the file is one cell's record.",
    )


def _damaged(name: str, exc: BaseException) -> InputError:
    return damaged(name, str(exc).strip() or type(exc).__name__, "Parquet file", AGAIN_HINT)


def _check_column_names(fields: list[str], name: str) -> None:
    for index, field_name in enumerate(fields):
        if not fits(field_name):
            raise too_long(
                f"the name of column {index + 1} ({shown(field_name)})",
                field_name,
                SourceRef(name),
                "Check the file's schema: a column name needs a few dozen bytes at most.",
            )


def _read_metadata(head: Head, entries: dict[bytes, bytes], name: str) -> None:
    """The key/value entries as metadata, in the file's order; each key's place is its entry number."""
    for number, (raw_key, raw_value) in enumerate(entries.items(), start=1):
        if raw_key in OWN_ENTRIES:
            continue
        try:
            key, value = raw_key.decode("utf-8").strip(), raw_value.decode("utf-8").strip()
        except UnicodeDecodeError:
            raise InputError(
                f"the key/value metadata entry {shown(raw_key.decode('utf-8', 'replace'))} is not UTF-8 text",
                SourceRef(name),
                "Have the file written with its metadata as UTF-8 text.",
            ) from None
        if not key:
            continue
        if not fits(key):
            raise too_long(f"the metadata key {shown(key)}", key, SourceRef(name))
        check_length(value, f"metadata {key}", SourceRef(name))
        if key in head.metadata:
            continue
        if len(head.metadata) >= MAX_METADATA_ENTRIES:
            raise InputError(
                f"metadata {key} is one entry more than the {MAX_METADATA_ENTRIES} formgate reads",
                SourceRef(name),
                "Check the file's key/value metadata: a record needs a handful (cell_id, lot, "
                "cell_type, ...).",
            )
        head.metadata[key] = value
        head.metadata_lines[key] = number


def _unpacked_size(footer: Any, read: list[str]) -> int:
    """What the columns ``read`` take once unpacked: their pages' size, at least eight bytes a value."""
    total = 0
    for r in range(footer.num_row_groups):
        group = footer.row_group(r)
        for c in range(group.num_columns):
            chunk = group.column(c)
            path = chunk.path_in_schema
            if any(path == n or path.startswith(n + ".") for n in read):
                total += max(chunk.total_uncompressed_size, 8 * group.num_rows)
    return total


def _series(column: Any, profile: Profile, is_time: bool) -> pd.Series:
    series: pd.Series = column.to_pandas(date_as_object=False)
    if isinstance(series.dtype, pd.CategoricalDtype):  # a dictionary-encoded column
        series = series.astype(object)
    if is_time and series.dtype.kind == "m" and profile.time_stamps != "date-time":
        series = series.dt.total_seconds() / TIME_UNITS[profile.time_unit]
    return series.reset_index(drop=True)
