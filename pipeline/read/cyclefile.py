"""Cycle files -> Trace: one cell's record as bytes, read through an import profile.

Handles gzip, the text encoding, the ``# key: value`` metadata block, the header row and
the numbers (parsed by pandas' C engine, then converted to s, V, A with positive =
charge). Anything it cannot read becomes an InputError naming the file, line and column.
Whether the numbers make sense for the cell type is left to ``pipeline.read.validate``.
Longer than most modules because one reader's located error messages (file, line, column,
what to do) are most of it; they belong beside the parsing they describe.

>>> text = "# cell_id: C1\\n# lot: L1\\n# cell_type: T\\ntime_s,voltage_V,current_A\\n0,3.1,0.5\\n"
>>> trace = read_cycle_file(text.encode(), "c1.csv")
>>> trace.cell_id, trace.first_data_line, float(trace.current_a[0])
('C1', 5, 0.5)
"""

from __future__ import annotations

import csv
import io
import math
import re
import zlib
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import TypeVar

import numpy as np
import pandas as pd

from pipeline.errors import InputError
from pipeline.model import (
    CYCLE_FILE_STAGES,
    WHOLE_PROGRAM,
    FloatArray,
    IntArray,
    SourceRef,
    Trace,
)
from pipeline.read.profile import (
    CURRENT_SIGNS,
    CURRENT_UNITS,
    DEFAULT_PROFILE,
    REQUIRED_METADATA,
    TIME_UNITS,
    V1_METADATA,
    VOLTAGE_UNITS,
    Profile,
)

GZIP_MAGIC = b"\x1f\x8b"
_Array = TypeVar("_Array", FloatArray, IntArray)
REQUIRED_COLUMNS = ("time", "voltage", "current")
_DELIMITER_NAMES = {",": "comma", ";": "semicolon", "\t": "tab"}
_CUT_SHORT_HINT = "Copy the file again once the cycler has finished writing it."
_ROW_HINT = "Each row needs one field per header column; leave a missing value empty."


def read_cycle_file(
    data: bytes,
    name: str,
    profile: Profile | None = None,
    *,
    max_uncompressed_bytes: int = 512 * 2**20,
) -> Trace:
    """Read one cycle file's bytes into a Trace in v1 units (s, V, A; positive = charge).

    ``name`` is the file's name: it appears in messages, marks gzip when the bytes are
    too short to tell, and feeds the profile's file_name_pattern. Raises InputError.
    """
    profile = profile or DEFAULT_PROFILE
    raw = _decompress(data, name, max_uncompressed_bytes)
    head, data_bytes, start = _split_head(raw, name, profile)
    metadata = _collect_metadata(head, name, profile)
    columns = _find_columns(head, name, profile)
    end = _data_end(data_bytes, start, head, name, profile)
    frame = _parse(data_bytes, start, end, head, name, profile)
    first = head.header_line + 1
    factors = {
        "time": TIME_UNITS[profile.time_unit],
        "voltage": VOLTAGE_UNITS[profile.voltage_unit],
        "current": CURRENT_UNITS[profile.current_unit] * CURRENT_SIGNS[profile.current_sign],
    }
    values = {
        q: _numbers(frame, i, head, name, profile, factors.get(q, 1.0))
        for q, i in columns.items()
        if q not in ("step", "cycle")
    }
    whole = {
        q: _whole_numbers(frame, i, head, name, profile, q)
        for q, i in columns.items()
        if q in ("step", "cycle")
    }
    return Trace(
        source=name,
        metadata=metadata,
        time_s=values["time"],
        voltage_v=values["voltage"],
        current_a=values["current"],
        temperature_c=values.get("temperature"),
        step=whole.get("step"),
        cycle=whole.get("cycle"),
        first_data_line=first,
    )


@dataclass
class _Head:
    """What comes before the data: metadata lines, the header row and where the data starts."""

    metadata: dict[str, str] = field(default_factory=dict)
    metadata_lines: dict[str, int] = field(default_factory=dict)
    block_line: int = 1  # first line of the metadata block (or of the file)
    header_line: int = 0
    fields: list[str] = field(default_factory=list)
    data_start: int = 0


