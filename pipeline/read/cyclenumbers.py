"""A cycle file's numbers: the profile's columns in the header, the data rows parsed, each value checked.

The rows are parsed by pandas' C engine straight from the file's bytes, in chunks of
rows, keeping only the columns the profile reads (so what parsing holds grows with the
rows and the columns read, not with the columns a file has); the numbers are converted
to s, V, A (positive = charge) by the caller's factors, and step and cycle numbers must be
whole. When pandas fails, or a field is not a number, the line (and column)
at fault is found and named, with what to do: those located messages are most of this
module and belong beside the parsing they describe. The head (decoding, metadata, header
row) is left to :mod:`pipeline.read.cyclehead`; whether the numbers make sense for the cell
type to :mod:`pipeline.read.validate`.
"""

from __future__ import annotations

import io
import math
import re
from collections.abc import Collection
from typing import TypeVar

import numpy as np
import pandas as pd

from pipeline.errors import InputError
from pipeline.model import FloatArray, IntArray, SourceRef, owns_memory
from pipeline.read.bounds import shown_value
from pipeline.read.cyclehead import CUT_SHORT_HINT, Head, split_fields
from pipeline.read.profile import Profile
from pipeline.read.table import RawTable

_Array = TypeVar("_Array", FloatArray, IntArray)
REQUIRED_COLUMNS = ("time", "voltage", "current")
# Beyond v1 a column is read only when the profile names it, so it must then be there.
NEEDED_WHEN_NAMED = ("mode", "capacity", "energy")
_DELIMITER_NAMES = {",": "comma", ";": "semicolon", "\t": "tab"}
_ROW_HINT = "Each row needs one field per header column; leave a missing value empty."
# Fields pandas tokenizes and converts at once (its own low-memory reading takes about as
# many): some tens of MB whatever the file's width, and a typical record in one chunk.
CHUNK_FIELDS = 2**20


def find_columns(head: Head, name: str, profile: Profile) -> dict[str, int]:
    """Each quantity the profile reads -> its 0-based column number in the header."""
    columns: dict[str, int] = {}
    for quantity, header in profile.columns.items():
        places = [i for i, f in enumerate(head.fields) if f == header]
        if len(places) > 1:
            raise InputError(
                f"the column {header} appears twice (columns {places[0] + 1} and {places[1] + 1})",
                head.ref(name, head.header_line, places[1] + 1),
                "Rename or remove one of them.",
            )
        if places:
            columns[quantity] = places[0]
        elif quantity in REQUIRED_COLUMNS or quantity in NEEDED_WHEN_NAMED:
            raise InputError(
                f"no column for {quantity} (found: {', '.join(head.fields)})",
                head.ref(name, head.header_line),
                _missing_column_hint(head.fields, header, profile),
            )
    if profile.time_stamps == "step elapsed" and "step" not in columns:
        raise InputError(
            f"no step column ({profile.columns['step']}), which time since the step began needs "
            f"(found: {', '.join(head.fields)})",
            head.ref(name, head.header_line),
            "Name the step column under [columns] step in the import profile "
            f"{profile.name}.",
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


def data_end(data: bytes, start: int, head: Head, name: str, profile: Profile) -> int:
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
            CUT_SHORT_HINT,
        )
    return end  # blank lines inside show up as short rows in parse_rows


def _blank(profile: Profile) -> str:
    """Characters a blank line may hold (a tab is an empty field in a tab-separated file)."""
    return " " if profile.delimiter == "\t" else " \t"


def _blank_line_error(line: int, name: str) -> InputError:
    return InputError(
        "blank line inside the data",
        SourceRef(name, line),
        "Remove the blank line; every line after the header must be a data row.",
    )


