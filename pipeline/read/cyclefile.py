"""Cycle files -> Trace: one cell's record as bytes, read through an import profile.

Puts the two halves of reading together: the head (gzip, the text encoding, the
``# key: value`` metadata block, the header row) from :mod:`pipeline.read.cyclehead`, and
the numbers under it (parsed by pandas' C engine, then converted to s, V, A with positive =
charge) from :mod:`pipeline.read.cyclenumbers`. Anything it cannot read becomes an
InputError naming the file, line and column. Whether the numbers make sense for the cell
type is left to ``pipeline.read.validate``.

>>> text = "# cell_id: C1\\n# lot: L1\\n# cell_type: T\\ntime_s,voltage_V,current_A\\n0,3.1,0.5\\n"
>>> trace = read_cycle_file(text.encode(), "c1.csv")
>>> trace.cell_id, trace.first_data_line, float(trace.current_a[0])
('C1', 5, 0.5)
"""

from __future__ import annotations

from collections.abc import Mapping

from pipeline.acceptance.rules import CYCLE_FILE_STAGES, WHOLE_PROGRAM
from pipeline.model import Trace
from pipeline.read.convert import to_trace
from pipeline.read.cyclehead import (
    MAX_UNCOMPRESSED_BYTES,
    collect_metadata,
    decompress,
    split_head,
)
from pipeline.read.cyclenumbers import data_end, find_columns, parse_rows
from pipeline.read.profile import DEFAULT_PROFILE, Profile
from pipeline.read.sniff import binary_kind, not_text_error
from pipeline.read.table import RawTable


def read_cycle_file(
    data: bytes,
    name: str,
    profile: Profile | None = None,
    *,
    max_uncompressed_bytes: int = MAX_UNCOMPRESSED_BYTES,
) -> Trace:
    """Read one cycle file's bytes into a Trace in v1 units (s, V, A; positive = charge).

    ``name`` is the file's name: it appears in messages, marks gzip when the bytes are
    too short to tell, and feeds the profile's file_name_pattern. The profile's ``[file]
    format`` says whether the bytes are text, a workbook or a Parquet file. Raises InputError.
    """
    return to_trace(read_table(data, name, profile, max_uncompressed_bytes), profile or DEFAULT_PROFILE)


def read_table(
    data: bytes,
    name: str,
    profile: Profile | None = None,
    max_uncompressed_bytes: int = MAX_UNCOMPRESSED_BYTES,
) -> RawTable:
    """The file's raw columns, read by the reader of its layout (before units and signs)."""
    profile = profile or DEFAULT_PROFILE
    if profile.file_format == "workbook":
        from pipeline.read.workbook import read_workbook_table

        return read_workbook_table(data, name, profile, max_uncompressed_bytes)
    if profile.file_format == "parquet":
        from pipeline.read.parquet import read_parquet_table

        return read_parquet_table(data, name, profile, max_uncompressed_bytes)
    kind = binary_kind(data)
    if kind is not None:
        raise not_text_error(kind, name, profile)
    raw = decompress(data, name, max_uncompressed_bytes)
    inner = None if raw is data else binary_kind(raw)  # a workbook inside gzip
    if inner is not None:
        raise not_text_error(inner, name, profile)
    head, data_bytes, start = split_head(raw, name, profile)
    metadata = collect_metadata(head, name, profile)
    columns = find_columns(head, name, profile)
    end = data_end(data_bytes, start, head, name, profile)
    frame = parse_rows(data_bytes, start, end, head, name, profile, keep=columns.values())
    return RawTable(name, head, metadata, columns, frame)


def file_stages(metadata: Mapping[str, str]) -> tuple[str, ...]:
    """The stages of a cell's making a read file covers: its ``stage``, else the whole program.

    ``metadata`` is a Trace's, so its stage has been checked.

    >>> file_stages({"stage": "grading"}), file_stages({})
    (('grading',), ('formation', 'grading'))
    """
    stage = metadata.get("stage")
    return WHOLE_PROGRAM if stage is None else CYCLE_FILE_STAGES[stage]
