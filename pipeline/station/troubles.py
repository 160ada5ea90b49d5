"""Faults of the station's surroundings: tell them from faults of one input; pause, retry, resume.

A full disk, a folder made read-only or unmounted, a ledger that cannot be written:
none of these is the fault of the file in hand, and none may stop the station. The
station records such a fault here as a *trouble*; a blocking trouble pauses it (no
new claims; what is in hand waits), and it tries again after 1 s, 2 s, 4 s ... up
to ``retry_max_s``, until the fault has cleared, then resumes by itself. Each
trouble is reported once (log and one alert) when it begins and logged when it ends.

Which errors belong to the surroundings is decided by where they happen: the
station reads an input only in a few places and turns every error there into that
input's quarantine (station.py, setaside.py); any other OSError, and any SQLite
error other than a broken constraint, comes from writing the station's own files.
Pure bookkeeping: times are passed in, nothing is written here.
"""

from __future__ import annotations

import dataclasses
import datetime
import errno
import os
import sqlite3
from dataclasses import dataclass
from pathlib import Path

FIRST_RETRY_S = 1.0
# A trouble that begins again within this long of its end (a disk on the edge of full) is
# logged but not alerted again: one alert per episode, not one per flicker.
REALERT_S = 600.0


def is_environmental(exc: BaseException) -> bool:
    """True for an error of the surroundings met while writing the station's own files or ledger.

    A broken constraint or a misuse of SQLite (IntegrityError, ProgrammingError) is a bug.
    """
    if isinstance(exc, sqlite3.IntegrityError | sqlite3.ProgrammingError | sqlite3.InterfaceError):
        return False
    return isinstance(exc, OSError | sqlite3.DatabaseError)


def kind_of(exc: BaseException) -> str:
    """What sort of fault: 'disk full', 'not writable', 'missing', 'ledger' or 'other'."""
    if isinstance(exc, OSError):
        if exc.errno in (errno.ENOSPC, errno.EDQUOT):
            return "disk full"
        if exc.errno in (errno.EROFS, errno.EACCES, errno.EPERM):
            return "not writable"
        if exc.errno in (errno.ENOENT, errno.ENOTDIR):
            return "missing"
        return "other"
    name = getattr(exc, "sqlite_errorname", "")
    if name == "SQLITE_FULL":
        return "disk full"
    if name.startswith("SQLITE_READONLY") or name.startswith("SQLITE_CANTOPEN"):
        return "not writable"
    return "ledger" if isinstance(exc, sqlite3.Error) else "other"


def fault_key(exc: BaseException, *, ledger: Path) -> str:
    """The kind of fault and the file system it is on: a fault with another key is alerted anew.

    (So a full disk and, after it, a full disk elsewhere give two alerts; the same disk
    filling up again moments later gives one.)
    """
    where = Path(str(exc.filename)) if isinstance(exc, OSError) and exc.filename else ledger
    for folder in (where, *where.parents):
        try:
            return f"{kind_of(exc)} on device {os.stat(folder).st_dev}"
        except OSError:
            continue
    return kind_of(exc)


def describe(exc: BaseException, *, ledger: object = None) -> str:
    """One line naming the path and the error, e.g. 'results/LOT-A: No space left on device'.

    ``ledger``: the ledger's path, named for an SQLite error.
    """
    if isinstance(exc, OSError):
        what = exc.strerror or str(exc) or type(exc).__name__
        if exc.errno in (errno.ENOSPC, errno.EDQUOT):
            what += " (the disk is full)"
        where = exc.filename if exc.filename is not None else ""
        return f"{where}: {what}" if where else what
    if isinstance(exc, sqlite3.Error):
        where = f" {ledger}" if ledger is not None else ""
        if getattr(exc, "sqlite_errorname", "") in ("SQLITE_BUSY", "SQLITE_LOCKED"):
            # another process held its write lock past the busy timeout (a backup, a manual
            # sqlite3 session left open in a transaction)
            return f"the ledger{where} is locked by another process ({exc})"
        return f"the ledger{where} cannot be written ({exc})"
    return f"{type(exc).__name__}: {exc}"


@dataclass(frozen=True, slots=True)
class Trouble:
    """One fault of the surroundings while it lasts; ``blocking`` ones pause the station."""

    key: str
    reason: str
    since: datetime.datetime
    blocking: bool
    kind: str = "other"  # troubles.kind_of: a fault of another kind is alerted anew
    repeated: bool = False  # the same trouble ended moments ago: not alerted again

    def shown(self) -> str:
        head = "paused" if self.blocking else "trouble"
        return f"{head}: {self.reason} since {self.since.isoformat(timespec='seconds')}"


class Troubles:
    """The troubles in force, and when to try again while paused."""

    def __init__(self, retry_max_s: float = 60.0) -> None:
        self.retry_max_s = retry_max_s
        self.active: dict[str, Trouble] = {}
        self.ended: dict[tuple[str, str], datetime.datetime] = {}
        self._wait_s = FIRST_RETRY_S
        self._next_try_s = 0.0

    @property
    def paused(self) -> bool:
        return any(t.blocking for t in self.active.values())

    def report(
        self,
        key: str,
        reason: str,
        *,
        now: datetime.datetime,
        now_s: float,
        blocking: bool = True,
        kind: str = "other",
    ) -> Trouble | None:
        """Note a trouble; the new Trouble if it has just begun (to log and alert once), else None."""
        if key in self.active:
            return None
        ended = self.ended.get((key, kind))
        repeated = ended is not None and (now - ended).total_seconds() < REALERT_S
        trouble = Trouble(key, reason, now, blocking, kind, repeated)
        if blocking and not self.paused:
            self._wait_s = FIRST_RETRY_S
            self._next_try_s = now_s + self._wait_s
        self.active[key] = trouble
        return trouble

    def reword(self, key: str, reason: str) -> None:
        """Say a trouble in force in new words (it changed, but has not ended): its time stays."""
        trouble = self.active.get(key)
        if trouble is not None:
            self.active[key] = dataclasses.replace(trouble, reason=reason)

    def clear(self, key: str, *, now: datetime.datetime) -> Trouble | None:
        """The trouble ``key`` has ended; it is returned (to log), or None if there was none."""
        trouble = self.active.pop(key, None)
        if trouble is not None:
            self.ended[(key, trouble.kind)] = now
        return trouble

    def due(self, now_s: float) -> bool:
        """True when a paused station should try again."""
        return self.paused and now_s >= self._next_try_s

    def failed_again(self, now_s: float) -> float:
        """Another try failed: wait twice as long (up to retry_max_s); the wait in seconds."""
        self._wait_s = min(2 * self._wait_s, self.retry_max_s)
        self._next_try_s = now_s + self._wait_s
        return self._wait_s

    def shown(self) -> list[str]:
        return [t.shown() for t in self.active.values()]
