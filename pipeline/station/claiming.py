"""Claiming finished files from the inboxes: list, decide, set aside, take into work/, register.

An inbox is listed at most every ``RELIST_S`` while a backlog is claimed; the hand-over
rule (handoff.py) says which files are finished. A finished file is renamed into work/
(or, in settle mode, copied while the writer's original is watched) and claimed in the
ledger; an entry that is no input is set aside (setaside.py). Files in work/ the ledger
does not know are registered. Judging the claimed inputs is tasks.py's job, recording
and archiving them publishing.py's.
"""

from __future__ import annotations

import datetime
import errno
import hashlib
import logging
import math
import os
import time
from collections import deque
from collections.abc import Callable
from functools import partial
from pathlib import Path
from typing import BinaryIO

from pipeline.ledger.ledger import Ledger
from pipeline.names import fit, is_text, to_text
from pipeline.station import faults
from pipeline.station.guard import Guard
from pipeline.station.handoff import Seen, decide, file_looks_complete, is_temporary
from pipeline.station.inhand import path_key
from pipeline.station.lingering import Lingering
from pipeline.station.publishing import Publisher
from pipeline.station.rules_in_force import RulesInForce
from pipeline.station.setaside import (
    NAME_RESERVE_BYTES,
    SetAside,
    entry_reason,
    move_failed_by_itself,
    unreadable_reason,
)
from pipeline.station.settings import InboxSettings, Settings, choose_profile
from pipeline.station.settle_wait import cut_reason
from pipeline.station.taken import UnreadableSource, take_copy
from pipeline.station.tasks import MB, Tasks
from pipeline.station.troubles import describe
from pipeline.station.watcher import Listing
from pipeline.writing import move_into, require_folder

log = logging.getLogger("formgate.station")

# With a backlog in an inbox, finished files are claimed from the last listing for up to
# this long before the folder is listed again: listing thousands of files on every turn
# of the loop cost more than judging them (and newer files wait behind the backlog anyway).
# Every inbox folder is also looked for at most this often while nothing can be claimed.
RELIST_S = 1.0