def parse_rows(
    data: bytes,
    start: int,
    end: int,
    head: Head,
    name: str,
    profile: Profile,
    keep: Collection[int] | None = None,
) -> pd.DataFrame:
    """Run pandas' C parser on ``data[start:end]``; on any failure, find the line at fault.

    Types are left to pandas to infer (asking for float64 would turn 'True' into 1.0);
    a column that is not all numbers comes back as text and :func:`numbers` names the field.
    Only the columns in ``keep`` (0-based, all when None) and the last one (an empty last
    field shows a short row) are in the frame, under their own numbers. The rows are
    parsed in chunks of about CHUNK_FIELDS fields, each checked whole (the tokenizer
    counts every row's fields) before its other columns are let go.

    An empty field is NaN (pandas' NA filter with "" its only NA value). Looking every
    field up among the NA values costs the parser several per cent of its time, and most
    records have no empty field: so the rows are parsed first without the filter, where
    an empty field leaves its column as text holding "", and parsed again with it only
    when a column read holds such a field (or the first parse fails, for the error the
    second one finds). Without an empty field the two parses give the same frame: the
    filter changes nothing but the fields it finds. A layout (header and separators) found
    with an empty field is parsed with the filter first from then on in this process, so a
    cycler that leaves a column empty as a rule pays for one parse, not two.
    """
    expected = len(head.fields)
    wanted = None if keep is None else sorted({*keep, expected - 1})
    if wanted is not None and len(wanted) == expected:
        wanted = None
    own = None if wanted is None else set(keep or ())
    layout = (profile.delimiter, profile.decimal, *head.fields)
    frame = None
    if layout not in _LAYOUTS_WITH_EMPTY_FIELDS:
        try:
            chunks = _chunks(_stream(data, start, end), profile, expected, wanted, empty_is_nan=False)
        except (ValueError, TypeError, OverflowError):  # ParserError is a ValueError
            chunks = []  # parsed again below, for pandas' own error
        parsed = bool(chunks)
        frame = _joined(chunks, own, empty_is_nan=False) if parsed else None  # empties chunks
        if frame is None and parsed:
            _remember_empty_fields(layout)
    if frame is None:
        try:
            chunks = _chunks(_stream(data, start, end), profile, expected, wanted, empty_is_nan=True)
        except (ValueError, TypeError, OverflowError) as exc:
            raise _diagnose(_region(data, start, end), head, name, profile, str(exc)) from None
        if not chunks:
            raise _diagnose(_region(data, start, end), head, name, profile, "rows and header disagree")
        frame = _joined(chunks, own, empty_is_nan=True)
        assert frame is not None
    # Without quote marks (which may hold line breaks) or NUL bytes, pandas makes one
    # row per line; only then is counting the lines (a pass over megabytes) skipped.
    plain = data.find(b'"', start, end) < 0 and data.find(b"\0", start, end) < 0
    rows = len(frame) if plain else data.count(b"\n", start, end) + 1
    if len(frame) != rows:
        raise _diagnose(_region(data, start, end), head, name, profile, "rows and header disagree")
    last = frame[expected - 1]
    if last.dtype.kind in "iub":  # whole numbers or True/False: no field was empty
        short = np.zeros(0, dtype=np.intp)
    elif last.dtype == np.float64:  # numbers: an empty field is NaN (pandas' isna, without its overhead)
        short = np.flatnonzero(np.isnan(last.to_numpy()))
    else:
        short = np.flatnonzero(last.isna().to_numpy())
    if short.size:
        lines = _region(data, start, end).split("\n")
        for row in short.tolist():
            if not lines[row].strip(_blank(profile)):
                raise _blank_line_error(head.header_line + 1 + row, name)
            count = _count_fields(lines[row], profile.delimiter)
            if count < expected:
                raise _field_count_error(count, row, rows, head, name)
    return frame


# Layouts (separators and header fields) whose records were found holding an empty field:
# only which of two parses giving the same frame goes first depends on it, never a result.
_LAYOUTS_WITH_EMPTY_FIELDS: set[tuple[str, ...]] = set()
_LAYOUTS_REMEMBERED = 256


