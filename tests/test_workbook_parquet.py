"""Workbooks and Parquet files: read as their cycle file v1 twin, and bad ones refused with located messages.

Every file here is written for real: .xlsx with openpyxl, .parquet with pyarrow, .ods as
the OpenDocument package it is (a zip of XML parts); the .xls is a fixture saved once by
another writer (tests/data/workbooks/v1_basic.xls). Each is read through
``read_cycle_file`` with an import profile and compared with the v1 text file it was made
from (tests/data/traces/good/v1_basic.csv): the same numbers, steps, cycles and metadata.
"""

from __future__ import annotations

import datetime as dt
import io
import math
import zipfile
from collections.abc import Sequence
from pathlib import Path
from xml.sax.saxutils import escape, quoteattr

import numpy as np
import openpyxl
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import python_calamine

from pipeline.errors import InputError
from pipeline.model import Trace
from pipeline.read.cyclefile import read_cycle_file
from pipeline.read.profile import Profile, load_profile
from pipeline.rulebook.book import load_rules_dir
from pipeline.runner import check_file
from tests.conftest import RULES_DIR

V1 = Path(__file__).resolve().parent / "data" / "traces" / "good" / "v1_basic.csv"
# The twin's metadata on the sheet Info and its rows on Record and Record_2, saved once as a
# BIFF8 workbook by xlwt 1.3.0 (a writer formgate does not depend on).
XLS = Path(__file__).resolve().parent / "data" / "workbooks" / "v1_basic.xls"
HEADER = ["time_s", "voltage_V", "current_A", "temperature_C", "step", "cycle"]

BOOK = """
[file]
format = "workbook"
[workbook]
data_sheets = "Record*"
metadata_sheet = "Info"
"""
PLAIN_BOOK = '[file]\nformat = "workbook"\n'
PARQUET = '[file]\nformat = "parquet"\n'


def profile(text: str, name: str = "book.toml") -> Profile:
    return load_profile(text, name)


def v1_record() -> tuple[dict[str, str], list[list[float | int]]]:
    """The metadata and rows of the v1 twin, as its text says."""
    metadata: dict[str, str] = {}
    rows: list[list[float | int]] = []
    for line in V1.read_text(encoding="utf-8").splitlines():
        if line.startswith("#"):
            key, _, value = line[1:].partition(":")
            metadata[key.strip()] = value.strip()
        elif line and not line.startswith("time_s"):
            cells = line.split(",")
            rows.append([*(float(c) for c in cells[:4]), int(cells[4]), int(cells[5])])
    return metadata, rows


def twin() -> Trace:
    return read_cycle_file(V1.read_bytes(), "v1_basic.csv")


def assert_twins(trace: Trace, reference: Trace) -> None:
    for name in ("time_s", "voltage_v", "current_a", "temperature_c"):
        np.testing.assert_allclose(getattr(trace, name), getattr(reference, name), rtol=1e-12, err_msg=name)
    np.testing.assert_array_equal(trace.step, reference.step)
    np.testing.assert_array_equal(trace.cycle, reference.cycle)
    assert dict(trace.metadata) == dict(reference.metadata)


def xlsx(sheets: dict[str, Sequence[Sequence[object]]], at: str = "A1") -> bytes:
    """A workbook written by openpyxl: each sheet's rows placed from cell ``at`` on."""
    book = openpyxl.Workbook()
    book.remove(book.active)
    first = openpyxl.utils.cell.coordinate_from_string(at)
    column = openpyxl.utils.cell.column_index_from_string(first[0])
    for title, rows in sheets.items():
        sheet = book.create_sheet(title)
        for r, row in enumerate(rows):
            for c, value in enumerate(row):
                if value is not None:
                    sheet.cell(first[1] + r, column + c, value)
    out = io.BytesIO()
    book.save(out)
    return out.getvalue()


def info_rows(metadata: dict[str, str]) -> list[list[object]]:
    """The metadata as key | value rows; a whole number is written as a number cell."""
    return [[k, int(v) if v.isdigit() else v] for k, v in metadata.items()]


def book_over_sheets(rows_per_sheet: int = 10) -> bytes:
    metadata, rows = v1_record()
    sheets: dict[str, Sequence[Sequence[object]]] = {"Info": info_rows(metadata)}
    for k in range(0, len(rows), rows_per_sheet):
        sheets[f"Record_{k // rows_per_sheet + 1}"] = [HEADER, *rows[k : k + rows_per_sheet]]
    return xlsx(sheets)


def read_error(data: bytes, name: str, prof: Profile | None, **kw: int) -> str:
    with pytest.raises(InputError) as caught:
        read_cycle_file(data, name, prof, **kw)
    return str(caught.value)


# ---------------------------------------------------------------- workbooks read as their twin


def test_rows_over_three_sheets_with_a_metadata_sheet_read_as_the_v1_twin() -> None:
    data = book_over_sheets(10)  # 24 rows: 10, 10 and 4
    trace = read_cycle_file(data, "book.xlsx", profile(BOOK))
    assert_twins(trace, twin())
    assert trace.metadata["channel"] == "3"  # a number cell, read as 3 and not 3.0
    assert str(trace.places.at(0)) == "book.xlsx, sheet 'Record_1', row 2"
    assert str(trace.places.at(12, 3)) == "book.xlsx, sheet 'Record_2', row 4, column C"
    assert str(trace.places.at(23)) == "book.xlsx, sheet 'Record_3', row 5"


