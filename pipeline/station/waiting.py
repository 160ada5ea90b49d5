"""Nothing waits unseen: which inbox entries have waited too long without being taken, and why.

An entry that the station does not take (a temporary name, a data file without its
marker, a settle-mode file that never ends cleanly, a file left in place) could sit in
an inbox for ever without anyone noticing. Once an entry has gone unchanged for
``waiting_alert_s`` it is *overdue*: the station alerts it once, and
``formgate status`` lists it with its age and the reason it waits. Entries the
station is about to take, and folders, links and pipes (set aside at once), are not
overdue. Pure: a listing, the inbox settings and the time in, a list out.
"""

from __future__ import annotations

from collections.abc import Collection, Mapping
from dataclasses import dataclass

from pipeline.names import to_text
from pipeline.station.handoff import is_temporary
from pipeline.station.settings import InboxSettings
from pipeline.station.watcher import Listing


@dataclass(frozen=True, slots=True)
class Overdue:
    """An inbox entry unchanged for ``age_s`` seconds and not taken; ``why`` says what it waits for."""

    name: str  # as text (names.to_text)
    age_s: float
    why: str

    @property
    def age(self) -> str:
        """The age for people: minutes, hours or days."""
        if self.age_s < 5400:
            return f"{self.age_s / 60:.0f} min"
        if self.age_s < 2 * 86400:
            return f"{self.age_s / 3600:.1f} h"
        return f"{self.age_s / 86400:.1f} days"


def _why(name: str, inbox: InboxSettings, files: Collection[str]) -> str:
    if is_temporary(name):
        return (
            "a temporary name (it starts with a dot, or ends in .tmp or .part), never taken; "
            "if the file is complete, give it its final name"
        )
    if inbox.handover == "marker":
        return f"no marker {to_text(name + inbox.marker_suffix)} beside it yet"
    if inbox.handover == "settle":
        return (
            "it does not look complete: a cycle file must end with a line break, or be a "
            "whole gzip stream"
        )
    return "not taken yet"


def overdue_entries(
    listing: Listing,
    inbox: InboxSettings,
    *,
    now_ns: int,
    waiting_alert_s: float,
    ready: Collection[str] = (),
    left: Mapping[str, str] | None = None,
) -> list[Overdue]:
    """The entries of ``listing`` unchanged for longer than ``waiting_alert_s`` and not taken.

    ``ready`` names files about to be taken (not overdue); ``left`` maps names left in
    place to their reason. Ages come from the entries' modification times.
    """
    left = left or {}
    limit_s = waiting_alert_s
    if inbox.handover == "settle":
        limit_s = max(limit_s, inbox.settle_s)
    out: list[Overdue] = []
    entries = [(n, m) for n, (_, m) in listing.files.items()]
    entries += [(n, o.mtime_ns) for n, o in listing.others.items() if is_temporary(n)]
    for name, mtime_ns in sorted(entries):
        if name in ready:
            continue
        if inbox.handover == "marker" and name.endswith(inbox.marker_suffix):
            continue  # a marker waits for its data; one that waits too long is set aside
        age_s = (now_ns - mtime_ns) / 1e9
        if age_s < limit_s:
            continue
        why = left.get(name) or _why(name, inbox, listing.files)
        if name in listing.others:
            why = f"a {listing.others[name].kind}, not a file, with {why}"
        out.append(Overdue(to_text(name), age_s, why))
    return out