def _remember_empty_fields(layout: tuple[str, ...]) -> None:
    if len(_LAYOUTS_WITH_EMPTY_FIELDS) >= _LAYOUTS_REMEMBERED:
        _LAYOUTS_WITH_EMPTY_FIELDS.clear()
    _LAYOUTS_WITH_EMPTY_FIELDS.add(layout)


def _stream(data: bytes, start: int, end: int) -> io.BytesIO:
    """``data[start:end]`` to parse, sharing ``data``'s bytes when the rows run to its end."""
    if data[end:] in (b"", b"\n"):
        stream = io.BytesIO(data)  # shares the bytes; pandas reads on from the position
        stream.seek(start)
        return stream
    return io.BytesIO(data[start:end])


def _chunks(
    stream: io.BytesIO,
    profile: Profile,
    expected: int,
    wanted: list[int] | None,
    *,
    empty_is_nan: bool,
) -> list[pd.DataFrame]:
    """The rows in frames of about CHUNK_FIELDS fields, of the ``wanted`` columns (all when
    None); none when the first row's field count is not the header's. ``empty_is_nan``:
    an empty field is NaN (else it is "", and its column text).

    A function of its own so that no frame outlives it but the ones returned: _joined
    lets the frames go as soon as it has taken their columns out.
    """
    chunks: list[pd.DataFrame] = []
    with pd.read_csv(
        stream,
        encoding="utf-8",
        sep=profile.delimiter,
        decimal=profile.decimal,
        header=None,
        keep_default_na=False,
        na_values=[""],
        na_filter=empty_is_nan,
        skip_blank_lines=False,
        low_memory=False,
        engine="c",
        chunksize=max(1, CHUNK_FIELDS // expected),
    ) as reader:
        for chunk in reader:
            if chunk.shape[1] != expected:  # the first row's fields are not the header's
                return []
            chunks.append(chunk if wanted is None else chunk[wanted])
    return chunks


def _joined(
    chunks: list[pd.DataFrame], own: Collection[int] | None, *, empty_is_nan: bool
) -> pd.DataFrame | None:
    """The chunks as one frame, each column of the type the whole file would have had;
    None when they were parsed without the NA filter (``empty_is_nan`` False) and a column
    holds an empty field (it is then text holding ""): the rows are parsed again with it.

    Chunks of whole numbers and decimals join as decimals, as one parse would give them;
    a column whose chunks differ otherwise (text or True/False in one, numbers or nothing
    in another) is joined as Python objects, so that :func:`numbers` names the field that
    is not a number instead of pandas turning True into 1.0.

    Each column of numbers in ``own`` (every column when None) is one array that holds its
    memory alone, which :func:`numbers` hands to the Trace as it is (:func:`_frozen`):
    the parser's own array when the rows came in one chunk (pandas' parser allocates each
    column's memory for it alone: model.owns_memory), with no copy at all; the chunks'
    arrays joined into one, each chunk's let go at once, when they came in many.
    """
    names = list(chunks[0].columns)
    parts = {column: [chunk[column] for chunk in chunks] for column in names}
    chunks.clear()  # the frames go; each column's parts are all that hold the parser's arrays
    columns: dict[int, object] = {}
    for column in names:
        series = parts.pop(column)
        kinds = {part.dtype.kind for part in series}
        if kinds <= set("iuf") and (own is None or column in own):
            arrays = [part.to_numpy() for part in series]
            series.clear()
            columns[column] = _whole_owner(arrays[0]) if len(arrays) == 1 else np.concatenate(arrays)
            arrays.clear()
            continue
        if not empty_is_nan and any(
            part.dtype.kind not in "iufb" and bool(part.eq("").any()) for part in series
        ):
            return None  # no number or True/False is empty: only text can hold ""
        if len({part.dtype for part in series}) > 1 and not kinds <= set("iuf"):
            series = [part.astype(object) for part in series]
        columns[column] = series[0] if len(series) == 1 else pd.concat(series, ignore_index=True)
    return pd.DataFrame(columns, copy=False)


def _region(data: bytes, start: int, end: int) -> str:
    """The data rows as text, for finding the line at fault (the bytes are valid UTF-8)."""
    return data[start:end].decode("utf-8")


def _count_fields(line: str, delimiter: str) -> int:
    if '"' not in line:
        return line.count(delimiter) + 1
    return len(split_fields(line, delimiter))


def _field_count_error(count: int, row: int, rows: int, head: Head, name: str) -> InputError:
    expected = len(head.fields)
    last = row == rows - 1 and count < expected
    problem = f"{count} fields where the header has {expected}"
    return InputError(
        problem + (": the file looks cut short" if last else ""),
        SourceRef(name, head.header_line + 1 + row),
        CUT_SHORT_HINT if last else _ROW_HINT,
    )


def _diagnose(region: str, head: Head, name: str, profile: Profile, why: str) -> InputError:
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


def numbers(table: RawTable, index: int, profile: Profile, factor: float) -> FloatArray:
    """Column ``index`` as float64 times ``factor`` (file unit -> v1 unit); empty fields NaN."""
    series = table.frame[index]
    header = table.header(index)
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
                raise _not_a_number(text, row, index, table, profile)
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
            table.at(row, index),
            "Fix the value, or leave it empty if it is missing.",
        )
    return scaled