def test_a_pattern_joins_only_the_sheets_it_matches_in_the_workbook_order() -> None:
    metadata, rows = v1_record()
    data = xlsx(
        {
            "Record_1": [HEADER, *rows[:12]],
            "Chart data": [["not", "rows"]],
            "Record_2": [HEADER, *rows[12:]],
            "Info": info_rows(metadata),
        }
    )
    assert_twins(read_cycle_file(data, "book.xlsx", profile(BOOK)), twin())


def test_metadata_in_the_rows_above_the_header_in_every_written_form() -> None:
    metadata, rows = v1_record()
    above: list[list[object]] = [
        ["Exported record"],  # skipped: skip_lines = 1
        ["cell_id:", metadata["cell_id"]],  # a trailing colon on the key
        ["lot", metadata["lot"]],
        [f"# cell_type: {metadata['cell_type']}"],  # one cell with the metadata prefix
        ["channel", 3],
        ["# station:", metadata["station"]],  # the prefix, and the value in the next cell
        ["started_at", metadata["started_at"]],
        ["fixture", metadata["fixture"]],
        ["A note without a value"],
        [],
    ]
    data = xlsx({"Record": [*above, HEADER, *rows]})
    trace = read_cycle_file(data, "book.xlsx", profile(PLAIN_BOOK + "skip_lines = 1\n"))
    assert_twins(trace, twin())
    assert trace.first_data_line == 12
    assert str(trace.places.at(0)) == "book.xlsx, sheet 'Record', row 12"


def test_one_sheet_named_for_both_the_data_and_the_metadata_reads_the_rows_above_the_header() -> None:
    metadata, rows = v1_record()
    data = xlsx({"Record": [*info_rows(metadata), HEADER, *rows]})
    prof = profile(PLAIN_BOOK + '[workbook]\ndata_sheets = "Record"\nmetadata_sheet = "Record"\n')
    assert_twins(read_cycle_file(data, "book.xlsx", prof), twin())


def test_data_placed_away_from_the_first_cell_is_named_by_its_own_row_and_column() -> None:
    metadata, rows = v1_record()
    rows[4][1] = "n/a"
    data = xlsx({"Record": [*info_rows(metadata), [], HEADER, *rows]}, at="C4")
    message = read_error(data, "book.xlsx", profile(PLAIN_BOOK))
    # 7 metadata rows and an empty one from row 4 on: the header on row 12, row 4 of data on 17
    assert message == (
        "book.xlsx, sheet 'Record', row 17, column D: voltage_V is 'n/a', not a number.\n"
        "  Fix the value, or leave it empty if it is missing."
    )


def test_metadata_cells_become_text_as_the_spreadsheet_shows_them() -> None:
    _, rows = v1_record()
    info = [
        ["cell_id", "CELL-0012"],
        ["lot", 12],
        ["cell_type", "DEMO-LFP-20A"],
        ["nominal_ah", 20.5],
        ["made_on", dt.date(2026, 11, 30)],
        ["started_at", dt.datetime(2026, 11, 30, 8, 0, 0)],
        ["checked", True],
    ]
    trace = read_cycle_file(xlsx({"Info": info, "Record": [HEADER, *rows]}), "b.xlsx", profile(BOOK))
    assert dict(trace.metadata) == {
        "cell_id": "CELL-0012",
        "lot": "12",
        "cell_type": "DEMO-LFP-20A",
        "nominal_ah": "20.5",
        "made_on": "2026-11-30",
        "started_at": "2026-11-30T08:00:00",
        "checked": "TRUE",
    }


def test_empty_cells_are_missing_values_and_trailing_empty_rows_are_not_rows() -> None:
    metadata, rows = v1_record()
    rows[3][3] = None  # type: ignore[call-overload]
    data = xlsx({"Info": info_rows(metadata), "Record": [HEADER, *rows, [None] * 6, [None] * 6]})
    book = openpyxl.load_workbook(io.BytesIO(data))
    book["Record"].cell(40, 1).number_format = "0.00"  # a formatted but empty cell below the rows
    out = io.BytesIO()
    book.save(out)
    trace = read_cycle_file(out.getvalue(), "b.xlsx", profile(BOOK))
    assert len(trace) == 24
    assert math.isnan(trace.temperature_c[3])


def test_date_time_cells_give_the_elapsed_time_of_the_twin() -> None:
    metadata, rows = v1_record()
    start = dt.datetime(2026, 11, 30, 8, 0, 0)
    stamped = [[start + dt.timedelta(seconds=r[0]), *r[1:]] for r in rows]
    data = xlsx({"Info": info_rows(metadata), "Record": [HEADER, *stamped]})
    prof = profile(BOOK + '[time]\nstamps = "date-time"\nzone = "UTC"\n')
    trace = read_cycle_file(data, "b.xlsx", prof)
    reference = twin()
    # a date-time cell is a fraction of a day: a microsecond or so is all it may lose
    np.testing.assert_allclose(trace.time_s, reference.time_s, atol=2e-6)
    np.testing.assert_allclose(trace.voltage_v, reference.voltage_v)


