"""Named fault points where the station can be made to kill itself, for crash-recovery tests.

``FORMGATE_FAULT=after_commit`` (a name from POINTS) makes the process SIGKILL
itself the first time it passes that point; ``FORMGATE_FAULT_AFTER=N`` lets N
passes go by first. Unset (always, in production), every point is a no-op.
"""

from __future__ import annotations

import os
import signal

POINTS = (
    "after_claim",  # file moved into work/, nothing recorded yet
    "after_record_claim",  # ledger knows the input, not yet judged
    "after_commit",  # result and outbox committed, no files written
    "mid_render",  # a queued certificate's temp file written, not renamed into place
    "after_certificate",  # a queued certificate in place and recorded, not yet marked rendered
    "after_write",  # the result JSON in place, not yet recorded as a published file
    "after_publish",  # outputs in place and recorded, input still in work/
    "after_archive_move",  # input moved to archive/quarantine, not yet recorded
    "after_send",  # mail accepted by the server, not yet marked sent
    "before_cell_publish",  # a cell certificate rendered, nothing of it written yet
    "after_cell_json",  # the cell JSON in place, its certificate not yet, nothing recorded
)

_armed = os.environ.get("FORMGATE_FAULT", "")
_skip = int(os.environ.get("FORMGATE_FAULT_AFTER", "0") or 0)
_passes = 0


def point(name: str) -> None:
    """Kill this process here if the fault point ``name`` is armed."""
    global _passes
    if name != _armed:
        return
    _passes += 1
    if _passes > _skip:
        os.kill(os.getpid(), signal.SIGKILL)