def _not_a_number(
    cell: str, row: int, index: int, table: RawTable, profile: Profile
) -> InputError:
    shown = shown_value(cell)
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
        f"{table.header(index)} is '{shown}', not a number",
        table.at(row, index),
        hint,
    )


def _frozen(values: _Array) -> _Array:
    """``values`` read-only and holding its memory alone, copied only if it is a view of part
    of an array.

    The Trace then keeps the array without copying it again (model.frozen_array). A column
    of a frame is a view of the array that holds it: when that array holds its memory
    alone (model.owns_memory) and is the column whole, it is taken instead of a copy (the
    columns :func:`_joined` hands on, which nothing but the reader's frames holds).
    """
    if not (owns_memory(values) and values.flags.c_contiguous):
        values = _whole_owner(values)
    values.setflags(write=False)
    return values


def _whole_owner(values: _Array) -> _Array:
    """The 1-D array that holds ``values``' memory alone when ``values`` is all of it, else a copy."""
    owner = values.base
    while isinstance(owner, np.ndarray) and not owns_memory(owner):
        owner = owner.base
    if (
        isinstance(owner, np.ndarray)
        and owner.ndim == 1
        and owner.dtype == values.dtype
        and owner.size == values.size
        and owner.flags.c_contiguous
        and values.flags.c_contiguous
        and owner.ctypes.data == values.ctypes.data
    ):
        return owner
    return values.copy()


def whole_numbers(table: RawTable, index: int, profile: Profile, quantity: str) -> IntArray:
    """Column ``index`` as int64: step or cycle numbers, which must be whole numbers."""
    series = table.frame[index]
    if series.dtype == np.int64:  # pandas read every field as a whole number
        ints: IntArray = series.to_numpy()
        if len(ints) and ints.min() >= -(2**53) and ints.max() <= 2**53:
            return _frozen(ints)
    values = numbers(table, index, profile, 1.0)
    _refuse_non_integers(values, index, table, quantity)
    return _frozen(values.astype(np.int64))


def _refuse_non_integers(values: FloatArray, index: int, table: RawTable, quantity: str) -> None:
    too_big = np.abs(values) > 2**53  # beyond this a float no longer holds every whole number
    bad = np.flatnonzero(~np.isfinite(values) | too_big | (values != np.round(values)))
    if bad.size:
        row = int(bad[0])
        found = "empty" if np.isnan(values[row]) else f"{values[row]:g}"
        raise InputError(
            f"{table.header(index)} is {found}, not a whole {quantity} number",
            table.at(row, index),
            f"Fix the value, or remove the {quantity} column and let formgate find the steps.",
        )
