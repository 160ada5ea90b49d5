"""What a file is by its first bytes: a workbook or a Parquet file, before it is read as text.

A workbook or a Parquet file handed to the text reader would fail on its first byte that
is not UTF-8, with a hint about Latin-1 that sends the user the wrong way. Looking at the
container's signature first lets the message say what the file is and how to read it.

>>> binary_kind(b"PAR1" + bytes(20) + b"PAR1"), binary_kind(b"time_s,voltage_V")
('Parquet file', None)
"""

from __future__ import annotations

import io
import zipfile
import zlib

from pipeline.errors import InputError
from pipeline.model import SourceRef
from pipeline.read.profile import Profile

# The signatures a file starts with (the station's settle hand-over looks for them too)
COMPOUND_MAGIC = b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1"  # a compound file: .xls, or an encrypted workbook
ZIP_MAGIC = b"PK\x03\x04"  # a zip archive's first local file header: .xlsx, .xlsm, .ods
PARQUET_MAGIC = b"PAR1"  # an Apache Parquet file starts and ends with it


def binary_kind(data: bytes) -> str | None:
    """'workbook (.xlsx)' and the like for a workbook, 'Parquet file', or None for anything else."""
    if data.startswith(PARQUET_MAGIC):
        return "Parquet file"
    if data.startswith(COMPOUND_MAGIC):
        if b"E\x00n\x00c\x00r\x00y\x00p\x00t\x00e\x00d\x00P\x00a\x00c\x00k\x00a\x00g\x00e" in data:
            return "password-protected workbook"
        return "workbook (.xls)"
    if data.startswith(ZIP_MAGIC):
        try:
            with zipfile.ZipFile(io.BytesIO(data)) as archive:
                names = set(archive.namelist())
                if "xl/workbook.xml" in names:
                    return "workbook (.xlsx)"
                if "mimetype" in names and b"spreadsheet" in archive.read("mimetype")[:100]:
                    return "workbook (.ods)"
        except (zipfile.BadZipFile, OSError, KeyError, ValueError, EOFError,
                NotImplementedError, RuntimeError, zlib.error):  # any damaged zip at all
            return "zip archive"
        return "zip archive"
    return None


def not_text_error(kind: str, name: str, profile: Profile) -> InputError:
    """The error for a workbook, Parquet or zip file met where text was expected."""
    if kind == "zip archive":
        return InputError(
            "the file is a zip archive, not a cycle file",
            SourceRef(name),
            "Unpack it and give formgate the cycle files inside.",
        )
    fmt = "parquet" if kind == "Parquet file" else "workbook"
    via = "an import profile" if profile.is_v1 else f"the import profile {profile.name}"
    if kind == "password-protected workbook":
        return InputError(
            "the file is a password-protected workbook, which formgate cannot open",
            SourceRef(name),
            "Export it again without a password.",
        )
    return InputError(
        f"the file is a {kind}, not text",
        SourceRef(name),
        f'Read it through {via} with [file] format = "{fmt}"; '
        "`formgate profile guess FILE` writes one that fits it.",
    )
