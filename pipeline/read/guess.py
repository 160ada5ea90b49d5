"""Guess an import profile from one cycle file: its bytes and name -> a complete, commented profile.

``formgate profile guess FILE`` prints what this module writes. It looks at the file as the
readers will: a workbook or a Parquet file by its first bytes (:mod:`pipeline.read.sniff`;
guessed in :mod:`pipeline.read.guess_books`), else delimited text (optionally gzip), where
it finds

- the encoding: UTF-8 with a byte-order mark, UTF-8, else Latin-1 (which reads any byte);
- the delimiter: of tab, semicolon and comma, the one under which the header and the data
  lines have the same number of fields, the most fields winning;
- the header: the first line of names with that many fields, followed by lines of numbers;
- the lines above it: the metadata lines ("# key: value", "// key: value", ...; their
  prefix is what those lines start with) and banner lines to skip;
- the decimal mark: a comma when numbers look like 3,412 under a delimiter that is not one.

What the columns hold (time, voltage, current, ..., units, the time's kind, the current's
sign, a mode column's values) is left to :mod:`pipeline.read.guess_columns`; writing the
profile, to :mod:`pipeline.read.guess_write`. Every key is written with the reason it was
chosen; a reason that starts with "unsure:" marks a guess to check. The profile loads with
``load_profile`` and reads the file with ``read_cycle_file`` as it is, unless the file
lacks something only a person can give (its cell type, say), which the profile then says.

Pure: a function of the bytes and the name. Raises InputError (naming the file) for a
file that holds no table to guess from.

>>> text = "# cell_id: C1\\n# lot: L1\\n# cell_type: T\\nt (s);U (V);I (A)\\n0;3,1;0\\n1;3,2;0,5\\n"
>>> profile = guess_profile(text.encode(), "c1.csv")
>>> 'delimiter = "semicolon"' in profile and 'decimal = "comma"' in profile
True
"""

from __future__ import annotations

import re
from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass

from pipeline.errors import InputError
from pipeline.model import SourceRef
from pipeline.read.cyclehead import CUT_SHORT_HINT, MAX_UNCOMPRESSED_BYTES, decompress, split_fields
from pipeline.read.guess_cells import UNSURE, Cells, Column, Decision, decimal_mark, make_column
from pipeline.read.guess_columns import guess_columns, most_common
from pipeline.read.guess_write import Entry, Layout, shown, toml_string, write_profile
from pipeline.read.profile_keys import DELIMITERS
from pipeline.read.sniff import binary_kind

# Rows looked at: all of a file up to this many, else the first half of them in a row and
# the rest spread evenly over the file.
SAMPLE_ROWS = 200_000
# The header must stand within this many lines of the top.
HEAD_LINES = 1000
_DELIMITER_WORDS = {v: k for k, v in DELIMITERS.items()}
# Tried in this order; on a tie the first wins (a tab or semicolon is rarely inside a field).
_DELIMITERS = ("\t", ";", ",")
_TABLES = ("workbook (.xlsx)", "workbook (.xls)", "workbook (.ods)", "Parquet file")


def guess_profile(data: bytes, name: str) -> str:
    """A complete, commented import profile (TOML text) that reads the file ``data`` named ``name``.

    Raises InputError when the file holds nothing to guess from (empty, no header row, no
    data rows, not a cycle file at all).
    """
    kind = binary_kind(data)
    if kind == "Parquet file":
        from pipeline.read.guess_books import guess_parquet

        return guess_parquet(data, name)
    if kind in _TABLES:
        from pipeline.read.guess_books import guess_workbook

        return guess_workbook(data, name)
    if kind is not None:
        raise _not_a_table(kind, name)
    raw = decompress(data, name, MAX_UNCOMPRESSED_BYTES)
    inner = binary_kind(raw) if raw is not data else None
    if inner is not None:
        raise InputError(
            f"the file is a gzip-compressed {inner}, which formgate does not read",
            SourceRef(name),
            "Unpack it first.",
        )
    return _guess_text(raw, name)


_WORKBOOK_NAMES = (".xlsx", ".xlsm", ".xls", ".ods", ".xlsb")


def _not_a_table(kind: str, name: str) -> InputError:
    if kind == "zip archive" and name.lower().endswith(_WORKBOOK_NAMES):
        return InputError(
            "the workbook cannot be read: it is damaged or cut short (not a whole zip package)",
            SourceRef(name),
            "Copy the file again, or open it in its spreadsheet program and save or export it again.",
        )
    if kind == "password-protected workbook":
        return InputError(
            "the file is a password-protected workbook, which formgate cannot open",
            SourceRef(name),
            "Export it again without a password.",
        )
    return InputError(
        f"the file is a {kind}, not a cycle file",
        SourceRef(name),
        "Unpack it and give formgate the cycle files inside.",
    )


# ---------------------------------------------------------------- the head of a text file