def test_duration_cells_in_the_time_column_count_in_the_profiles_time_unit() -> None:
    metadata, rows = v1_record()
    timed = [[dt.timedelta(seconds=r[0]), *r[1:]] for r in rows]
    data = xlsx({"Info": info_rows(metadata), "Record": [HEADER, *timed]})
    for unit in ("s", "min"):
        trace = read_cycle_file(data, "b.xlsx", profile(BOOK + f'[units]\ntime = "{unit}"\n'))
        np.testing.assert_allclose(trace.time_s, twin().time_s, atol=2e-6)


def test_a_mode_column_of_text_signs_the_current_as_in_the_twin() -> None:
    metadata, rows = v1_record()
    header = [*HEADER[:3], "Mode", *HEADER[3:]]
    moded = [[r[0], r[1], abs(r[2]), "R" if r[2] == 0 else ("C" if r[2] > 0 else "D"), *r[3:]] for r in rows]
    data = xlsx({"Info": info_rows(metadata), "Record": [header, *moded]})
    prof = profile(
        BOOK + '[columns]\nmode = "Mode"\n[units]\ncurrent_sign = "from mode"\n'
        '[mode]\ncharge = ["C"]\ndischarge = ["D"]\nrest = ["R"]\n'
    )
    assert_twins(read_cycle_file(data, "b.xlsx", prof), twin())


def test_an_ods_file_reads_as_the_twin() -> None:
    metadata, rows = v1_record()
    data = ods({"Info": info_rows(metadata), "Record": [HEADER, *rows]})
    assert_twins(read_cycle_file(data, "book.ods", profile(BOOK)), twin())


def test_an_xls_workbook_is_judged_as_its_twin() -> None:
    data = XLS.read_bytes()
    # the signature of a Compound File Binary file, which holds an .xls workbook ([MS-CFB] 2.2)
    assert data[:8] == b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1"
    assert_twins(read_cycle_file(data, XLS.name, profile(BOOK)), twin())
    rules = load_rules_dir(RULES_DIR)
    analysed_at = dt.datetime(2026, 12, 1, 8, 0, tzinfo=dt.UTC)
    reference = check_file(V1, rules, None, analysed_at=analysed_at, certificate=False).result
    got = check_file(
        XLS, rules, None, analysed_at=analysed_at, profile=profile(BOOK), certificate=False
    ).result
    assert reference is not None and got is not None
    assert (got.cell_id, got.verdict.kind, got.verdict.reasons) == (
        reference.cell_id,
        reference.verdict.kind,
        reference.verdict.reasons,
    )
    assert [(c.rule_id, c.outcome) for c in got.verdict.checks] == [
        (c.rule_id, c.outcome) for c in reference.verdict.checks
    ]
    assert got.metrics.values == reference.metrics.values  # the same float64 values, the same metrics


def test_a_workbook_calamine_cannot_read_is_read_by_openpyxl() -> None:
    # parts packed with bzip2 (allowed by the zip format, APPNOTE 4.4.5): Python's zipfile reads them
    data = repacked(book_over_sheets(), zipfile.ZIP_BZIP2)
    with pytest.raises(python_calamine.CalamineError):
        python_calamine.CalamineWorkbook.from_filelike(io.BytesIO(data))
    assert_twins(read_cycle_file(data, "book.xlsx", profile(BOOK)), twin())


def ods(sheets: dict[str, Sequence[Sequence[object]]]) -> bytes:
    """An OpenDocument spreadsheet: the zip package and XML parts of OASIS OpenDocument 1.2, part 1."""
    ns = (
        'xmlns:office="urn:oasis:names:tc:opendocument:xmlns:office:1.0" '
        'xmlns:table="urn:oasis:names:tc:opendocument:xmlns:table:1.0" '
        'xmlns:text="urn:oasis:names:tc:opendocument:xmlns:text:1.0"'
    )

    def cell(value: object) -> str:
        if value is None:
            return "<table:table-cell/>"
        if isinstance(value, int | float):
            return (
                f'<table:table-cell office:value-type="float" office:value="{value!r}">'
                f"<text:p>{value!r}</text:p></table:table-cell>"
            )
        return f'<table:table-cell office:value-type="string"><text:p>{escape(str(value))}</text:p></table:table-cell>'

    tables = "".join(
        f"<table:table table:name={quoteattr(title)}>"
        + "".join("<table:table-row>" + "".join(cell(v) for v in row) + "</table:table-row>" for row in rows)
        + "</table:table>"
        for title, rows in sheets.items()
    )
    content = (
        f'<?xml version="1.0" encoding="UTF-8"?><office:document-content {ns} office:version="1.2">'
        f"<office:body><office:spreadsheet>{tables}</office:spreadsheet></office:body></office:document-content>"
    )
    manifest = (
        '<?xml version="1.0" encoding="UTF-8"?>'
        '<manifest:manifest xmlns:manifest="urn:oasis:names:tc:opendocument:xmlns:manifest:1.0" '
        'manifest:version="1.2">'
        '<manifest:file-entry manifest:full-path="/" manifest:version="1.2" '
        'manifest:media-type="application/vnd.oasis.opendocument.spreadsheet"/>'
        '<manifest:file-entry manifest:full-path="content.xml" manifest:media-type="text/xml"/>'
        "</manifest:manifest>"
    )
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w") as package:
        package.writestr("mimetype", "application/vnd.oasis.opendocument.spreadsheet", zipfile.ZIP_STORED)
        package.writestr("META-INF/manifest.xml", manifest, zipfile.ZIP_DEFLATED)
        package.writestr("content.xml", content, zipfile.ZIP_DEFLATED)
    return out.getvalue()