def _split_head(raw: bytes, name: str, profile: Profile) -> tuple[_Head, bytes, int]:
    """The head of the file, and the UTF-8 bytes its data rows start in, with their offset.

    The data part of a cycle file is megabytes of plain ASCII: it is handed to pandas
    as the file's own bytes (no decoding to text and encoding back, no copies), and
    only the head is decoded. A file with CR line ends or in Latin-1 goes the long
    way: decoded whole, line ends normalised, and the data part encoded as UTF-8.
    """
    if profile.encoding == "utf-8" and b"\r" not in raw:
        if raw.isascii():  # characters and bytes count alike
            head = _ascii_head(raw, name, profile)
            return head, raw, head.data_start
        text = _decode(raw, name, profile.encoding)  # checks the whole file is UTF-8
        head = _read_head(text, name, profile)
        bom = 3 if raw.startswith(b"\xef\xbb\xbf") else 0
        return head, raw, bom + len(text[: head.data_start].encode("utf-8"))
    text = _decode(raw, name, profile.encoding)
    if "\r" in text:  # old Mac or Windows line ends: count lines the way editors do
        text = text.replace("\r\n", "\n").replace("\r", "\n")
    head = _read_head(text, name, profile)
    return head, text[head.data_start :].encode("utf-8"), 0


def _ascii_head(raw: bytes, name: str, profile: Profile) -> _Head:
    """_read_head on as few whole lines from the start of an ASCII file as hold the header."""
    limit = 1 << 16
    while True:
        whole = limit >= len(raw)
        chunk = raw if whole else raw[: raw.rfind(b"\n", 0, limit) + 1]
        try:
            head = _read_head(chunk.decode("ascii"), name, profile)
        except InputError:
            if whole:
                raise
        else:
            return head
        limit *= 4


def _decompress(data: bytes, name: str, cap: int) -> bytes:
    if not (data[:2] == GZIP_MAGIC or name.lower().endswith(".gz")):
        if len(data) > cap:
            raise _too_large(name, cap)
        return data
    return inflate(data, name, cap, _too_large(name, cap), _CUT_SHORT_HINT)


def inflate(data: bytes, name: str, cap: int, too_large: InputError, cut_hint: str) -> bytes:
    """A gzip file's bytes inflated, one member after another, never more than ``cap`` bytes.

    Bad gzip data and data that ends early are InputErrors located at the line the text
    had reached; more than ``cap`` bytes raises ``too_large``. Shared by every reader of
    files that may come compressed (cycle files, OCV reading files).
    """
    parts: list[bytes] = []
    total = 0
    rest = data
    while rest:  # one gzip member after another
        inflater = zlib.decompressobj(wbits=31)  # 31 = gzip header and trailer
        try:
            # Asking for one byte more than the cap: output stops short only at the cap.
            chunk = inflater.decompress(rest, cap - total + 1)
        except zlib.error as exc:
            raise InputError(
                f"the file is not valid gzip data ({str(exc).rpartition(': ')[2]})",
                SourceRef(name, b"".join(parts).count(b"\n") + 1),
                "Copy the file again; if it is not compressed, its name must not end in .gz.",
            ) from None
        parts.append(chunk)
        total += len(chunk)
        if total > cap:
            raise too_large
        if not inflater.eof:
            raise InputError(
                "the compressed data ends early: the file is cut short",
                SourceRef(name, b"".join(parts).count(b"\n") + 1),
                cut_hint,
            )
        rest = inflater.unused_data.lstrip(b"\0")  # zero padding may follow a member
    return b"".join(parts)


def _too_large(name: str, cap: int) -> InputError:
    size = f"{cap // 2**20} MiB" if cap % 2**20 == 0 else f"{cap} bytes"
    return InputError(
        f"the file holds more than {size} of text, the most formgate reads",
        SourceRef(name),
        "Check that the file is one cell's record.",
    )


