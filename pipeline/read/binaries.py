"""Binary inputs before a reader opens them: the kind of file, and what a workbook unpacks to.

Both the workbook and the Parquet reader first ask :func:`wrong_kind` whether the bytes are
the kind of file the import profile says. Then, before python-calamine or openpyxl unpacks
anything, :func:`check_unpacked_size` measures a workbook's zip package (each deflate stream
is run through zlib and counted, whatever sizes the package declares) against the
unpacked-size cap, so a zip bomb is refused holding at most one block of it; and each
sheet's span (every cell from A1 to its last row and column, as calamine lays it out,
repeated rows and cells of an .ods counted) against the cap, so two cells far apart or a
row repeated a million times are refused before they take gigabytes.
"""

from __future__ import annotations

import io
import re
import zipfile
import zlib

from pipeline.errors import InputError
from pipeline.model import SourceRef
from pipeline.read.cyclehead import CUT_SHORT_HINT, GZIP_MAGIC
from pipeline.read.profile import Profile
from pipeline.read.sniff import PARQUET_MAGIC, ZIP_MAGIC, binary_kind, not_text_error

_ZIP_KINDS = ("workbook (.xlsx)", "workbook (.ods)")
_INFLATE_BLOCK = 1 << 20
AGAIN_HINT = "Copy the file again, or open it in its spreadsheet program and save or export it again."


def size_words(cap: int) -> str:
    """The cap in words: '256 MiB', or bytes when it is no whole number of MiB."""
    return f"{cap // 2**20} MiB" if cap % 2**20 == 0 else f"{cap:,} bytes"


def wrong_kind(data: bytes, name: str, profile: Profile, wanted: str) -> InputError | None:
    """The error for a file that is not what ``profile`` reads (``wanted``: workbook or Parquet file).

    None when the first bytes are those of a ``wanted`` file (or of a zip package, which
    may be a workbook the signature test does not know).
    """
    fmt = "workbook" if wanted == "workbook" else "parquet"
    says = f'its import profile {profile.name} says [file] format = "{fmt}"'
    if not data:
        return InputError("the file is empty", SourceRef(name), CUT_SHORT_HINT)
    kind = binary_kind(data)
    if kind == "password-protected workbook":
        return not_text_error(kind, name, profile)
    if wanted == "workbook" and kind is not None and kind != "Parquet file":
        return None
    if wanted == "Parquet file" and data.startswith(PARQUET_MAGIC):
        return None
    if kind is not None:
        other = "parquet" if kind == "Parquet file" else "workbook"
        return InputError(
            f"the file is a {kind}, not a {wanted}; {says}",
            SourceRef(name),
            f'Read it through a profile with [file] format = "{other}".'
            if kind != "zip archive"
            else "Unpack it and give formgate the files inside.",
        )
    if data.startswith(GZIP_MAGIC):
        return InputError(
            f"the file is gzip-compressed data, not a {wanted}; {says}",
            SourceRef(name),
            f"Give formgate the {wanted} itself, not compressed.",
        )
    if b"\0" not in data[:4096]:
        return InputError(
            f"the file is text, not a {wanted}; {says}",
            SourceRef(name),
            'Read it through a profile with [file] format = "text", or give the profile '
            f"the {wanted} the cycler wrote.",
        )
    return InputError(
        f"the file is not a {wanted}: its first bytes are those of no {wanted} formgate reads",
        SourceRef(name),
        AGAIN_HINT if wanted == "workbook" else "Copy the file again, or write it again as Parquet.",
    )


def _too_large(name: str, cap: int) -> InputError:
    return InputError(
        f"the workbook holds more than {size_words(cap)} once unpacked, the most formgate reads",
        SourceRef(name),
        "Check that the file is one cell's record.",
    )


def damaged(name: str, why: str, what: str = "workbook", hint: str = AGAIN_HINT) -> InputError:
    """A ``what`` (a workbook, a Parquet file) that its library could not read, and why."""
    why = (why.strip().splitlines() or ["no reason given"])[0]
    why = why if len(why) <= 160 else why[:157] + "..."
    return InputError(
        f"the {what} cannot be read: it is damaged or cut short ({why})", SourceRef(name), hint
    )


