"""Settle hand-over: read a quiet file's head and tail and ask whether its record looks cut.

An edge: it reads an open file (and the import profile the file is read with) and hands
the bytes to record_end.looks_cut, which is pure. The station calls it before it takes a
file in settle hand-over; a file that looks cut waits up to ``cut_wait_factor`` times
``settle_s`` before it is taken anyway (and then held by the judge as incomplete).
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import BinaryIO

from pipeline.errors import FormgateError
from pipeline.judge.record_end import HEAD_BYTES, TAIL_BYTES, join_head_and_tail, looks_cut
from pipeline.read.profile import Profile, load_profile
from pipeline.rulebook.book import RuleBook


def read_head_and_tail(fh: BinaryIO) -> bytes:
    """The file's first HEAD_BYTES and last TAIL_BYTES (whole lines of each), or all of it."""
    size = os.fstat(fh.fileno()).st_size
    fh.seek(0)
    if size <= HEAD_BYTES + TAIL_BYTES:
        return fh.read()
    head = fh.read(HEAD_BYTES)
    fh.seek(size - TAIL_BYTES)
    return join_head_and_tail(head, fh.read(TAIL_BYTES))


def cut_reason(fh: BinaryIO, name: str, rulebook: RuleBook, profile_path: Path | None) -> str | None:
    """Why the open file's record looks cut short of its program's end, or None.

    A compressed file, a workbook or a Parquet file is read whole (its tail alone cannot
    be read). A profile that
    cannot be read gives None: the judge reports it.
    """
    profile: Profile | None = None
    if profile_path is not None:
        try:
            profile = load_profile(profile_path.read_text(encoding="utf-8"), profile_path.name)
        except (OSError, UnicodeDecodeError, FormgateError):
            return None
    if name.endswith(".gz") or (profile is not None and profile.file_format != "text"):
        fh.seek(0)  # a compressed file, a workbook or a Parquet file is read whole
        data = fh.read()
    else:
        data = read_head_and_tail(fh)
    fh.seek(0)
    return looks_cut(data, name, rulebook, profile)
