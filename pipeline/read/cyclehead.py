"""A cycle file's head: its bytes inflated and decoded, the ``# key: value`` metadata and the header row.

Handles gzip (one member after another, counted while it is unpacked and never more
than a cap), the text encoding (UTF-8 with or without a byte-order mark, or Latin-1
through an import profile), the metadata block with the profile's defaults and file-name
pattern, the stage a file says it holds, and the header row's fields. Every metadata key
and value and every column name is measured as soon as it is cut out of its line and
refused past :mod:`pipeline.read.bounds`' limit. The data part of a large file is left as bytes: the columns
and the numbers under the header are left to :mod:`pipeline.read.cyclenumbers`, putting
both into a Trace to :mod:`pipeline.read.cyclefile`. Anything it cannot read becomes an
InputError naming the file and line.
"""

from __future__ import annotations

import csv
import zlib
from dataclasses import dataclass, field

from pipeline.acceptance.rules import CYCLE_FILE_STAGES
from pipeline.errors import InputError
from pipeline.model import SourceRef
from pipeline.read.bounds import MAX_METADATA_ENTRIES, check_length, fits, shown, too_long
from pipeline.read.gunzip import CutShort, PastCap, inflated
from pipeline.read.profile import Profile
from pipeline.read.profile_keys import REQUIRED_METADATA, V1_METADATA

GZIP_MAGIC = b"\x1f\x8b"
CUT_SHORT_HINT = "Copy the file again once the cycler has finished writing it."
# The most text formgate reads of one cycle file (unpacked, for a .csv.gz), where no
# station setting says otherwise: 2,000,000 rows (a station's max_rows) of 128 bytes,
# about three times a real record's rows (docs/station.md, "Sizing").
MAX_UNCOMPRESSED_BYTES = 256 * 2**20


class _NoHeader(InputError):
    """The text ends before a header row: in the first block of a file, read on."""


@dataclass
class Head:
    """What comes before the data: metadata lines, the header row and where the data starts."""

    metadata: dict[str, str] = field(default_factory=dict)
    metadata_lines: dict[str, int] = field(default_factory=dict)
    block_line: int = 1  # first line of the metadata block (or of the file)
    header_line: int = 0
    fields: list[str] = field(default_factory=list)
    data_start: int = 0
    # Where the head's numbers point: "line" (text), "row" (a sheet of a workbook, named by
    # ``sheet``) or "" (no place to point at, e.g. a Parquet file's key/value metadata).
    unit: str = "line"
    sheet: str | None = None

    def ref(self, name: str, line: int | None, column: int | None = None) -> SourceRef:
        """Where ``line`` of the head stands in file ``name``, for messages."""
        if not self.unit or line is None:
            return SourceRef(name, sheet=self.sheet)
        return SourceRef(name, line, column, sheet=self.sheet, unit=self.unit)


def split_head(raw: bytes, name: str, profile: Profile) -> tuple[Head, bytes, int]:
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


def _ascii_head(raw: bytes, name: str, profile: Profile) -> Head:
    """_read_head on as few whole lines from the start of an ASCII file as hold the header."""
    limit = 1 << 16
    while True:
        whole = limit >= len(raw)
        chunk = raw if whole else raw[: raw.rfind(b"\n", 0, limit) + 1]
        try:
            head = _read_head(chunk.decode("ascii"), name, profile)
        except _NoHeader:  # any other error stands whatever follows
            if whole:
                raise
        else:
            return head
        limit *= 4


def decompress(data: bytes, name: str, cap: int) -> bytes:
    if not (data[:2] == GZIP_MAGIC or name.lower().endswith(".gz")):
        if len(data) > cap:
            raise _too_large(name, cap)
        return data
    return inflate(data, name, cap, _too_large(name, cap), CUT_SHORT_HINT)


def inflate(data: bytes, name: str, cap: int, too_large: InputError, cut_hint: str) -> bytes:
    """A gzip file's bytes inflated, one member after another, never more than ``cap`` bytes.

    Unpacked block by block and counted as it goes (:mod:`pipeline.read.gunzip`): past
    ``cap`` it raises ``too_large`` having held at most ``cap`` bytes and one block. Bad
    gzip data and data that ends early are InputErrors located at the line the text had
    reached. Shared by every reader of files that may come compressed (cycle files, OCV
    reading files).
    """
    parts: list[bytes] = []
    try:
        for block in inflated(data, cap):
            parts.append(block)
    except PastCap:
        parts.clear()
        raise too_large from None
    except zlib.error as exc:
        raise InputError(
            f"the file is not valid gzip data ({str(exc).rpartition(': ')[2]})",
            SourceRef(name, _lines_in(parts) + 1),
            "Copy the file again; if it is not compressed, its name must not end in .gz.",
        ) from None
    except CutShort:
        raise InputError(
            "the compressed data ends early: the file is cut short",
            SourceRef(name, _lines_in(parts) + 1),
            cut_hint,
        ) from None
    return parts[0] if len(parts) == 1 else b"".join(parts)


