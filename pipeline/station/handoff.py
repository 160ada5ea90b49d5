"""Decide which files in an inbox are finished and may be claimed.

Pure: a listing of the inbox (name -> size, mtime) and what was seen before in,
a decision out. Three ways a cycler can hand a file over (docs/station.md):

- ``rename``: it writes under a temporary name and renames into place; a file
  with a final name is finished as soon as it is seen.
- ``marker``: it writes ``<name>.done`` beside the data file when the data is
  complete; the data file is finished when its marker exists.
- ``settle``: it just writes; the file is finished when its size and mtime have
  not changed for ``settle_s`` seconds and its content looks complete (a final
  newline, or a whole gzip stream).

Names starting with ``.`` or ``~$`` (an office program's lock file beside an open
workbook) or ending in ``.tmp`` / ``.part`` are never claimed.
Moving files and reading clocks are the watcher's and station's job.
"""

from __future__ import annotations

import io
import zlib
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from typing import BinaryIO

from pipeline.read.cyclehead import GZIP_MAGIC
from pipeline.read.sniff import COMPOUND_MAGIC, PARQUET_MAGIC, ZIP_MAGIC

TEMPORARY_SUFFIXES = (".tmp", ".part")
# an office program's lock file beside a workbook it has open (~$book.xlsx)
LOCK_FILE_PREFIX = "~$"
_ZIP_END = b"PK\x05\x06"
_ZIP_TAIL = 22 + 65535  # the end record and the longest archive comment
MODES = ("rename", "marker", "settle")


@dataclass(frozen=True, slots=True)
class Seen:
    """A file's size and mtime as last observed, and since when (monotonic s) they held."""

    size: int
    mtime_ns: int
    since_s: float


@dataclass(frozen=True, slots=True)
class Decision:
    """What to do with each name in the listing."""

    ready: tuple[str, ...] = ()  # finished data files to claim now
    waiting: tuple[str, ...] = ()  # data files not finished yet
    orphan_markers: tuple[str, ...] = ()  # markers whose data file never came
    ignored: tuple[str, ...] = ()  # temporary or hidden names
    seen: Mapping[str, Seen] = field(default_factory=dict)


def is_temporary(name: str) -> bool:
    """True for names a writer is still using: hidden, ``.tmp``, ``.part``, or a lock file ``~$...``."""
    return name.startswith((".", LOCK_FILE_PREFIX)) or name.endswith(TEMPORARY_SUFFIXES)


def observe(
    previous: Mapping[str, Seen], listing: Mapping[str, tuple[int, int]], now_s: float
) -> dict[str, Seen]:
    """Carry ``since_s`` over for files whose size and mtime did not change; restart it otherwise."""
    out: dict[str, Seen] = {}
    for name, (size, mtime_ns) in listing.items():
        old = previous.get(name)
        if old is not None and old.size == size and old.mtime_ns == mtime_ns:
            out[name] = old
        else:
            out[name] = Seen(size, mtime_ns, now_s)
    return out


def decide(
    mode: str,
    listing: Mapping[str, tuple[int, int]],
    previous: Mapping[str, Seen],
    now_s: float,
    *,
    settle_s: float = 30.0,
    marker_suffix: str = ".done",
    orphan_marker_s: float = 3600.0,
) -> Decision:
    """Sort an inbox listing into ready / waiting / orphan markers / ignored.

    ``listing`` maps file names to (size in bytes, mtime in ns). In ``settle``
    mode a ready file must still pass :func:`looks_complete` on its bytes before
    it is claimed; that check needs the content, so the caller makes it.

    >>> decide("rename", {"a.csv": (10, 1), "b.csv.part": (5, 1)}, {}, 0.0).ready
    ('a.csv',)
    """
    if mode not in MODES:
        raise ValueError(f"unknown hand-over mode {mode!r}")
    seen = observe(previous, listing, now_s)
    ready: list[str] = []
    waiting: list[str] = []
    orphans: list[str] = []
    ignored: list[str] = []
    for name in sorted(listing):
        if is_temporary(name):
            ignored.append(name)
            continue
        if mode == "marker" and name.endswith(marker_suffix):
            data = name[: -len(marker_suffix)]
            if data not in listing and now_s - seen[name].since_s >= orphan_marker_s:
                orphans.append(name)
            continue
        if mode == "rename":
            ready.append(name)
        elif mode == "marker":
            (ready if name + marker_suffix in listing else waiting).append(name)
        elif now_s - seen[name].since_s >= settle_s:
            ready.append(name)
        else:
            waiting.append(name)
    return Decision(tuple(ready), tuple(waiting), tuple(orphans), tuple(ignored), seen)


def _gzip_complete(chunks: Iterable[bytes]) -> bool:
    """True if the gzip stream fed in ``chunks`` reaches its end (output is thrown away)."""
    d = zlib.decompressobj(wbits=31)
    try:
        for chunk in chunks:
            pending = chunk
            while pending and not d.eof:
                d.decompress(pending, 1 << 20)  # bounded output: only reaching the end matters
                pending = d.unconsumed_tail
            if d.eof:
                return True
        while not d.eof and d.decompress(b"", 1 << 20):  # output still held back
            pass
    except zlib.error:
        return False
    return d.eof


def looks_complete(data: bytes) -> bool:
    """True if the bytes look like a whole file: a complete gzip stream, text ending in a newline,
    or a workbook or Parquet file whose end is written.

    A writer that pauses mid-line, or a gzip stream cut short, fails this even
    when its size has not changed for a while.
    """
    return file_looks_complete(io.BytesIO(data))


def file_looks_complete(fh: BinaryIO) -> bool:
    """:func:`looks_complete` for an open file, reading only what it needs.

    Text needs only its last byte; a gzip stream is read through once, in blocks. A
    workbook is a zip archive (.xlsx, .ods), finished once its end-of-central-directory
    record is written (PKWARE's APPNOTE.TXT, section 4.3.16), or a compound file (.xls), whose
    size is a whole number of 512-byte sectors (MS-CFB, section 2.2); a Parquet file
    ends with its footer and the magic ``PAR1`` again (Apache Parquet file format).
    """
    head = fh.read(8)
    if head[:2] == GZIP_MAGIC:
        fh.seek(0)
        return _gzip_complete(iter(lambda: fh.read(1 << 20), b""))
    size = fh.seek(0, 2)
    if size == 0:
        return False
    if head.startswith(ZIP_MAGIC):
        fh.seek(max(0, size - _ZIP_TAIL))
        tail = fh.read(_ZIP_TAIL)
        end = tail.rfind(_ZIP_END)
        while end >= 0:  # the record whose comment reaches the file's end exactly
            if len(tail) - end == 22 + int.from_bytes(tail[end + 20 : end + 22], "little"):
                return True
            end = tail.rfind(_ZIP_END, 0, end)
        return False
    if head.startswith(COMPOUND_MAGIC):
        return size % 512 == 0
    if head.startswith(PARQUET_MAGIC):
        fh.seek(size - 4)
        return size >= 12 and fh.read(4) == PARQUET_MAGIC
    fh.seek(-1, 2)
    return fh.read(1) == b"\n"