def repacked(data: bytes, method: int) -> bytes:
    out = io.BytesIO()
    with zipfile.ZipFile(io.BytesIO(data)) as source, zipfile.ZipFile(out, "w", method) as target:
        for part in source.infolist():
            target.writestr(part.filename, source.read(part))
    return out.getvalue()


# ---------------------------------------------------------------- Parquet files read as their twin


def parquet_of(columns: dict[str, object], metadata: dict[str, str] | None) -> bytes:
    table = pa.table(columns)
    if metadata is not None:
        table = table.replace_schema_metadata(metadata)
    out = io.BytesIO()
    pq.write_table(table, out)
    return out.getvalue()


def v1_parquet(metadata: dict[str, str] | None = None, **replace: object) -> bytes:
    meta, rows = v1_record()
    columns: dict[str, object] = {
        name: pa.array([r[i] for r in rows], type=pa.int64() if i >= 4 else pa.float64())
        for i, name in enumerate(HEADER)
    }
    columns.update(replace)
    return parquet_of(columns, meta if metadata is None else metadata)


def test_a_parquet_file_reads_as_the_twin_with_its_key_value_metadata() -> None:
    trace = read_cycle_file(v1_parquet(), "cell.parquet", profile(PARQUET))
    assert_twins(trace, twin())
    assert trace.step is not None and trace.step.dtype == np.int64
    assert str(trace.places.at(5, 2)) == "cell.parquet, row 6, column 2"


def test_a_parquet_file_written_by_pandas_keeps_its_own_entries_out_of_the_metadata() -> None:
    metadata, rows = v1_record()
    frame = twin_frame(rows)
    frame.attrs = {}
    out = io.BytesIO()
    table = pa.Table.from_pandas(frame)  # carries pandas' own b"pandas" entry
    table = table.replace_schema_metadata(
        {**table.schema.metadata, **{k.encode(): v.encode() for k, v in metadata.items()}}
    )
    pq.write_table(table, out)
    assert b"pandas" in pq.ParquetFile(pa.BufferReader(out.getvalue())).metadata.metadata
    trace = read_cycle_file(out.getvalue(), "cell.parquet", profile(PARQUET))
    assert_twins(trace, twin())


def twin_frame(rows: list[list[float | int]]) -> object:
    import pandas as pd

    return pd.DataFrame(rows, columns=HEADER)


def test_parquet_timestamps_with_and_without_a_zone_give_the_twins_elapsed_time() -> None:
    _, rows = v1_record()
    start = dt.datetime(2026, 11, 30, 9, 0, 0, tzinfo=dt.timezone(dt.timedelta(hours=1)))
    aware = [start + dt.timedelta(seconds=r[0]) for r in rows]
    stamps = '[time]\nstamps = "date-time"\n'
    trace = read_cycle_file(
        v1_parquet(time_s=pa.array(aware, type=pa.timestamp("ms", tz="+01:00"))),
        "c.parquet",
        profile(PARQUET + stamps),
    )
    np.testing.assert_allclose(trace.time_s, twin().time_s)
    assert trace.metadata["started_at"] == "2026-11-30T08:00:00+00:00"  # the file's own entry wins
    naive = [s.replace(tzinfo=None) for s in aware]
    trace = read_cycle_file(
        v1_parquet(time_s=pa.array(naive, type=pa.timestamp("us"))),
        "c.parquet",
        profile(PARQUET + stamps + 'zone = "+01:00"\n'),
    )
    np.testing.assert_allclose(trace.time_s, twin().time_s)


def test_a_dictionary_encoded_text_mode_column_signs_the_current() -> None:
    _, rows = v1_record()
    modes = pa.array(["R" if r[2] == 0 else ("C" if r[2] > 0 else "D") for r in rows]).dictionary_encode()
    data = v1_parquet(current_A=pa.array([abs(r[2]) for r in rows]), mode=modes)
    prof = profile(
        PARQUET + '[columns]\nmode = "mode"\n[units]\ncurrent_sign = "from mode"\n'
        '[mode]\ncharge = ["C"]\ndischarge = ["D"]\nrest = ["R"]\n'
    )
    assert_twins(read_cycle_file(data, "c.parquet", prof), twin())


def test_a_text_value_in_a_parquet_number_column_is_named_by_row_and_column() -> None:
    _, rows = v1_record()
    volts = [str(r[1]) for r in rows]
    volts[2] = "n/a"
    message = read_error(v1_parquet(voltage_V=pa.array(volts)), "c.parquet", profile(PARQUET))
    assert message == (
        "c.parquet, row 3, column 2: voltage_V is 'n/a', not a number.\n"
        "  Fix the value, or leave it empty if it is missing."
    )


# ---------------------------------------------------------------- files without a profile


def test_a_workbook_without_a_profile_is_called_a_workbook() -> None:
    assert read_error(book_over_sheets(), "book.xlsx", None) == (
        "book.xlsx: the file is a workbook (.xlsx), not text.\n"
        '  Read it through an import profile with [file] format = "workbook"; '
        "`formgate profile guess FILE` writes one that fits it."
    )