def _decode(raw: bytes, name: str, encoding: str) -> str:
    if encoding == "latin-1":
        return raw.decode("latin-1")
    bom = 3 if raw.startswith(b"\xef\xbb\xbf") else 0
    try:
        return raw[bom:].decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw.count(b"\n", 0, bom + exc.start) + 1
        byte = raw[bom + exc.start]
        hint = (
            "If the file is Latin-1 text, read it through an import profile "
            'with encoding = "latin-1".'
        )
        if raw.startswith((b"\xff\xfe", b"\xfe\xff")):
            hint = "The file looks like UTF-16 text: have it written as UTF-8."
        raise InputError(
            f"byte 0x{byte:02X} (offset {bom + exc.start} in the file) is not UTF-8 text",
            SourceRef(name, line),
            hint,
        ) from None


def _read_head(text: str, name: str, profile: Profile) -> _Head:
    head = _Head(block_line=profile.skip_lines + 1)
    prefix = profile.metadata_prefix
    pos, number = 0, 0
    seen_metadata = False
    while pos < len(text):
        end = text.find("\n", pos)
        end = len(text) if end < 0 else end
        line, pos = text[pos:end], end + 1
        number += 1
        stripped = line.strip()
        if number <= profile.skip_lines or not stripped:
            continue
        if stripped.startswith(prefix):
            if not seen_metadata:
                head.block_line, seen_metadata = number, True
            _add_metadata(head, stripped[len(prefix) :], number, name)
            continue
        head.header_line = number
        head.fields = [f.strip() for f in _split_fields(line, profile.delimiter)]
        head.data_start = min(pos, len(text))
        return head
    if not text.strip():
        raise InputError("the file is empty", SourceRef(name), _CUT_SHORT_HINT)
    raise InputError(
        "no header row: the file ends before any line of column names",
        SourceRef(name, number),
        "A cycle file needs a header row (e.g. time_s,voltage_V,current_A) and data rows.",
    )


def _add_metadata(head: _Head, body: str, number: int, name: str) -> None:
    key, colon, value = body.partition(":")
    key, value = key.strip(), value.strip()
    if not colon or not key:
        return  # a plain comment line
    if key in head.metadata_lines and key in V1_METADATA:
        raise InputError(
            f"metadata {key} is given twice (lines {head.metadata_lines[key]} and {number})",
            SourceRef(name, number),
            "Keep one of the two lines.",
        )
    if key not in head.metadata_lines:
        head.metadata[key] = value
        head.metadata_lines[key] = number


def _collect_metadata(head: _Head, name: str, profile: Profile) -> dict[str, str]:
    metadata = dict(head.metadata)
    if profile.file_name_pattern is not None:
        base = name.replace("\\", "/").rpartition("/")[2]
        found = profile.file_name_pattern.search(base)
        if found is None:
            raise InputError(
                f"the file name does not match the import profile's file_name_pattern "
                f"'{profile.file_name_pattern.pattern}'",
                SourceRef(name),
                "Rename the file, or change file_name_pattern in the import profile "
                f"{profile.name}.",
            )
        for key, value in found.groupdict().items():
            if value is None or not value.strip():
                continue
            if metadata.get(key, value.strip()) != value.strip():
                raise InputError(
                    f"metadata {key} is '{metadata[key]}' in the file but '{value.strip()}' "
                    "in the file name",
                    SourceRef(name, head.metadata_lines[key]),
                    "Correct whichever is wrong before the cell is judged.",
                )
            metadata[key] = value.strip()
    for key, value in profile.metadata.items():
        metadata.setdefault(key, value)
    _check_stage(metadata, head, name, profile)
    for key in REQUIRED_METADATA:
        if key in head.metadata_lines and not metadata[key]:
            raise InputError(
                f"metadata {key} is empty",
                SourceRef(name, head.metadata_lines[key]),
                f"Give it a value: '# {key}: ...'.",
            )
        if not metadata.get(key):
            found_keys = ", ".join(metadata) or "none"
            raise InputError(
                f"no {key} in the metadata (found: {found_keys})",
                SourceRef(name, head.block_line),
                f"Add a line '{profile.metadata_prefix} {key}: ...' before the header, or "
                + (
                    "set it under [metadata] in an import profile."
                    if key == "cell_type"
                    else "take it from the file name with an import profile's file_name_pattern."
                ),
            )
    return metadata


