"""Entries that stay in an inbox: those left in place, tried again only once they change, and
those that wait too long, alerted once.

An entry the station could not move out of its inbox (set-aside's "left in place") is
remembered as it was then (size, modification and change times, mode) and skipped until
it changes; a change (a new write, new permissions or flags) makes it eligible again, but
no sooner than its back-off, which doubles at each failed try (LEFT_FIRST_WAIT_S up to
LEFT_MAX_WAIT_S). So an entry that can never be moved costs one try, one log line and one
alert, not one per listing: each try writes a probe into the inbox, and the probe's own
events would otherwise wake the station into trying again at once. An entry unchanged for
``waiting_alert_s`` and not taken is overdue (waiting.py says which and why): one alert
names every newly overdue entry of an inbox. Claiming asks this object both questions on
every listing; it owns what it remembers.
"""

from __future__ import annotations

import hashlib
import logging
import time
from collections.abc import Collection
from dataclasses import dataclass
from pathlib import Path

from pipeline.station.guard import Guard
from pipeline.station.settings import InboxSettings, Settings
from pipeline.station.waiting import overdue_entries
from pipeline.station.watcher import Listing

log = logging.getLogger("formgate.station")

# An entry left in place is tried again once it changes, but not sooner than this after
# its last try, and twice as long after each failed try: a writer that keeps touching an
# entry the station cannot move must not make it try (and log, and probe) many times a
# second. Common practice for retries: exponential back-off with a cap.
LEFT_FIRST_WAIT_S = 10.0
LEFT_MAX_WAIT_S = 3600.0


@dataclass(frozen=True, slots=True)
class Left:
    """An entry left in place: how it was (size, mtime, ctime, mode), and when to try again."""

    stat: tuple[int, int, int, int]
    next_try_s: float  # time.monotonic()
    wait_s: float


def _stat(path: Path) -> tuple[int, int, int, int] | None:
    try:
        st = path.lstat()
    except OSError:
        return None
    return (st.st_size, st.st_mtime_ns, st.st_ctime_ns, st.st_mode)


class Lingering:
    """What the station remembers of the entries that stay in its inboxes."""

    def __init__(self, settings: Settings, guard: Guard) -> None:
        self.settings = settings
        self.guard = guard
        self.left: dict[tuple[str, str], Left] = {}  # (inbox, name) -> left in place, as it was
        self.overdue_alerted: set[tuple[str, str]] = set()

    def note_left(self, inbox: InboxSettings, name: str, path: Path, *, now_s: float) -> None:
        """Remember an entry that stayed in the inbox, as it is now: it is tried again once it
        changes, and no sooner than its back-off (doubled at each failed try)."""
        stat = _stat(path)
        if stat is None:  # gone: moved to quarantine, or someone took it
            self.left.pop((inbox.name, name), None)
            return
        was = self.left.get((inbox.name, name))
        wait_s = LEFT_FIRST_WAIT_S if was is None else min(2 * was.wait_s, LEFT_MAX_WAIT_S)
        self.left[(inbox.name, name)] = Left(stat, now_s + wait_s, wait_s)

    def still_left(self, inbox: InboxSettings, name: str, *, now_s: float) -> bool:
        """True while an entry left in place is to be skipped: unchanged, or changed within
        its back-off."""
        was = self.left.get((inbox.name, name))
        if was is None:
            return False
        if _stat(inbox.folder / name) == was.stat:
            return True
        return now_s < was.next_try_s

    def forget_gone(self, inbox: InboxSettings, present: Collection[str]) -> None:
        """Forget the entries of ``inbox`` left in place that are no longer there."""
        for key in [k for k in self.left if k[0] == inbox.name and k[1] not in present]:
            del self.left[key]

    def alert_overdue(self, inbox: InboxSettings, listing: Listing, ready: tuple[str, ...]) -> None:
        """One alert for the entries of ``inbox`` that have newly waited too long."""
        entries = [
            e
            for e in overdue_entries(
                listing, inbox, now_ns=time.time_ns(),
                waiting_alert_s=self.settings.waiting_alert_s, ready=ready,
            )
            if (inbox.name, e.name) not in self.overdue_alerted
            and not any(key == (inbox.name, e.name) for key in self.left)
        ]
        if not entries:
            return
        self.overdue_alerted |= {(inbox.name, e.name) for e in entries}
        lines = [f"- {e.name}: waiting {e.age}; {e.why}" for e in entries[:50]]
        if len(entries) > 50:
            lines.append(f"- and {len(entries) - 50} more (formgate status lists them)")
        for e in entries:
            log.warning("inbox %s: %s waits (%.0f s unchanged): %s", inbox.name, e.name, e.age_s, e.why)
        key = hashlib.sha256("\n".join(lines).encode()).hexdigest()[:16]
        self.guard.alert(
            f"{len(entries)} file(s) waiting in inbox {inbox.name}",
            f"These entries of {inbox.folder} have waited more than "
            f"{self.settings.waiting_alert_s:g} s without being taken:\n\n" + "\n".join(lines)
            + "\n\nCheck the cycler's hand-over; `formgate status` shows what still waits.",
            key=f"waiting:{inbox.name}:{key}",
        )