def _lines_in(parts: list[bytes]) -> int:
    return sum(part.count(b"\n") for part in parts)


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


def _read_head(text: str, name: str, profile: Profile) -> Head:
    head = Head(block_line=profile.skip_lines + 1)
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
        head.fields = [f.strip() for f in split_fields(line, profile.delimiter)]
        _check_column_names(head.fields, number, name)
        head.data_start = min(pos, len(text))
        return head
    if not text.strip():
        raise _NoHeader("the file is empty", SourceRef(name), CUT_SHORT_HINT)
    raise _NoHeader(
        "no header row: the file ends before any line of column names",
        SourceRef(name, number),
        "A cycle file needs a header row (e.g. time_s,voltage_V,current_A) and data rows.",
    )


def _check_column_names(fields: list[str], line: int, name: str) -> None:
    for index, field_name in enumerate(fields):
        if not fits(field_name):
            raise too_long(
                f"the name of column {index + 1} ({shown(field_name)})",
                field_name,
                SourceRef(name, line, index + 1),
                "Check the header row: a column name needs a few dozen bytes at most.",
            )


def _add_metadata(head: Head, body: str, number: int, name: str) -> None:
    key, colon, value = body.partition(":")
    if not colon:
        return  # a plain comment line
    key, value = key.strip(), value.strip()
    if not key:
        return
    where = SourceRef(name, number)
    if not fits(key):
        raise too_long(f"the metadata key {shown(key)}", key, where)
    check_length(value, f"metadata {key}", where)
    if key in head.metadata_lines and key in V1_METADATA:
        raise InputError(
            f"metadata {key} is given twice (lines {head.metadata_lines[key]} and {number})",
            SourceRef(name, number),
            "Keep one of the two lines.",
        )
    if key not in head.metadata_lines:
        if len(head.metadata) >= MAX_METADATA_ENTRIES:
            raise InputError(
                f"metadata {key} is one entry more than the {MAX_METADATA_ENTRIES} formgate reads",
                where,
                "Check that the lines before the header are the cycler's metadata: a cycle "
                "file needs a handful (cell_id, lot, cell_type, ...).",
            )
        head.metadata[key] = value
        head.metadata_lines[key] = number


def collect_metadata(head: Head, name: str, profile: Profile) -> dict[str, str]:
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
            check_length(value.strip(), f"metadata {key} in the file name", SourceRef(name))
            if metadata.get(key, value.strip()) != value.strip():
                raise InputError(
                    f"metadata {key} is '{metadata[key]}' in the file but '{value.strip()}' "
                    "in the file name",
                    head.ref(name, head.metadata_lines[key]),
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
                head.ref(name, head.metadata_lines[key]),
                f"Give it a value: '# {key}: ...'.",
            )
        if not metadata.get(key):
            found_keys = ", ".join(metadata) or "none"
            raise InputError(
                f"no {key} in the metadata (found: {found_keys})",
                head.ref(name, head.block_line),
                _where_metadata_goes(head, key, profile)
                + (
                    "set it under [metadata] in an import profile."
                    if key == "cell_type"
                    else "take it from the file name with an import profile's file_name_pattern."
                ),
            )
    return metadata


def _where_metadata_goes(head: Head, key: str, profile: Profile) -> str:
    """Where a missing metadata entry can be written, in the file's own terms."""
    if head.unit == "row":
        where = f"sheet '{profile.metadata_sheet}'" if profile.metadata_sheet else "the data sheet"
        above = "" if profile.metadata_sheet else ", above the header row"
        return f"Add a row '{key}' with its value in the next cell to {where}{above}, or "
    if not head.unit:
        return f"Write a key/value entry '{key}' into the file's metadata, or "
    return f"Add a line '{profile.metadata_prefix} {key}: ...' before the header, or "


def _check_stage(metadata: dict[str, str], head: Head, name: str, profile: Profile) -> None:
    """Refuse a ``stage`` that is not one a cycle file may hold, naming its line."""
    stage = metadata.get("stage")
    if stage is None or stage in CYCLE_FILE_STAGES:
        return
    allowed = ", ".join(CYCLE_FILE_STAGES)
    if "stage" in head.metadata_lines:
        where, origin = head.ref(name, head.metadata_lines["stage"]), "the file"
    elif "stage" in profile.metadata and profile.metadata["stage"] == stage:
        where, origin = SourceRef(name), f"the import profile {profile.name}"
    else:
        where, origin = SourceRef(name), "the file name"
    raise InputError(
        f"metadata stage is '{stage}' in {origin}, not a stage a cycle file may hold",
        where,
        f"Give one of: {allowed}; or leave the stage out for a file of the whole program.",
    )


def split_fields(line: str, delimiter: str) -> list[str]:
    try:
        return next(csv.reader([line], delimiter=delimiter), [""])
    except csv.Error:  # e.g. a field longer than the csv module allows
        return line.split(delimiter)