def _check_stage(metadata: dict[str, str], head: _Head, name: str, profile: Profile) -> None:
    """Refuse a ``stage`` that is not one a cycle file may hold, naming its line."""
    stage = metadata.get("stage")
    if stage is None or stage in CYCLE_FILE_STAGES:
        return
    allowed = ", ".join(CYCLE_FILE_STAGES)
    if "stage" in head.metadata_lines:
        where, origin = SourceRef(name, head.metadata_lines["stage"]), "the file"
    elif "stage" in profile.metadata and profile.metadata["stage"] == stage:
        where, origin = SourceRef(name), f"the import profile {profile.name}"
    else:
        where, origin = SourceRef(name), "the file name"
    raise InputError(
        f"metadata stage is '{stage}' in {origin}, not a stage a cycle file may hold",
        where,
        f"Give one of: {allowed}; or leave the stage out for a file of the whole program.",
    )


def file_stages(metadata: Mapping[str, str]) -> tuple[str, ...]:
    """The stages of a cell's making a read file covers: its ``stage``, else the whole program.

    ``metadata`` is a Trace's, so its stage has been checked.

    >>> file_stages({"stage": "grading"}), file_stages({})
    (('grading',), ('formation', 'grading'))
    """
    stage = metadata.get("stage")
    return WHOLE_PROGRAM if stage is None else CYCLE_FILE_STAGES[stage]


def _find_columns(head: _Head, name: str, profile: Profile) -> dict[str, int]:
    columns: dict[str, int] = {}
    for quantity, header in profile.columns.items():
        places = [i for i, f in enumerate(head.fields) if f == header]
        if len(places) > 1:
            raise InputError(
                f"the column {header} appears twice (columns {places[0] + 1} and {places[1] + 1})",
                SourceRef(name, head.header_line, places[1] + 1),
                "Rename or remove one of them.",
            )
        if places:
            columns[quantity] = places[0]
        elif quantity in REQUIRED_COLUMNS:
            raise InputError(
                f"no column for {quantity} (found: {', '.join(head.fields)})",
                SourceRef(name, head.header_line),
                _missing_column_hint(head.fields, header, profile),
            )
    return columns


def _missing_column_hint(fields: list[str], header: str, profile: Profile) -> str:
    if len(fields) == 1:
        for mark, word in _DELIMITER_NAMES.items():
            if mark != profile.delimiter and mark in fields[0]:
                return (
                    f"The header looks {word}-separated: read the file through an import "
                    f'profile with delimiter = "{word}".'
                )
    where = "map it in an import profile"
    if not profile.is_v1:
        where = f"map it under [columns] in the import profile {profile.name}"
    for f in fields:
        if f.lower() == header.lower():
            return f"Rename the column {f} to {header}, or {where}."
    return f"Rename the column, or {where}."


def _data_end(data: bytes, start: int, head: _Head, name: str, profile: Profile) -> int:
    """Where the data rows in ``data[start:]`` end: trailing blank lines are not rows."""
    blank = _blank(profile).encode("ascii")
    end = len(data)
    while end > start:  # trailing blank lines are the end of the file, not an error
        cut = data.rfind(b"\n", start, end)
        if data[max(cut + 1, start) : end].strip(blank):
            break
        end = max(cut, start)
    if end == start:
        raise InputError(
            "the header is not followed by any data rows",
            SourceRef(name, head.header_line),
            _CUT_SHORT_HINT,
        )
    return end  # blank lines inside show up as short rows in _parse


def _blank(profile: Profile) -> str:
    """Characters a blank line may hold (a tab is an empty field in a tab-separated file)."""
    return " " if profile.delimiter == "\t" else " \t"


def _blank_line_error(line: int, name: str) -> InputError:
    return InputError(
        "blank line inside the data",
        SourceRef(name, line),
        "Remove the blank line; every line after the header must be a data row.",
    )