def test_a_parquet_file_without_a_profile_is_called_a_parquet_file() -> None:
    assert read_error(v1_parquet(), "cell.parquet", None) == (
        "cell.parquet: the file is a Parquet file, not text.\n"
        '  Read it through an import profile with [file] format = "parquet"; '
        "`formgate profile guess FILE` writes one that fits it."
    )


# ---------------------------------------------------------------- bad workbooks


def test_a_data_sheet_the_workbook_lacks_is_named_with_the_sheets_it_has() -> None:
    message = read_error(
        book_over_sheets(), "b.xlsx", profile(PLAIN_BOOK + '[workbook]\ndata_sheets = "record_1"\n')
    )
    assert message == (
        "b.xlsx: no sheet named 'record_1' (the workbook has: 'Info', 'Record_1', 'Record_2', 'Record_3').\n"
        "  Sheet names are matched exactly: did you mean 'Record_1'? Correct [workbook] data_sheets "
        "in the import profile book.toml, or check the file."
    )


def test_a_pattern_no_sheet_matches_is_named() -> None:
    message = read_error(
        book_over_sheets(), "b.xlsx", profile(PLAIN_BOOK + '[workbook]\ndata_sheets = "Data*"\n')
    )
    assert message == (
        "b.xlsx: no sheet matches 'Data*' (the workbook has: 'Info', 'Record_1', 'Record_2', 'Record_3').\n"
        "  Correct [workbook] data_sheets in the import profile book.toml, or check the file."
    )


def test_a_missing_metadata_sheet_is_named() -> None:
    _, rows = v1_record()
    message = read_error(xlsx({"Record": [HEADER, *rows]}), "b.xlsx", profile(BOOK))
    assert message == (
        "b.xlsx: no metadata sheet named 'Info' (the workbook has: 'Record').\n"
        "  Correct [workbook] metadata_sheet in the import profile book.toml, or check the file."
    )


def test_an_empty_workbook_is_refused() -> None:
    book = openpyxl.Workbook()
    out = io.BytesIO()
    book.save(out)
    assert read_error(out.getvalue(), "b.xlsx", profile(PLAIN_BOOK)) == (
        "b.xlsx: the workbook is empty: its one sheet, 'Sheet', holds no cells.\n"
        "  Copy the file again once the cycler has finished writing it."
    )


def test_an_empty_data_sheet_is_refused() -> None:
    metadata, _ = v1_record()
    data = xlsx({"Info": info_rows(metadata), "Record_1": []})
    assert read_error(data, "b.xlsx", profile(BOOK)) == (
        "b.xlsx, sheet 'Record_1': the sheet is empty.\n"
        "  Check [workbook] data_sheets in the import profile book.toml: it must name the sheet of "
        "the header and the rows."
    )


def test_a_sheet_without_the_header_row_is_named() -> None:
    metadata, rows = v1_record()
    data = xlsx({"Info": info_rows(metadata), "Record_1": [HEADER, *rows[:12]], "Record_2": rows[12:]})
    assert read_error(data, "b.xlsx", profile(BOOK)) == (
        "b.xlsx: no header row with voltage_V on sheet 'Record_2'.\n"
        "  Each data sheet starts with the header row, which holds the voltage column's header "
        "voltage_V ([columns] voltage in the import profile book.toml)."
    )


def test_a_continuation_sheet_with_another_header_is_named_by_sheet_row_and_column() -> None:
    metadata, rows = v1_record()
    other = [*HEADER[:2], "current_mA", *HEADER[3:]]
    data = xlsx(
        {
            "Info": info_rows(metadata),
            "Record_1": [HEADER, *rows[:12]],
            "Record_2": [["continued"], other, *rows[12:]],
        }
    )
    assert read_error(data, "b.xlsx", profile(BOOK)) == (
        "b.xlsx, sheet 'Record_2', row 2, column C: the header differs from the one on sheet 'Record_1': "
        "column C is 'current_mA' here, 'current_A' there.\n"
        "  Every data sheet repeats the first one's header row: check that the sheets hold one record."
    )


def test_a_blank_row_inside_the_data_is_named() -> None:
    metadata, rows = v1_record()
    data = xlsx({"Info": info_rows(metadata), "Record_1": [HEADER, *rows[:5], [], *rows[5:]]})
    assert read_error(data, "b.xlsx", profile(BOOK)) == (
        "b.xlsx, sheet 'Record_1', row 7: blank row inside the data.\n"
        "  Remove the blank row; every row after the header must be a data row."
    )


def test_a_header_without_rows_is_refused() -> None:
    metadata, _ = v1_record()
    data = xlsx({"Info": info_rows(metadata), "Record_1": [HEADER]})
    assert read_error(data, "b.xlsx", profile(BOOK)) == (
        "b.xlsx, sheet 'Record_1', row 1: the header is not followed by any data rows.\n"
        "  Copy the file again once the cycler has finished writing it."
    )


def test_metadata_given_twice_above_the_header_names_both_rows() -> None:
    _, rows = v1_record()
    above = [["cell_id", "C-1"], ["lot", "L-1"], ["lot", "L-2"], ["cell_type", "T"]]
    data = xlsx({"Record": [*above, HEADER, *rows]})
    assert read_error(data, "b.xlsx", profile(PLAIN_BOOK)) == (
        "b.xlsx, sheet 'Record', row 3: metadata lot is given twice (rows 2 and 3).\n  Keep one of the two rows."
    )


