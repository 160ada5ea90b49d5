"""The writers' originals that settle mode keeps aside: watched, given back if they change.

Settle mode judges the station's own copy of a file and keeps the writer's original in
``work/.taken/`` (taken.py). At each review, an original that changed goes back into its
inbox, to be taken as a new version, with one alert; one unchanged for ``keep_originals_h``
(and at least HOLD_SETTLES times ``settle_s``) and equal to its copy is removed. A writer
that pauses for longer than ``settle_s`` and comes back within that time is seen; one that
comes back later still writes into a file that is no longer anywhere, so the default keeps
an original for a day. A fault here is logged and tried
again at the next review: it never pauses the station.
"""

from __future__ import annotations

import contextlib
import logging
import time
from pathlib import Path

from pipeline.names import to_text
from pipeline.station.guard import Guard
from pipeline.station.settings import InboxSettings, Settings
from pipeline.station.taken import HOLD_SETTLES, Original, give_back, originals, same_bytes, tidy
from pipeline.station.troubles import describe

log = logging.getLogger("formgate.station")


class Originals:
    """Reviews the originals kept aside; remembers which were found unchanged, and how."""

    def __init__(self, settings: Settings, guard: Guard) -> None:
        self.settings = settings
        self.guard = guard
        self.checked: dict[Path, tuple[int, int]] = {}  # (size, mtime) when found unchanged

    def review(self) -> None:
        """Watch the writers' originals that settle mode keeps aside (taken.py).

        One that changed goes back into its inbox, to be taken as a new version, with one
        alert; one unchanged for keep_originals_h (at least HOLD_SETTLES times settle_s) and
        equal to its copy is removed.
        A fault here is logged and tried again at the next review: it never pauses the station.
        """
        now_ns = time.time_ns()
        inboxes = {i.name: i for i in self.settings.inboxes}
        try:
            found = list(originals(self.settings.work))
        except OSError as exc:
            log.warning("the originals kept aside cannot be listed now (%s)", describe(exc))
            return
        for original in found:
            inbox = inboxes.get(original.inbox)
            if inbox is not None and not original.sha256:  # its copy was never completed
                with contextlib.suppress(OSError):
                    if give_back(original, inbox.folder) is not None:
                        log.info("%s: back in inbox %s (its copy was not completed)",
                                 to_text(original.name), inbox.name)
                continue
            quiet_s = (now_ns - original.mtime_ns) / 1e9
            if inbox is None or quiet_s < inbox.settle_s:
                continue  # still being written (or its inbox is gone): look again later
            stat = (original.size, original.mtime_ns)
            try:
                if self.checked.get(original.path) != stat:
                    if not same_bytes(original.path, original.sha256):
                        self.changed_after_taken(original, inbox)
                        continue
                    self.checked[original.path] = stat
                keep_s = max(HOLD_SETTLES * inbox.settle_s, self.settings.keep_originals_h * 3600)
                if quiet_s >= keep_s:
                    original.path.unlink()  # the archive holds the same bytes
                    self.checked.pop(original.path, None)
            except OSError as exc:
                log.warning("%s: cannot be checked now (%s)", original.path, describe(exc))
        if found:
            tidy(self.settings.work)

    def changed_after_taken(self, original: Original, inbox: InboxSettings) -> None:
        back = give_back(original, inbox.folder)
        name = to_text(original.name)
        if back is None:
            log.warning("%s changed after it was taken; its name is in use in inbox %s, so it "
                        "waits in %s", name, inbox.name, original.path.parent)
            return
        self.checked.pop(original.path, None)
        log.warning("%s: file changed after it was taken; back in inbox %s as a new version",
                    name, inbox.name)
        self.guard.alert(
            f"file changed after it was taken: {name}",
            f"{name} in inbox {inbox.name} was written to again after the station had taken "
            f"it (it had been unchanged for settle_s = {inbox.settle_s:g} s). The station judged "
            "and archived the file as it was then; the file as it is now goes back into the "
            "inbox and is judged as a new version, whose result supersedes the earlier one.\n\n"
            "A writer that pauses for longer than settle_s is taken too early: hand files over "
            "by rename or with a marker file instead (docs/station.md), or raise settle_s.",
            key=f"changed:{inbox.name}:{name}:{original.sha256}",
        )