def _parse(data: bytes, start: int, end: int, head: _Head, name: str, profile: Profile) -> pd.DataFrame:
    """Run pandas' C parser on ``data[start:end]``; on any failure, find the line at fault.

    Types are left to pandas to infer (asking for float64 would turn 'True' into 1.0);
    a column that is not all numbers comes back as text and ``_numbers`` names the field.
    """
    expected = len(head.fields)
    if data[end:] in (b"", b"\n"):
        stream = io.BytesIO(data)  # shares the bytes; pandas reads on from the position
        stream.seek(start)
    else:
        stream = io.BytesIO(data[start:end])
    try:
        frame = pd.read_csv(
            stream,
            encoding="utf-8",
            sep=profile.delimiter,
            decimal=profile.decimal,
            header=None,
            keep_default_na=False,
            na_values=[""],
            skip_blank_lines=False,
            low_memory=False,
            engine="c",
        )
    except (ValueError, TypeError, OverflowError) as exc:  # ParserError is a ValueError
        raise _diagnose(_region(data, start, end), head, name, profile, str(exc)) from None
    # Without quote marks (which may hold line breaks) or NUL bytes, pandas makes one
    # row per line; only then is counting the lines (a pass over megabytes) skipped.
    plain = data.find(b'"', start, end) < 0 and data.find(b"\0", start, end) < 0
    rows = len(frame) if plain else data.count(b"\n", start, end) + 1
    if frame.shape[1] != expected or len(frame) != rows:
        raise _diagnose(_region(data, start, end), head, name, profile, "rows and header disagree")
    short = np.flatnonzero(frame[expected - 1].isna().to_numpy())
    if short.size:
        lines = _region(data, start, end).split("\n")
        for row in short.tolist():
            if not lines[row].strip(_blank(profile)):
                raise _blank_line_error(head.header_line + 1 + row, name)
            count = _count_fields(lines[row], profile.delimiter)
            if count < expected:
                raise _field_count_error(count, row, rows, head, name)
    return frame


def _region(data: bytes, start: int, end: int) -> str:
    """The data rows as text, for finding the line at fault (the bytes are valid UTF-8)."""
    return data[start:end].decode("utf-8")


def _count_fields(line: str, delimiter: str) -> int:
    if '"' not in line:
        return line.count(delimiter) + 1
    return len(_split_fields(line, delimiter))


def _split_fields(line: str, delimiter: str) -> list[str]:
    try:
        return next(csv.reader([line], delimiter=delimiter), [""])
    except csv.Error:  # e.g. a field longer than the csv module allows
        return line.split(delimiter)


def _field_count_error(count: int, row: int, rows: int, head: _Head, name: str) -> InputError:
    expected = len(head.fields)
    last = row == rows - 1 and count < expected
    problem = f"{count} fields where the header has {expected}"
    return InputError(
        problem + (": the file looks cut short" if last else ""),
        SourceRef(name, head.header_line + 1 + row),
        _CUT_SHORT_HINT if last else _ROW_HINT,
    )


def _diagnose(region: str, head: _Head, name: str, profile: Profile, why: str) -> InputError:
    lines = region.split("\n")
    for row, line in enumerate(lines):
        if not line.strip(_blank(profile)):
            return _blank_line_error(head.header_line + 1 + row, name)
        if line.count('"') % 2:
            return InputError(
                "a quote opens a field but does not close it on this line",
                SourceRef(name, head.header_line + 1 + row),
                "Remove the stray quote mark.",
            )
        count = _count_fields(line, profile.delimiter)
        if count != len(head.fields):
            return _field_count_error(count, row, len(lines), head, name)
    return InputError(  # pragma: no cover - pandas failed, yet every line looks right
        f"the data cannot be read as {_DELIMITER_NAMES[profile.delimiter]}-separated text "
        f"({(why.strip().splitlines() or ['no reason given'])[-1]})",
        SourceRef(name, head.header_line + 1),
        _ROW_HINT,
    )


def _number_pattern(decimal: str) -> re.Pattern[str]:
    d = re.escape(decimal)
    return re.compile(rf"[ \t]*[+-]?(?:[0-9]+(?:{d}[0-9]*)?|{d}[0-9]+)(?:[eE][+-]?[0-9]+)?[ \t]*")


