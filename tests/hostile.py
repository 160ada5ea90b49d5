"""Hostile inputs for the tests and benchmarks/hostile_inputs.py: a gzip bomb written by streaming,
and cycle files whose identifiers or metadata are as long as a writer may make them.

Nothing here holds a bomb's text in memory: one gzip member of a few dozen MiB of text is
compressed from 1 MiB blocks and written again and again (gzip allows members one after
another; every reader of formgate reads them as one text).
"""

from __future__ import annotations

import zlib
from pathlib import Path

from tests.station_kit import cycle_file

MIB = 2**20
BOMB_LINE = b"0" * 1023 + b"\n"  # zeros, as text lines of 1 KiB: within every line and row limit
BOMB_HEAD = b"# cell_id: BOMB-1\n# lot: LOT-A\n# cell_type: TEST-CELL\ntime_s,voltage_V,current_A\n"


def _member(text_mib: int) -> bytes:
    """One gzip member of ``text_mib`` MiB of BOMB_LINE, compressed block by block."""
    packer = zlib.compressobj(9, zlib.DEFLATED, 31)
    block = BOMB_LINE * (MIB // len(BOMB_LINE))
    parts = [packer.compress(block) for _ in range(text_mib)]
    parts.append(packer.flush())
    return b"".join(parts)


def write_gzip_bomb(path: Path, text_gib: float, member_mib: int = 64) -> int:
    """Write a .csv.gz whose text is a cycle file's head and then ``text_gib`` GiB of zero lines.

    Returns the compressed size in bytes (about 22 MB for 10 GiB).
    """
    head = zlib.compressobj(9, zlib.DEFLATED, 31)
    member = _member(member_mib)
    with path.open("wb") as out:
        out.write(head.compress(BOMB_HEAD) + head.flush())
        for _ in range(round(text_gib * 1024 / member_mib)):
            out.write(member)
    return path.stat().st_size


def with_cell_id(cell_id: str, *, seed: int = 0) -> bytes:
    """A good test cycle file (tests.station_kit.cycle_file) whose cell id is ``cell_id``."""
    return cycle_file("X-1", seed=seed).replace(b"# cell_id: X-1\n", f"# cell_id: {cell_id}\n".encode())


def with_metadata(entries: dict[str, str], *, seed: int = 0) -> bytes:
    """A good test cycle file with ``entries`` added to its metadata, after cell_id, lot and cell_type."""
    data = cycle_file("X-1", seed=seed)
    head, _, rest = data.partition(b"time_s,")
    lines = "".join(f"# {key}: {value}\n" for key, value in entries.items())
    return head + lines.encode() + b"time_s," + rest