@dataclass
class _Head:
    """What the guess found above and in the header of a text file."""

    delimiter: str
    delimiter_why: str
    header_line: int  # 1-based
    fields: list[str]
    skip_lines: int
    skip_why: str
    prefix: str
    prefix_why: str
    metadata: dict[str, str]
    unread: dict[str, str]  # "key: value" on lines that are skipped
    lost: list[str]  # metadata keys on lines that are skipped


def _decode(raw: bytes, name: str) -> tuple[str, Decision]:
    if raw.startswith((b"\xff\xfe", b"\xfe\xff")):
        raise InputError(
            "the file looks like UTF-16 text, which formgate does not read",
            SourceRef(name, 1),
            "Have it written as UTF-8 (or Latin-1).",
        )
    if raw.startswith(b"\xef\xbb\xbf"):
        try:
            return raw[3:].decode("utf-8"), Decision("utf-8-sig", "UTF-8 that starts with a byte-order mark")
        except UnicodeDecodeError:
            pass
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw.count(b"\n", 0, exc.start) + 1
        return raw.decode("latin-1"), Decision(
            "latin-1",
            f"byte 0x{raw[exc.start]:02X} on line {line} is not UTF-8; Latin-1 reads every byte",
        )
    if text.isascii():
        return text, Decision("utf-8", "plain ASCII, which UTF-8 reads")
    return text, Decision("utf-8", "UTF-8 text")


def _count(line: str, delimiter: str) -> int:
    if '"' in line:
        return len(split_fields(line, delimiter))
    return line.count(delimiter) + 1


def _fields(line: str, delimiter: str) -> list[str]:
    if '"' in line:
        return [f.strip() for f in split_fields(line, delimiter)]
    return [f.strip() for f in line.split(delimiter)]


_KEY_VALUE = re.compile(r"([^\W\d][^:]{0,39}):\s*(\S.*)")
_ANY_NUMBER = re.compile(r"[+-]?(?:[0-9]+(?:[.,][0-9]*)?|[.,][0-9]+)(?:[eE][+-]?[0-9]+)?")