def test_missing_metadata_is_placed_on_the_metadata_sheet() -> None:
    _, rows = v1_record()
    data = xlsx({"Info": [["lot", "L-1"], ["cell_type", "T"]], "Record": [HEADER, *rows]})
    with pytest.raises(InputError) as caught:
        read_cycle_file(data, "b.xlsx", profile(BOOK))
    assert str(caught.value.where) == "b.xlsx, sheet 'Info', row 1"
    assert caught.value.problem == "no cell_id in the metadata (found: lot, cell_type)"
    assert caught.value.hint.startswith(
        "Add a row 'cell_id' with its value in the next cell to sheet 'Info', or"
    )


def test_a_metadata_value_too_long_is_named_by_its_cell() -> None:
    _, rows = v1_record()
    data = xlsx(
        {"Info": [["cell_id", "C" * 300], ["lot", "L"], ["cell_type", "T"]], "Record": [HEADER, *rows]}
    )
    message = read_error(data, "b.xlsx", profile(BOOK))
    assert message.startswith(
        "b.xlsx, sheet 'Info', row 1, column B: metadata cell_id is 300 bytes long (300 characters), "
        "more than the 256 bytes formgate reads."
    )


def test_a_password_protected_workbook_is_named() -> None:
    # An encrypted Office file is a compound file holding a stream named EncryptedPackage
    # ([MS-OFFCRYPTO] 2.3.4.4): its header and that stream's directory name, as such a file begins.
    data = (
        b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1" + bytes(504) + "EncryptedPackage".encode("utf-16-le") + bytes(96)
    )
    assert read_error(data, "b.xlsx", profile(PLAIN_BOOK)) == (
        "b.xlsx: the file is a password-protected workbook, which formgate cannot open.\n"
        "  Export it again without a password."
    )


