"""The heartbeat file: what a monitor and `formgate status` read of a running station.

Written every ``heartbeat_s`` by a new file renamed into place, so that a reader never
sees half of it. A full disk refuses the new file, and the station would then look
"not responding" for as long as the disk stays full, just when its "paused: the disk is
full" matters most. So the file is kept at a fixed size, padded with spaces (which JSON
ignores), and when the rename way fails for want of space the same bytes are written over
the old ones in place: blocks already there need no new space. A reader that catches
an in-place write half done reads again (:func:`read_heartbeat`).
"""

from __future__ import annotations

import errno
import json
import os
import time
from collections.abc import Mapping
from pathlib import Path

from pipeline.writing import write_atomic

SIZE = 8192  # bytes: the JSON of a heartbeat with a few troubles, padded to this
NO_ROOM = (errno.ENOSPC, errno.EDQUOT)


def heartbeat_bytes(beat: Mapping[str, object]) -> bytes:
    """The heartbeat as JSON, padded with spaces to :data:`SIZE` (longer if it must be)."""
    data = (json.dumps(beat, indent=2) + "\n").encode("utf-8")
    return data + b" " * (SIZE - len(data)) if len(data) < SIZE else data


def write_heartbeat(path: Path, beat: Mapping[str, object]) -> None:
    """Rewrite the heartbeat file; on a full disk, over the old bytes in place. OSError if
    neither way works (no file there yet, or the new heartbeat longer than the old)."""
    data = heartbeat_bytes(beat)
    try:
        write_atomic(data, path, sync=False)
    except OSError as exc:
        if exc.errno not in NO_ROOM:
            raise
        fd = os.open(path, os.O_WRONLY)
        try:
            if os.fstat(fd).st_size < len(data):
                raise
            os.pwrite(fd, data, 0)
        finally:
            os.close(fd)


def read_heartbeat(path: Path, tries: int = 5) -> dict[str, object]:
    """The heartbeat's contents; a read that catches an in-place write half done is tried
    again. FileNotFoundError if there is none; ValueError if it stays unreadable."""
    for attempt in range(tries):
        text = path.read_text(encoding="utf-8")
        try:
            found = json.loads(text)
        except ValueError:
            if attempt == tries - 1:
                raise
            time.sleep(0.01)
            continue
        return dict(found) if isinstance(found, dict) else {}
    return {}