def check_unpacked_size(data: bytes, name: str, kind: str | None, cap: int) -> bool:
    """Refuse a workbook that unpacks past ``cap``; True when calamine can read its packing.

    An .xls file is not packed: its size is its bytes. A zip package's parts are each
    inflated here and counted (never more than ``cap`` bytes and one block), because the
    sizes a package declares may lie. Parts packed other than stored or deflated (which
    every spreadsheet program writes) are left to openpyxl, which reads through Python's
    zipfile and never unpacks more of a part than its declared size, checked here.
    """
    if len(data) > cap:
        raise _too_large(name, cap)
    if kind not in _ZIP_KINDS:
        return True
    parts = zip_parts(data, name)
    if sum(part.file_size for part in parts) > cap:
        raise _too_large(name, cap)
    if any(part.compress_type not in (zipfile.ZIP_STORED, zipfile.ZIP_DEFLATED) for part in parts):
        return False
    view = memoryview(data)
    total = 0
    for part in parts:
        total += _unpacked_size(view, part, name, cap - total)
        if total > cap:
            raise _too_large(name, cap)
    _check_spans(data, parts, name, cap)
    return True


# A sheet's part: an .xlsx or .xlsm keeps each sheet in a part of its own, an .ods all of them in one.
_SHEET_PART = re.compile(r"xl/worksheets/[^/]+\.xml|content\.xml")
# What one cell of a sheet's span may take in the reader's memory, at most: calamine lays a
# sheet out as every cell between its first and its last (32 bytes each), so two cells far
# apart, or a row repeated a million times, take gigabytes from a few bytes of XML. A real
# sheet's cell takes 30 or more bytes of XML, so no sheet within the unpacked-size cap is
# refused for its span.
CELL_BYTES = 16
_REF = rb'r="([A-Z]{0,3})([0-9]{0,12})"'


def _check_spans(data: bytes, parts: list[zipfile.ZipInfo], name: str, cap: int) -> None:
    """Refuse a workbook whose sheets, laid out cell by cell, would take more than ``cap`` bytes."""
    limit = cap // CELL_BYTES
    with zipfile.ZipFile(io.BytesIO(data)) as package:
        for part in parts:
            if not _SHEET_PART.fullmatch(part.filename):
                continue
            try:
                xml = package.read(part)
            except (zipfile.BadZipFile, OSError, ValueError, EOFError, zlib.error, RuntimeError) as exc:
                raise damaged(name, f"the part {part.filename} cannot be unpacked: {exc}") from None
            cells = _ods_cells(xml) if part.filename == "content.xml" else _xlsx_cells(xml, limit)
            if cells > limit:
                raise InputError(
                    f"the workbook's sheets span {cells:,} cells from their first to their last, "
                    f"more than the {limit:,} formgate lays out",
                    SourceRef(name),
                    "Check that the file is one cell's record, with no stray cell far below or "
                    "right of the rows.",
                )


def _xlsx_cells(xml: bytes, limit: int) -> int:
    """How many cells the sheet spans from A1 to its last row and column (at most; cheap when it is small)."""
    plain = b":sheetData" not in xml and (
        xml.count(b"<c ") + xml.count(b"<c>") + xml.count(b"<c/>") == xml.count(b'<c r="')
    )
    if not plain:  # a cell without its reference, or prefixed names: place every cell
        return _xlsx_cells_in_order(xml)
    digits = len(str(max(xml.count(b"<row"), 1)))
    if not re.search(rb'<c r="(?:[A-Z]{2}|[A-Z][0-9]{%d})' % (digits + 1), xml):
        bound = 26 * (int(10**digits) - 1)  # columns A to Z, rows of at most ``digits`` digits
        if bound <= limit:
            return bound
    columns = {_column_number(c) for c in set(re.findall(rb'<c r="([A-Z]{1,3})', xml))}
    rows: list[bytes] = re.findall(rb'<c r="[A-Z]{1,3}([0-9]{1,12})', xml)
    return max(columns, default=0) * max(map(int, rows), default=0)


