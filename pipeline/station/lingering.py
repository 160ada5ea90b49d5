"""Entries that stay in an inbox: those left in place, tried again only once they change, and
those that wait too long, alerted once.

An entry the station could not move out of its inbox (set-aside's "left in place") is
remembered as it was then (size, modification time) and skipped until it changes. An
entry unchanged for ``waiting_alert_s`` and not taken is overdue (waiting.py says which
and why): one alert names every newly overdue entry of an inbox. Claiming asks this
object both questions on every listing; it owns what it remembers.
"""

from __future__ import annotations

import hashlib
import logging
import time
from pathlib import Path

from pipeline.station.guard import Guard
from pipeline.station.settings import InboxSettings, Settings
from pipeline.station.waiting import overdue_entries
from pipeline.station.watcher import Listing

log = logging.getLogger("formgate.station")


class Lingering:
    """What the station remembers of the entries that stay in its inboxes."""

    def __init__(self, settings: Settings, guard: Guard) -> None:
        self.settings = settings
        self.guard = guard
        self.left: dict[tuple[str, str], tuple[int, int]] = {}  # left in place, as it was then
        self.overdue_alerted: set[tuple[str, str]] = set()

    def note_left(self, inbox: InboxSettings, name: str, path: Path) -> None:
        """Remember an entry that stayed in the inbox, as it is now: it is tried again once it changes."""
        try:
            st = path.lstat()
        except FileNotFoundError:
            return
        self.left[(inbox.name, name)] = (st.st_size, st.st_mtime_ns)

    def still_left(self, inbox: InboxSettings, name: str, stat: tuple[int, int]) -> bool:
        was = self.left.get((inbox.name, name))
        if was is not None and was != stat:
            del self.left[(inbox.name, name)]  # it changed: try again
            return False
        return was is not None

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