def _numbers(
    frame: pd.DataFrame, index: int, head: _Head, name: str, profile: Profile, factor: float
) -> FloatArray:
    """Column ``index`` as float64 times ``factor`` (file unit -> v1 unit); empty fields NaN."""
    series = frame[index]
    header = head.fields[index]
    if series.dtype.kind in "iuf":
        values: FloatArray = series.to_numpy(dtype=np.float64)
    else:  # pandas kept text: some field is not a number under this profile
        number = _number_pattern(profile.decimal)
        parsed: list[float] = []
        for row, cell in enumerate(series.tolist()):
            if cell is None or cell == "" or (isinstance(cell, float) and math.isnan(cell)):
                parsed.append(math.nan)
                continue
            if isinstance(cell, int | float) and not isinstance(cell, bool):
                try:  # e.g. a whole number too large for int64
                    parsed.append(float(cell))
                except OverflowError:  # too large even for a float: refused as infinite below
                    parsed.append(math.inf if cell > 0 else -math.inf)
                continue
            text = str(cell)
            if isinstance(cell, bool) or not number.fullmatch(text):
                raise _not_a_number(text, row, index, head, name, profile)
            # looks like a number yet pandas kept it as text (e.g. a huge integer)
            parsed.append(float(text.replace(profile.decimal, ".")))
        values = np.array(parsed, dtype=np.float64)
    if factor == 1.0:
        scaled: FloatArray = values
    else:
        with np.errstate(over="ignore"):
            scaled = values * factor
    scaled = _frozen(scaled)
    infinite = np.flatnonzero(np.isinf(scaled))
    if infinite.size:
        row = int(infinite[0])
        what = "not a finite number" if np.isinf(values[row]) else "too large to convert"
        raise InputError(
            f"{header} is {values[row]:g}, {what}",
            SourceRef(name, head.header_line + 1 + row, index + 1),
            "Fix the value, or leave it empty if it is missing.",
        )
    return scaled


def _not_a_number(
    cell: str, row: int, index: int, head: _Head, name: str, profile: Profile
) -> InputError:
    shown = cell if len(cell) <= 40 else cell[:37] + "..."
    shown = shown if shown.isprintable() else shown.encode("unicode_escape").decode("ascii")
    hint = "Fix the value, or leave it empty if it is missing."
    other = "." if profile.decimal == "," else ","
    if _number_pattern(other).fullmatch(cell):
        word, current = ("comma", "point") if other == "," else ("point", "comma")
        hint = f'The value has a decimal {word}, but the file is read with decimal = "{current}"'
        hint += (
            ": read it through an import profile that says otherwise."
            if profile.is_v1
            else f" (import profile {profile.name})."
        )
    return InputError(
        f"{head.fields[index]} is '{shown}', not a number",
        SourceRef(name, head.header_line + 1 + row, index + 1),
        hint,
    )


def _frozen(values: _Array) -> _Array:
    """``values`` read-only and owning its data, copied only if it is a view (of pandas' frame).

    The Trace then keeps the array without copying it again (model.frozen_array).
    """
    if not (values.flags.owndata and values.flags.c_contiguous):
        values = values.copy()
    values.setflags(write=False)
    return values


def _whole_numbers(
    frame: pd.DataFrame, index: int, head: _Head, name: str, profile: Profile, quantity: str
) -> IntArray:
    """Column ``index`` as int64: step or cycle numbers, which must be whole numbers."""
    series = frame[index]
    if series.dtype == np.int64:  # pandas read every field as a whole number
        ints: IntArray = series.to_numpy()
        if len(ints) and ints.min() >= -(2**53) and ints.max() <= 2**53:
            return _frozen(ints)
    values = _numbers(frame, index, head, name, profile, 1.0)
    _refuse_non_integers(values, index, head, name, quantity)
    return _frozen(values.astype(np.int64))


def _refuse_non_integers(
    values: FloatArray, index: int, head: _Head, name: str, quantity: str
) -> None:
    too_big = np.abs(values) > 2**53  # beyond this a float no longer holds every whole number
    bad = np.flatnonzero(~np.isfinite(values) | too_big | (values != np.round(values)))
    if bad.size:
        row = int(bad[0])
        found = "empty" if np.isnan(values[row]) else f"{values[row]:g}"
        raise InputError(
            f"{head.fields[index]} is {found}, not a whole {quantity} number",
            SourceRef(name, head.header_line + 1 + row, index + 1),
            f"Fix the value, or remove the {quantity} column and let formgate find the steps.",
        )