def _looks_like_header(fields: Sequence[str]) -> bool:
    named = [f for f in fields if f]
    numeric = sum(1 for f in fields if _ANY_NUMBER.fullmatch(f))
    return (
        len(named) >= max(2, len(fields) // 2)
        and numeric < len(fields) / 2
        and any(re.search(r"[^\W\d_]", f) for f in named)
    )


def _looks_like_data(fields: Sequence[str]) -> bool:
    return any(_ANY_NUMBER.fullmatch(f) for f in fields)


def _find_header(lines: Sequence[str], delimiter: str) -> tuple[int, int] | None:
    """(0-based header line, fields per row) for ``delimiter``, or None when it gives no table."""
    tail = [line for line in lines[-200:] if line.strip()]
    if not tail:
        return None
    width = most_common([_count(line, delimiter) for line in tail])
    if width < 2:
        return None
    for index, line in enumerate(lines[:HEAD_LINES]):
        if not line.strip() or _count(line, delimiter) != width:
            continue
        if not _looks_like_header(_fields(line, delimiter)):
            continue
        following = [n for n in lines[index + 1 : index + 40] if n.strip()][:3]
        if following and all(
            _count(n, delimiter) == width and _looks_like_data(_fields(n, delimiter)) for n in following
        ):
            return index, width
    return None


def _head(lines: list[str], name: str) -> _Head:
    found: list[tuple[int, int, str]] = []  # (fields, -order, delimiter)
    headers: dict[str, tuple[int, int]] = {}
    for order, delimiter in enumerate(_DELIMITERS):
        header = _find_header(lines, delimiter)
        if header is not None:
            headers[delimiter] = header
            found.append((header[1], -order, delimiter))
    if not found:
        raise InputError(
            "no header row followed by data rows was found (a line of column names, then "
            "lines of numbers, separated by commas, semicolons or tabs)",
            SourceRef(name),
            "Check that the file is a cycler's export of one cell's record.",
        )
    delimiter = max(found)[2]
    index, width = headers[delimiter]
    data = [line for line in lines[index + 1 :] if line.strip()]
    same = sum(1 for line in data if _count(line, delimiter) == width)
    word = _DELIMITER_WORDS[delimiter]
    delimiter_why = (
        f"the header (line {index + 1}) and {same} of {len(data)} data lines have {width} "
        f"{word}-separated fields"
    )
    prefix, prefix_why = _prefix(lines[:index], lines[index])
    last_other = 0  # the last line above the header that is neither blank nor metadata
    for number, line in enumerate(lines[:index], 1):
        if line.strip() and not line.strip().startswith(prefix):
            last_other = number
    metadata: dict[str, str] = {}
    unread: dict[str, str] = {}  # "key: value" lines that are skipped
    lost: list[str] = []
    for number, line in enumerate(lines[:index], 1):
        stripped = line.strip()
        if not stripped.startswith(prefix):
            pair = _KEY_VALUE.fullmatch(stripped)
            if pair and number <= last_other:
                unread.setdefault(pair[1].strip(), pair[2].strip())
            continue
        key, colon, value = stripped[len(prefix) :].partition(":")
        if not colon or not key.strip():
            continue
        if number <= last_other:
            lost.append(key.strip())
            unread.setdefault(key.strip(), value.strip())
        else:
            metadata.setdefault(key.strip(), value.strip())
    if last_other:
        span = "line 1" if last_other == 1 else f"lines 1 to {last_other}"
        skip_why = f"{span}: neither metadata nor the header (e.g. {shown(lines[last_other - 1].strip())})"
        plain = [k for k in unread if k not in lost]
        if plain:
            skip_why = (
                f"{span}: not the header; {', '.join(plain)} stand there as 'key: value' without "
                "a prefix, which formgate does not read as metadata (a cycler's metadata lines "
                "start with one, e.g. '# key: value')"
            )
    else:
        skip_why = "nothing to skip above the header"
    return _Head(
        delimiter=delimiter,
        delimiter_why=delimiter_why,
        header_line=index + 1,
        fields=_fields(lines[index], delimiter),
        skip_lines=last_other,
        skip_why=skip_why,
        prefix=prefix,
        prefix_why=prefix_why,
        metadata=metadata,
        unread=unread,
        lost=lost,
    )


def _prefix(above: Sequence[str], header: str) -> tuple[str, str]:
    """The prefix of the metadata lines above the header ('#', '//', ...), with the reason."""
    counts: Counter[str] = Counter()
    for line in above:
        stripped = line.strip()
        lead = re.match(r"[^\w\s]+", stripped)
        if lead is None or ":" not in stripped[lead.end() :]:
            continue
        for size in range(1, len(lead[0]) + 1):
            counts[lead[0][:size]] += 1
    if counts:
        most = max(counts.values())
        # the longest prefix every such line shares ('//' rather than '/')
        prefix = max((p for p, n in counts.items() if n == most), key=len)
        if not header.strip().startswith(prefix):
            numbers = [n for n, line in enumerate(above, 1) if line.strip().startswith(prefix)]
            where = f"line {numbers[0]}" if len(numbers) == 1 else f"lines {numbers[0]} to {numbers[-1]}"
            return prefix, f'{where} hold "{prefix} key: value"'
    default = next(p for p in ("#", "//", "%%") if not header.strip().startswith(p))
    return default, "no metadata lines above the header"


def _sample(data: list[str]) -> tuple[list[str], int]:
    """The data lines to look at, and how many of the first follow each other in the file."""
    rows = [line for line in data if line.strip()]
    if len(rows) <= SAMPLE_ROWS:
        return rows, len(rows)
    half = SAMPLE_ROWS // 2
    stride = max(1, (len(rows) - half) // half)
    return rows[:half] + rows[half::stride], half


# ---------------------------------------------------------------- text


def _guess_text(raw: bytes, name: str) -> str:
    text, encoding = _decode(raw, name)
    if not text.strip():
        raise InputError("the file is empty", SourceRef(name), CUT_SHORT_HINT)
    lines = text.replace("\r\n", "\n").replace("\r", "\n").split("\n")
    while lines and not lines[-1].strip():
        lines.pop()
    head = _head(lines, name)
    rows, contiguous = _sample(lines[head.header_line :])
    split = [_fields(row, head.delimiter) for row in rows]
    decimal, commas, points = decimal_mark([f for fields in split[:5000] for f in fields])
    if head.delimiter == ",":
        decimal = "."
    width = len(head.fields)
    columns: list[Column] = []
    for index in range(width):
        cells: list[object] = [fields[index] if index < len(fields) else "" for fields in split]
        columns.append(make_column(Cells(index, head.fields[index], cells), decimal))
    guess = guess_columns(columns, head.metadata, contiguous)

    layout = Layout(kind="text", metadata=head.metadata, unread_metadata=head.unread, headers=head.fields)
    word = _DELIMITER_WORDS[head.delimiter]
    layout.description.append(f"{word}-separated")
    layout.file.append(Entry("format", toml_string("text"), "delimited text"))
    layout.file.append(Entry("delimiter", toml_string(word), head.delimiter_why))
    if decimal == ",":
        layout.description.append("decimal comma")
        why = f"numbers are written like 3,412 ({commas} such fields"
        why += f", {points} like 3.412)" if points else ")"
        layout.file.append(Entry("decimal", toml_string("comma"), why))
    else:
        why = "numbers are written like 3.412" if points else "no number with a decimal mark was seen"
        if head.delimiter == ",":
            why = "the comma separates the fields, so the decimal mark is a point"
        layout.file.append(Entry("decimal", toml_string("point"), why))
    if encoding.value == "latin-1":
        layout.description.append("Latin-1")
    layout.file.append(Entry("encoding", toml_string(encoding.value), encoding.why))
    layout.file.append(Entry("skip_lines", str(head.skip_lines), head.skip_why))
    layout.file.append(Entry("metadata_prefix", toml_string(head.prefix), head.prefix_why))
    if head.lost:
        layout.notes.append(
            f"{UNSURE} the metadata {', '.join(head.lost)} stands on lines skipped above "
            "(a banner line follows it), so it is not read"
        )
    return write_profile(name, layout, guess)
