"""What one input may cost: its lines and rows, checked on its bytes before it is judged.

An unattended station must bound what a single file can take from it: one 50 MB
line, or hundreds of millions of rows, would hold a worker for minutes and gigabytes
before any reader could complain. The station's worker checks the text against the
limits in station.toml first and stops at the first line past them, with an error
naming the file, the line and the limit. A ``.csv.gz`` file is checked on its
unpacked text, unpacked in blocks, counted as it comes and thrown away: a gzip bomb is
refused at ``max_uncompressed_MB`` having held one block, long before the worker's memory
runs out (the reader unpacks a file within the limit again, and reports a damaged stream
itself). Pure: bytes and limits in, an InputError raised.

>>> check_text(b"a,b\\n1,2\\n", "x.csv", TextLimits(max_line_bytes=10, max_rows=5))
>>> try:
...     check_text(b"a,b\\n" + b"1" * 20 + b"\\n", "x.csv", TextLimits(10, 5))
... except InputError as exc:
...     print(exc.where, exc.problem[:30])
x.csv, line 2 the line is longer than the st
"""

from __future__ import annotations

import zlib
from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np

from pipeline.errors import InputError
from pipeline.model import SourceRef
from pipeline.read.cyclehead import MAX_UNCOMPRESSED_BYTES
from pipeline.read.gunzip import CutShort, PastCap, inflated

GZIP_MAGIC = b"\x1f\x8b"
_NEWLINE, _RETURN = 10, 13


@dataclass(frozen=True, slots=True)
class TextLimits:
    """Longest line (bytes, without its line break), most lines, and most text a file may have."""

    max_line_bytes: int
    max_rows: int
    max_uncompressed_bytes: int = MAX_UNCOMPRESSED_BYTES


def _blocks(data: bytes, name: str, limits: TextLimits) -> Iterator[bytes]:
    """The text of a gzip file in blocks, refused once it goes past ``max_uncompressed_bytes``."""
    try:
        yield from inflated(data, limits.max_uncompressed_bytes)
    except PastCap:
        raise _too_large(name, limits) from None
    except (CutShort, zlib.error):
        return  # cut short or not gzip after all: the reader says which


def _kb(limit: int) -> str:
    return f"{limit / 1024:.3g}"


def _too_large(name: str, limits: TextLimits) -> InputError:
    cap = limits.max_uncompressed_bytes
    return InputError(
        f"the file holds more than {cap / 2**20:.6g} MB of text (unpacked), the station's limit "
        f"max_uncompressed_MB = {cap / 2**20:.6g}",
        SourceRef(name),
        "The file was not judged. Check that it is one cell's record (a .gz file that unpacks "
        "to far more than it is written by a fault); if such files are expected, raise "
        "max_uncompressed_MB in station.toml, and worker_memory_MB with it (docs/station.md).",
    )


def _too_long(name: str, line: int, limits: TextLimits) -> InputError:
    return InputError(
        "the line is longer than the station's limit "
        f"max_line_kB = {_kb(limits.max_line_bytes)} ({limits.max_line_bytes:,} bytes)",
        SourceRef(name, line),
        "The file was not judged. If such files are expected, raise max_line_kB in station.toml.",
    )


def _too_many(name: str, limits: TextLimits) -> InputError:
    return InputError(
        f"the file has more than {limits.max_rows:,} lines, the station's limit "
        f"max_rows = {limits.max_rows}",
        SourceRef(name),
        "The file was not judged. Check that it is one cell's record; if such files are "
        "expected, raise max_rows in station.toml.",
    )


def _find_end(text: bytes, start: int, stop: int) -> int:
    """Position of the first line break in text[start:stop], or -1."""
    found = [p for p in (text.find(b"\n", start, stop), text.find(b"\r", start, stop)) if p >= 0]
    return min(found) if found else -1


def _long_line_plain(text: bytes, limit: int) -> int | None:
    """Start of the first line longer than ``limit`` in ``text``, or None; fast on normal text.

    A line longer than ``limit`` covers at least one whole window of ``limit // 2``
    bytes at a multiple of that size. So only windows that hold no line break at all
    are measured; in ordinary text every window holds one and the scan is a string
    search per window.
    """
    window = max(limit // 2, 1)
    checked_to = 0
    for start in range(0, len(text), window):
        stop = min(start + window, len(text))
        if start < checked_to or _find_end(text, start, stop) >= 0:
            continue
        begin = max(text.rfind(b"\n", 0, start), text.rfind(b"\r", 0, start)) + 1
        end = _find_end(text, stop, len(text))
        end = len(text) if end < 0 else end
        if end - begin > limit:
            return begin
        checked_to = end
    return None


def check_text(data: bytes, name: str, limits: TextLimits) -> None:
    """Raise InputError if a line is longer than ``max_line_bytes`` or there are more rows than allowed.

    A line ends at a line feed or a carriage return, so a file with carriage returns alone
    is measured line by line too; rows are counted by line feeds (by carriage returns in
    a file that has no line feed).
    """
    if not (data[:2] == GZIP_MAGIC or name.lower().endswith(".gz")):
        if len(data) > limits.max_uncompressed_bytes:
            raise _too_large(name, limits)
        begin = _long_line_plain(data, limits.max_line_bytes)
        if begin is not None:
            raise _too_long(name, data.count(b"\n", 0, begin) + 1, limits)
        if (data.count(b"\n") or data.count(b"\r")) > limits.max_rows:
            raise _too_many(name, limits)
        return
    line_feeds = returns = 0
    carried = 0  # length of the line that runs on from the previous block
    for block in _blocks(data, name, limits):
        codes = np.frombuffer(block, dtype=np.uint8)
        ends = np.flatnonzero((codes == _NEWLINE) | (codes == _RETURN))
        # where each line seen in this block starts, and how long it is
        starts = np.concatenate(([0], ends + 1))
        lengths = np.concatenate((ends, [len(block)])) - starts
        lengths[0] += carried
        over = np.flatnonzero(lengths > limits.max_line_bytes)
        if over.size:
            first = int(over[0])
            before = 0 if first == 0 else block.count(b"\n", 0, int(starts[first]))
            raise _too_long(name, line_feeds + before + 1, limits)
        carried = int(lengths[-1])
        line_feeds += block.count(b"\n")
        returns += block.count(b"\r")
        if (line_feeds or returns) > limits.max_rows:
            raise _too_many(name, limits)
