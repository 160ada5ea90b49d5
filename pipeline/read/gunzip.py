"""A gzip file's text unpacked block by block, counted while it is unpacked and stopped at a cap.

A few megabytes of gzip can unpack to gigabytes (a "gzip bomb"), so no member is ever
inflated in one call: the compressed bytes are fed in small slices, each call may give at
most one block, and the count of bytes unpacked so far is checked before more is asked
for. Past the cap, :class:`PastCap` is raised having held no more than the cap and one
block; the caller words the refusal (the reader, the station's limits). Members follow
one another (zero padding between them is skipped), as gzip allows.

>>> import gzip
>>> packed = gzip.compress(b"a,b\\n") + b"\\0\\0" + gzip.compress(b"1,2\\n")
>>> b"".join(inflated(packed, cap=100))
b'a,b\\n1,2\\n'
>>> try:
...     list(inflated(gzip.compress(b"0" * 10_000), cap=100))
... except PastCap:
...     print("refused")
refused
"""

from __future__ import annotations

import re
import zlib
from collections.abc import Iterator

BLOCK_BYTES = 4 * 2**20  # most text one step unpacks (a few ms of work at most)
_FEED_BYTES = 256 * 2**10  # compressed bytes handed to zlib at once: what it copies back, at most
_NOT_ZERO = re.compile(rb"[^\0]")
_GZIP = 31  # zlib's wbits for a gzip header and trailer


class PastCap(Exception):
    """The text goes on past the cap (nothing past cap + 1 bytes was unpacked)."""


class CutShort(Exception):
    """The compressed data ends inside a member: the file is cut short."""


def inflated(data: bytes, cap: int, block_bytes: int = BLOCK_BYTES) -> Iterator[bytes]:
    """The text of gzip ``data`` in blocks of at most ``block_bytes``, never past ``cap`` in all.

    Raises PastCap once more than ``cap`` bytes would come, CutShort when the data ends
    inside a member, and zlib.error when it is not gzip data.
    """
    view = memoryview(data)
    total = 0
    start = 0  # where the next member starts
    while start < len(data):
        inflater = zlib.decompressobj(wbits=_GZIP)
        fed = start
        pending: bytes | memoryview = b""
        while not inflater.eof:
            if not pending and fed < len(data):
                pending = view[fed : fed + _FEED_BYTES]
                fed += len(pending)
            # one byte more than the cap allows: the output stops short only at the cap
            # (never 0, which zlib takes for "no limit")
            block = inflater.decompress(pending, max(1, min(block_bytes, cap - total + 1)))
            pending = inflater.unconsumed_tail
            total += len(block)
            if total > cap:
                raise PastCap
            if block:
                yield block
            elif not pending and fed >= len(data) and not inflater.eof:
                raise CutShort  # no input left, and none of it made any text
        start = fed - len(inflater.unused_data)
        found = _NOT_ZERO.search(data, start)  # zero padding may follow a member
        start = found.start() if found else len(data)