def test_a_workbook_cut_short_is_refused_as_damaged() -> None:
    data = book_over_sheets()
    assert read_error(data[: len(data) // 2], "b.xlsx", profile(BOOK)) == (
        "b.xlsx: the workbook cannot be read: it is damaged or cut short (not a valid zip package: "
        "File is not a zip file).\n"
        "  Copy the file again, or open it in its spreadsheet program and save or export it again."
    )


def test_a_workbook_with_damaged_sheet_data_is_refused_as_damaged() -> None:
    data = bytearray(book_over_sheets())
    with zipfile.ZipFile(io.BytesIO(bytes(data))) as package:
        part = package.getinfo("xl/worksheets/sheet2.xml")
    start = part.header_offset + 30 + len(part.filename) + len(part.extra)
    data[start : start + 8] = (
        b"\xff" * 8
    )  # the first deflate block's header: a block type that does not exist
    message = read_error(bytes(data), "b.xlsx", profile(BOOK))
    assert message.startswith(
        "b.xlsx: the workbook cannot be read: it is damaged or cut short (the part "
        "xl/worksheets/sheet2.xml is not valid deflate data: Error -3 while decompressing data"
    )
    assert message.endswith(
        "Copy the file again, or open it in its spreadsheet program and save or export it again."
    )


def test_a_workbook_of_another_kind_of_file_is_refused_as_such() -> None:
    assert read_error(b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1" + bytes(1000), "b.xls", profile(PLAIN_BOOK)) == (
        "b.xls: the workbook cannot be read: it is damaged or cut short (Cannot detect file format).\n"
        "  Copy the file again, or open it in its spreadsheet program and save or export it again."
    )
    archive = io.BytesIO()
    with zipfile.ZipFile(archive, "w") as package:
        package.writestr("cell.csv", V1.read_bytes())
    assert read_error(archive.getvalue(), "b.zip", profile(PLAIN_BOOK)) == (
        'b.zip: the file is a zip archive, not a workbook; its import profile book.toml says [file] format = "workbook".\n'
        "  Unpack it and give formgate the files inside."
    )


def test_a_text_file_given_to_a_workbook_profile_is_called_text() -> None:
    assert read_error(V1.read_bytes(), "cell.csv", profile(PLAIN_BOOK)) == (
        'cell.csv: the file is text, not a workbook; its import profile book.toml says [file] format = "workbook".\n'
        '  Read it through a profile with [file] format = "text", or give the profile the workbook the cycler wrote.'
    )


def test_a_parquet_file_given_to_a_workbook_profile_is_called_a_parquet_file() -> None:
    assert read_error(v1_parquet(), "cell.xlsx", profile(PLAIN_BOOK)) == (
        "cell.xlsx: the file is a Parquet file, not a workbook; its import profile book.toml says "
        '[file] format = "workbook".\n'
        '  Read it through a profile with [file] format = "parquet".'
    )


def test_an_empty_file_given_to_a_workbook_profile_is_refused() -> None:
    assert read_error(b"", "b.xlsx", profile(PLAIN_BOOK)) == (
        "b.xlsx: the file is empty.\n  Copy the file again once the cycler has finished writing it."
    )


def big_book(rows: int) -> bytes:
    book = openpyxl.Workbook(write_only=True)
    sheet = book.create_sheet("Record")
    for key, value in (("cell_id", "C-1"), ("lot", "L-1"), ("cell_type", "T")):
        sheet.append([key, value])
    sheet.append(HEADER)
    for k in range(rows):
        sheet.append([k * 1.0, 3.2, 1.0, 25.0, 1, 1])
    out = io.BytesIO()
    book.save(out)
    return out.getvalue()


TOO_LARGE = (
    "b.xlsx: the workbook holds more than 1 MiB once unpacked, the most formgate reads.\n"
    "  Check that the file is one cell's record."
)


def test_a_workbook_past_the_unpacked_size_cap_is_refused() -> None:
    data = big_book(8000)
    assert len(data) < 2**20 / 4  # the file is small; its sheet unpacks to more than 1 MiB
    assert len(read_cycle_file(data, "b.xlsx", profile(PLAIN_BOOK))) == 8000
    assert read_error(data, "b.xlsx", profile(PLAIN_BOOK), max_uncompressed_bytes=2**20) == TOO_LARGE


def test_a_workbook_whose_package_understates_its_sizes_is_still_refused() -> None:
    data = bytearray(big_book(8000))
    with zipfile.ZipFile(io.BytesIO(bytes(data))) as package:
        parts = package.infolist()
    # every part declares 100 bytes, in its local header and in the central directory
    # (field offsets: the zip format's APPNOTE 4.3.7 and 4.3.12)
    central = bytes(data).find(b"PK\x01\x02")
    for part in parts:
        data[part.header_offset + 22 : part.header_offset + 26] = (100).to_bytes(4, "little")
        entry = bytes(data).find(b"PK\x01\x02", central)
        data[entry + 24 : entry + 28] = (100).to_bytes(4, "little")
        central = entry + 4
    with zipfile.ZipFile(io.BytesIO(bytes(data))) as package:
        assert sum(p.file_size for p in package.infolist()) < 2**20
    assert read_error(bytes(data), "b.xlsx", profile(PLAIN_BOOK), max_uncompressed_bytes=2**20) == TOO_LARGE


# ---------------------------------------------------------------- bad Parquet files


def test_a_text_file_given_to_a_parquet_profile_is_called_text() -> None:
    assert read_error(V1.read_bytes(), "cell.parquet", profile(PARQUET, "pq.toml")) == (
        'cell.parquet: the file is text, not a Parquet file; its import profile pq.toml says [file] format = "parquet".\n'
        '  Read it through a profile with [file] format = "text", or give the profile the Parquet file the cycler wrote.'
    )


def test_a_workbook_given_to_a_parquet_profile_is_called_a_workbook() -> None:
    assert read_error(book_over_sheets(), "cell.parquet", profile(PARQUET, "pq.toml")) == (
        "cell.parquet: the file is a workbook (.xlsx), not a Parquet file; its import profile pq.toml says "
        '[file] format = "parquet".\n'
        '  Read it through a profile with [file] format = "workbook".'
    )


def test_a_parquet_file_cut_short_is_refused() -> None:
    data = v1_parquet()
    assert read_error(data[:-100], "c.parquet", profile(PARQUET)) == (
        "c.parquet: the Parquet file is cut short: it does not end with its footer.\n"
        "  Copy the file again once the cycler has finished writing it."
    )


def test_a_parquet_file_with_a_damaged_footer_is_refused_as_damaged() -> None:
    data = bytearray(v1_parquet())
    footer = int.from_bytes(data[-8:-4], "little")
    data[-8 - footer : -8] = b"\x00" * footer
    message = read_error(bytes(data), "c.parquet", profile(PARQUET))
    assert message.startswith("c.parquet: the Parquet file cannot be read: it is damaged or cut short (")
    assert message.endswith(").\n  Copy the file again, or have it written again.")


def test_an_encrypted_parquet_file_is_named() -> None:
    data = b"PARE" + v1_parquet()[4:-4] + b"PARE"  # the magic of a file with an encrypted footer
    assert read_error(data, "c.parquet", profile(PARQUET)) == (
        "c.parquet: the Parquet file is encrypted, which formgate cannot read.\n"
        "  Have it written again without encryption."
    )


def test_a_parquet_file_without_a_mapped_column_is_named() -> None:
    message = read_error(
        v1_parquet(), "c.parquet", profile(PARQUET + '[columns]\nvoltage = "U"\n', "pq.toml")
    )
    assert message == (
        "c.parquet: no column for voltage (found: time_s, voltage_V, current_A, temperature_C, step, cycle).\n"
        "  Rename the column, or map it under [columns] in the import profile pq.toml."
    )


def test_a_parquet_file_past_the_unpacked_size_cap_is_refused() -> None:
    n = 200_000
    data = parquet_of(
        {"time_s": np.zeros(n), "voltage_V": np.full(n, 3.2), "current_A": np.zeros(n)},
        {"cell_id": "C", "lot": "L", "cell_type": "T"},
    )
    assert len(data) < 2**20  # compressed (a run of equal values); 4.8 MB once unpacked
    assert read_error(data, "c.parquet", profile(PARQUET), max_uncompressed_bytes=2**20) == (
        "c.parquet: the Parquet file's columns hold more than 1 MiB once unpacked, the most formgate reads.\n"
        "  Check that the file is one cell's record."
    )


def test_a_parquet_file_without_rows_is_refused() -> None:
    empty = {name: pa.array([], type=pa.float64()) for name in HEADER[:3]}
    assert read_error(
        parquet_of(empty, {"cell_id": "C", "lot": "L", "cell_type": "T"}), "c.parquet", profile(PARQUET)
    ) == (
        "c.parquet: the Parquet file holds no rows.\n  Copy the file again once the cycler has finished writing it."
    )


def test_parquet_metadata_that_is_not_utf8_is_refused() -> None:
    table = pa.table({name: pa.array([1.0]) for name in HEADER[:3]}).replace_schema_metadata(
        {b"cell_id": b"\xff\xfe"}
    )
    out = io.BytesIO()
    pq.write_table(table, out)
    assert read_error(out.getvalue(), "c.parquet", profile(PARQUET)) == (
        "c.parquet: the key/value metadata entry 'cell_id' is not UTF-8 text.\n"
        "  Have the file written with its metadata as UTF-8 text."
    )


def test_missing_parquet_metadata_names_the_file() -> None:
    with pytest.raises(InputError) as caught:
        read_cycle_file(v1_parquet({"lot": "L", "cell_type": "T"}), "c.parquet", profile(PARQUET))
    assert str(caught.value.where) == "c.parquet"
    assert caught.value.problem == "no cell_id in the metadata (found: lot, cell_type)"
    assert caught.value.hint.startswith("Write a key/value entry 'cell_id' into the file's metadata")


def test_two_cells_far_apart_are_refused_before_the_sheet_is_laid_out() -> None:
    # calamine lays a sheet out from its first cell to its last: A1 and Z10000 are 260,000
    # cells (8 MB in memory), past the 65,536 a 1 MiB cap allows; the file is 5 KB
    _, rows = v1_record()
    data = xlsx({"Record": [["cell_id", "C-1"], ["lot", "L-1"], ["cell_type", "T"], HEADER, *rows]})
    book = openpyxl.load_workbook(io.BytesIO(data))
    book["Record"]["Z10000"] = 1.0
    out = io.BytesIO()
    book.save(out)
    assert read_error(out.getvalue(), "b.xlsx", profile(PLAIN_BOOK), max_uncompressed_bytes=2**20) == (
        "b.xlsx: the workbook's sheets span 260,000 cells from their first to their last, more than the "
        "65,536 formgate lays out.\n"
        "  Check that the file is one cell's record, with no stray cell far below or right of the rows."
    )


def test_a_row_repeated_many_times_in_an_ods_file_is_refused_before_it_is_laid_out() -> None:
    metadata, rows = v1_record()
    data = bytearray(ods({"Info": info_rows(metadata), "Record": [HEADER, *rows]}))
    with zipfile.ZipFile(io.BytesIO(bytes(data))) as package:
        content = package.read("content.xml")
    # the last row of the record written once, repeated 100,000 times (OpenDocument 1.2, 9.1.3)
    content = content.replace(
        b"<table:table-row>", b'<table:table-row table:number-rows-repeated="100000">', 1
    )
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w") as package:
        package.writestr("mimetype", "application/vnd.oasis.opendocument.spreadsheet", zipfile.ZIP_STORED)
        with zipfile.ZipFile(io.BytesIO(bytes(data))) as source:
            package.writestr(
                "META-INF/manifest.xml", source.read("META-INF/manifest.xml"), zipfile.ZIP_DEFLATED
            )
        package.writestr("content.xml", content, zipfile.ZIP_DEFLATED)
    message = read_error(out.getvalue(), "b.ods", profile(BOOK), max_uncompressed_bytes=2**20)
    assert (
        message.startswith("b.ods: the workbook's sheets span 200,")
        and "more than the 65,536 formgate" in message
    )


def test_a_sheet_whose_cells_carry_no_reference_is_read_in_order() -> None:
    import re

    data = book_over_sheets(24)
    out = io.BytesIO()
    with (
        zipfile.ZipFile(io.BytesIO(data)) as source,
        zipfile.ZipFile(out, "w", zipfile.ZIP_DEFLATED) as target,
    ):
        for part in source.infolist():
            body = source.read(part)
            if part.filename.startswith("xl/worksheets/"):
                body = re.sub(rb'<c r="[A-Z]+[0-9]+"', b"<c", body)  # a cell's reference is optional
            target.writestr(part.filename, body)
    assert b'<c r="' not in out.getvalue()
    assert_twins(read_cycle_file(out.getvalue(), "book.xlsx", profile(BOOK)), twin())


def test_a_damaged_zip_of_any_kind_is_named_a_zip_archive_never_a_crash() -> None:
    # a central directory entry that asks for a zip version Python's zipfile does not read
    # (PKWARE APPNOTE.TXT 4.3.12: "version needed to extract" at offset 6 of the entry)
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w") as archive:
        archive.writestr("mimetype", "application/vnd.oasis.opendocument.spreadsheet")
    data = bytearray(buffer.getvalue())
    entry = data.find(b"PK\x01\x02")
    data[entry + 6 : entry + 8] = (99).to_bytes(2, "little")
    with pytest.raises(InputError) as caught:
        read_cycle_file(bytes(data), "c.csv")
    assert caught.value.problem == "the file is a zip archive, not a cycle file"