class Claims:
    """Claims finished files from the inboxes; remembers what it saw of each inbox."""

    def __init__(
        self,
        settings: Settings,
        ledger: Ledger,
        clock: Callable[[], datetime.datetime],
        *,
        guard: Guard,
        rules: RulesInForce,
        tasks: Tasks,
        publisher: Publisher,
        lingering: Lingering,
        aside: SetAside,
        listing: Callable[[Path], Listing],
    ) -> None:
        self.settings = settings
        self.ledger = ledger
        self.clock = clock
        self.guard = guard
        self.rules = rules
        self.tasks = tasks
        self.publisher = publisher
        self.lingering = lingering
        self.aside = aside
        self.listing = listing  # lists a folder (an inbox or work/): the station's
        self.seen: dict[str, dict[str, Seen]] = {i.name: {} for i in settings.inboxes}
        # per inbox: when it was last listed, and the finished files found then but not yet
        # claimed (a backlog is claimed from this list, not by listing the folder every turn)
        self.ready: dict[str, tuple[float, deque[str]]] = {}
        self.cut_noted: dict[str, float] = {}  # inbox files said to look cut, and since when
        self.first = 0  # the inbox served first in the next turn: the one after the last served
        self.looked_at = -math.inf  # when every inbox folder was last looked for

    def capacity(self) -> int:
        return self.tasks.room()

    def scan_inboxes(self, now_s: float) -> None:
        """List the inboxes and claim finished files while there is room, a fair share each.

        The inboxes take turns file by file, beginning with the one after the inbox served
        last, so a backlog in one keeps no other waiting; each is listed before any file is
        claimed, so one that has gone shows at once.
        """
        if self.capacity() <= 0 or self.rules.rulebook is None:
            # nothing could be claimed: listing a backlog again would only cost time
            self.look_for_inboxes(now_s)
            return
        count = len(self.settings.inboxes)
        turn = [(self.first + k) % count for k in range(count)]  # indexes, in this turn's order
        for inbox in (self.settings.inboxes[i] for i in turn):
            listed_at, pending = self.ready.get(inbox.name, (-math.inf, deque()))
            if not pending or now_s - listed_at >= RELIST_S:
                pending, listed_at = deque(self.list_inbox(inbox, now_s)), now_s
            self.ready[inbox.name] = (listed_at, pending)
        self.looked_at = now_s
        while self.capacity() > 0 and not self.guard.paused:
            served = False
            for i in turn:
                inbox = self.settings.inboxes[i]
                pending = self.ready[inbox.name][1]
                if not pending or self.capacity() <= 0 or self.guard.paused:
                    continue
                name = pending.popleft()
                self.guard.handle(path_key(inbox.folder / name), "claiming",
                                  partial(self.claim, inbox, name), retry=False)
                self.first = (i + 1) % count
                served = True
            if not served:
                return

    def look_for_inboxes(self, now_s: float) -> None:
        """Note an inbox whose folder is not there, in a turn that lists none (the station is
        full, or paused): it shows at once, not once there is room again. Its trouble ends
        when the folder is listed again."""
        if now_s - self.looked_at < RELIST_S:
            return
        self.looked_at = now_s
        for inbox in self.settings.inboxes:
            if not inbox.folder.is_dir():
                self.guard.inbox_trouble(
                    inbox,
                    FileNotFoundError(errno.ENOENT, os.strerror(errno.ENOENT), str(inbox.folder)),
                )

    def list_inbox(self, inbox: InboxSettings, now_s: float) -> tuple[str, ...]:
        """List one inbox and decide which files are finished; set aside what is no input."""
        try:
            listing = self.listing(inbox.folder)
            if not listing.files and not listing.others and not inbox.folder.is_dir():
                # a folder that is not there lists empty: an unmounted share, a removed folder
                raise FileNotFoundError(errno.ENOENT, os.strerror(errno.ENOENT), str(inbox.folder))
        except OSError as exc:  # the folder itself: a share gone, no permission
            self.guard.inbox_trouble(inbox, exc)
            return ()
        self.guard.inbox_trouble(inbox, None)
        decision = decide(
            inbox.handover,
            listing.files,
            self.seen[inbox.name],
            now_s,
            settle_s=inbox.settle_s,
            marker_suffix=inbox.marker_suffix,
            orphan_marker_s=inbox.orphan_marker_s,
        )
        self.seen[inbox.name] = dict(decision.seen)
        lingering = self.lingering
        lingering.forget_gone(inbox, (*listing.files, *listing.others))
        for marker in decision.orphan_markers:
            if lingering.still_left(inbox, marker, now_s=now_s):
                continue
            data = to_text(marker[: -len(inbox.marker_suffix)])
            self.set_aside(
                inbox, marker, "marker",
                f"{to_text(marker)}: a marker file without its data file (waited "
                f"{inbox.orphan_marker_s:g} s for {data}).\n  Check the cycler's hand-over; "
                "the data file never arrived.",
            )
        for name, other in listing.others.items():
            if not is_temporary(name) and not lingering.still_left(inbox, name, now_s=now_s):
                self.set_aside(inbox, name, other.kind,
                               entry_reason(to_text(name), other.kind, other.points_to))
        ready = tuple(n for n in decision.ready if not lingering.still_left(inbox, n, now_s=now_s))
        lingering.alert_overdue(inbox, listing, ready)
        return ready

    def set_aside(self, inbox: InboxSettings, name: str, kind: str, reason: str) -> None:
        path = inbox.folder / name

        def effect() -> None:
            self.aside.entry(self.ledger, path, inbox=inbox.name, kind=kind, reason=reason,
                             now=self.clock())
            self.lingering.note_left(inbox, name, path, now_s=time.monotonic())

        self.guard.handle(path_key(path), "setting aside", effect, retry=False)

    def record_waits(self, inbox: InboxSettings, name: str, fh: BinaryIO, seen: Seen) -> bool:
        """True while a settled file whose record looks cut short still has time to grow.

        A writer that pauses leaves a quiet file ending on a whole line; only its program
        can tell it is not finished (record_end.py). Such a file waits up to
        ``cut_wait_factor`` x ``settle_s``, then is taken (and held as incomplete).
        """
        rulebook = self.rules.rulebook
        if rulebook is None:
            return False
        text = to_text(name)
        key = path_key(inbox.folder / name)
        why = cut_reason(fh, text, rulebook, choose_profile(self.settings, inbox, text))
        if why is None:
            self.cut_noted.pop(key, None)
            return False
        waited_s = time.monotonic() - seen.since_s
        if waited_s < inbox.settle_s * inbox.cut_wait_factor:
            if self.cut_noted.get(key) != seen.since_s:  # said once per quiet spell
                self.cut_noted[key] = seen.since_s
                log.info("%s: %s; waiting up to %g s for the rest of it", text, why,
                         inbox.settle_s * inbox.cut_wait_factor)
            return True
        self.cut_noted.pop(key, None)
        log.warning("%s: %s; taken after %.0f s without change", text, why, waited_s)
        return False

    def claim(self, inbox: InboxSettings, name: str) -> None:
        """Move a finished file into work/ (atomic rename) and record it in the ledger."""
        source = inbox.folder / name
        text = to_text(name)
        if inbox.handover == "settle":
            try:
                with source.open("rb") as fh:
                    stat = os.fstat(fh.fileno())
                    seen = self.seen[inbox.name].get(name)
                    if seen is None or (seen.size, seen.mtime_ns) != (stat.st_size, stat.st_mtime_ns):
                        return  # written to since it was found settled: decide again next listing
                    # an oversized file is claimed as it is: it goes to quarantine unread
                    oversized = stat.st_size > self.settings.max_input_MB * MB
                    if not oversized and not file_looks_complete(fh):
                        return  # quiet but cut short: wait for the writer to finish
                    if not oversized and self.record_waits(inbox, name, fh, seen):
                        return  # its record ends before its program does: give it longer
                    if oversized:
                        copy = None
                    else:  # judge a copy of its own; the writer's original is watched
                        copy = take_copy(fh, source, self.settings.work, inbox=inbox.name,
                                         name=fit(text, reserve_bytes=NAME_RESERVE_BYTES))
            except FileNotFoundError as exc:
                if exc.filename not in (None, str(source)):
                    raise  # a station folder has gone: the surroundings' fault
                return  # the file has gone: someone took it
            except UnreadableSource as exc:  # moved aside, then it could not be read
                self.aside.entry(self.ledger, exc.path, inbox=inbox.name, kind="file",
                                 reason=unreadable_reason(text, exc.error), now=self.clock())
                return
            except OSError as exc:
                if exc.filename is not None and Path(exc.filename) == source:
                    self.cannot_take(inbox, name, source, exc)  # opening or moving it failed
                    return
                raise  # not the file's fault: writing the copy failed
            if copy is not None:
                self.tasks.note_inbox(str(copy.path), inbox.name)
                faults.point("after_claim")
                self.register(copy.path, text, known=(copy.sha256, copy.size))
                return
        require_folder(self.settings.work)
        try:
            target = move_into(
                source,
                self.settings.work,
                name=fit(text, reserve_bytes=NAME_RESERVE_BYTES),
                make_parents=False,
            )
        except OSError as exc:
            self.cannot_take(inbox, name, source, exc)
            return
        if target is None:
            return
        if inbox.handover == "marker":
            marker = inbox.folder / (name + inbox.marker_suffix)
            try:
                move_into(marker, self.settings.work, name=target.name + inbox.marker_suffix,
                          make_parents=False)
            except OSError as exc:  # the marker is not the input: it is set aside later
                log.warning("%s: its marker stays in the inbox (%s)", text, describe(exc))
        self.tasks.note_inbox(str(target), inbox.name)
        faults.point("after_claim")
        self.register(target, text)

    def cannot_take(self, inbox: InboxSettings, name: str, source: Path, exc: OSError) -> None:
        """Opening or moving an inbox file failed: set it aside, leave it in place, or pause."""
        text = to_text(name)
        if exc.filename2 is None:  # opening it failed (a rename names both paths)
            self.set_aside(inbox, name, "file", unreadable_reason(text, exc))
            return
        if not move_failed_by_itself(exc, source, self.settings.work):
            raise exc
        self.aside.left_in_place(self.ledger, source, inbox=inbox.name, kind="file",
                                 reason=f"{text} was not judged", exc=exc, now=self.clock())
        self.lingering.note_left(inbox, name, source, now_s=time.monotonic())

    def register(
        self, path: Path, name: str | None = None, *, known: tuple[str, int] | None = None
    ) -> None:
        """Ledger claim for a file in work/; duplicates are archived at once, the rest queued.

        ``known``: the SHA-256 and size of a copy the station has just made (not read again).
        """
        name = name or _work_name_text(path.name)
        try:
            if known is None:
                with path.open("rb") as fh:  # streamed: the file is not held in memory
                    size = os.fstat(fh.fileno()).st_size
                    sha = hashlib.file_digest(fh, "sha256").hexdigest()
            else:
                sha, size = known
        except FileNotFoundError:
            return
        except OSError as exc:  # the file's own fault: the station may not read it
            inbox = self.tasks.inbox_for(str(path))
            self.aside.entry(self.ledger, path, inbox=inbox, kind="file",
                             reason=unreadable_reason(name, exc), now=self.clock())
            return
        row, earlier = self.ledger.inputs.claim(
            sha256=sha,
            name=name,
            size=size,
            arrived_at=self.clock(),
            work_path=str(path),
        )
        faults.point("after_record_claim")
        if row.state == "duplicate":
            assert earlier is not None
            log.info(
                "%s: same bytes as input %d (%s); archived as a duplicate, not judged again",
                row.name,
                earlier.id,
                earlier.name,
            )
            self.publisher.finish(row, "duplicate")
            return
        if size > self.settings.max_input_MB * MB:
            self.publisher.quarantine(
                row,
                f"{row.name}: the file is {size / MB:.1f} MB, above the station's "
                f"limit of {self.settings.max_input_MB:g} MB.\n  If such files are "
                "expected, raise max_input_MB in station.toml.",
            )
            return
        self.tasks.add(row)

    def reconcile_work(self) -> None:
        """Files in work/ the ledger does not know (a crash right after the claim) are registered."""
        known = self.tasks.in_hand()
        for name in sorted(self.listing(self.settings.work).files):
            path = self.settings.work / name
            if is_temporary(name) or str(path) in known:
                continue
            if any(
                name.endswith(i.marker_suffix)
                for i in self.settings.inboxes
                if i.handover == "marker"
            ):
                continue
            row = self.ledger.inputs.by_work_path(str(path))
            if row is None or row.final_path is not None:
                self.guard.handle(path_key(path), "registering", partial(self.register, path),
                            retry=False)


def _original_name(work_name: str) -> str:
    """The inbox name of a file in work/ (move_into appends ``~N`` on a clash)."""
    base, sep, tail = work_name.rpartition("~")
    return base if sep and tail.isdigit() else work_name


def _work_name_text(work_name: str) -> str:
    """The ledger's text name of a file found in work/ (the station names them as text)."""
    name = _original_name(work_name)
    return name if is_text(name) else to_text(name)