def _xlsx_cells_in_order(xml: bytes) -> int:
    row = column = last_row = last_column = 0
    for found in re.finditer(rb"<(?:[\w.-]+:)?(row|c)\b([^>]*)>", xml):
        ref = re.search(rb"\b" + _REF, found[2])
        if found[1] == b"row":
            row, column = (int(ref[2]) if ref and ref[2] else row + 1), 0
            continue
        if ref and ref[1]:
            column = _column_number(ref[1])
        else:
            column += 1
        last_row = max(last_row, int(ref[2]) if ref and ref[2] else row)
        last_column = max(last_column, column)
    return last_row * last_column


def _column_number(letters: bytes) -> int:
    number = 0
    for letter in letters:
        number = number * 26 + letter - 64
    return number


_ODS_TOKEN = re.compile(rb"<(/?)table:(table-row|table-cell|covered-table-cell|table)\b([^>]*)>")
_ODS_VALUED = re.compile(
    rb'office:(?:value|string-value|date-value|time-value|boolean-value)=|table:formula=|office:value-type="string"'
)


def _ods_cells(xml: bytes) -> int:
    """How many cells an .ods file's sheets span, repeated rows and cells counted as laid out."""
    total = 0
    rows: list[tuple[int, int]] = []  # (times repeated, cells up to the last with a value)
    repeats = position = width = 0
    for closing, kind, attributes in _ODS_TOKEN.findall(xml):
        if kind == b"table-cell" or kind == b"covered-table-cell":
            if not closing:
                position += _repeated(attributes, _COLUMNS_REPEATED)
                if _ODS_VALUED.search(attributes):
                    width = position
        elif kind == b"table-row":
            if closing:
                rows.append((repeats, width))
            else:
                repeats, position, width = _repeated(attributes, _ROWS_REPEATED), 0, 0
        else:  # a sheet begins or ends
            if closing:
                total += _table_cells(rows)
            rows = []
    return total


_ROWS_REPEATED = re.compile(rb'table:number-rows-repeated="([0-9]{1,12})"')
_COLUMNS_REPEATED = re.compile(rb'table:number-columns-repeated="([0-9]{1,12})"')


def _repeated(attributes: bytes, pattern: re.Pattern[bytes]) -> int:
    if b"-repeated=" not in attributes:
        return 1
    found = pattern.search(attributes)
    return int(found[1]) if found else 1


def _table_cells(rows: list[tuple[int, int]]) -> int:
    filled = [k for k, (_, width) in enumerate(rows) if width]
    if not filled:
        return 0
    span = rows[filled[0] : filled[-1] + 1]
    return sum(times for times, _ in span) * max(width for _, width in span)


def zip_parts(data: bytes, name: str) -> list[zipfile.ZipInfo]:
    try:
        with zipfile.ZipFile(io.BytesIO(data)) as package:
            return package.infolist()
    except (zipfile.BadZipFile, OSError, ValueError, EOFError, KeyError, NotImplementedError) as exc:
        raise damaged(name, f"not a valid zip package: {exc}") from None


def _unpacked_size(view: memoryview, part: zipfile.ZipInfo, name: str, room: int) -> int:
    """What the part unpacks to, counted block by block and given up past ``room`` bytes."""
    start = part.header_offset
    header = bytes(view[start : start + 30])
    if len(header) < 30 or header[:4] != ZIP_MAGIC:
        raise damaged(name, f"the part {part.filename} is not where the package says")
    start += 30 + int.from_bytes(header[26:28], "little") + int.from_bytes(header[28:30], "little")
    if part.compress_type == zipfile.ZIP_STORED:
        return min(part.compress_size, max(len(view) - start, 0))
    inflater = zlib.decompressobj(-zlib.MAX_WBITS)
    total, pos = 0, start
    try:
        while not inflater.eof and pos < len(view) and total <= room:
            block = view[pos : pos + _INFLATE_BLOCK]
            pos += len(block)
            total += len(inflater.decompress(block, _INFLATE_BLOCK))
            while inflater.unconsumed_tail and not inflater.eof and total <= room:
                total += len(inflater.decompress(inflater.unconsumed_tail, _INFLATE_BLOCK))
    except zlib.error as exc:
        raise damaged(name, f"the part {part.filename} is not valid deflate data: {exc}") from None
    if total <= room and not inflater.eof:
        raise damaged(name, f"the part {part.filename} ends early")
    return total
